//! The processes of one fit: one, or every process of an MPI job (`mpi` feature).
//!
//! Errors follow one rule so that a job never hangs and says what went wrong once: before the
//! processes form a group, every process reports whether it is ready and all stop together
//! if one is not (the lowest failing process prints its message); after that, errors that
//! every process meets together (a failed training, a refused group, a checkpoint that
//! process 0 could not write) are printed by process 0 alone, and an error only one process
//! meets is printed by it and ends the whole job (`MPI_Abort`).

use std::rc::Rc;

use neural_sde::collective::failed_ranks;
use neural_sde::Collective;

use super::Failure;

/// The processes of this run.
pub struct Group {
    #[cfg(feature = "mpi")]
    mpi: Rc<neural_sde::collective::MpiGroup>,
    shared: Rc<dyn Collective>,
}

impl Group {
    /// Joins the MPI job this process was started in (with the `mpi` feature), or stands
    /// alone. Refuses to run as one of several copies started by `mpirun` without the `mpi`
    /// feature: they would each fit alone and race to write the same files.
    pub fn join() -> Result<Self, Failure> {
        #[cfg(feature = "mpi")]
        {
            let mpi = Rc::new(neural_sde::collective::MpiGroup::init()?);
            let shared: Rc<dyn Collective> = mpi.clone();
            Ok(Self { mpi, shared })
        }
        #[cfg(not(feature = "mpi"))]
        {
            for var in [
                "OMPI_COMM_WORLD_SIZE",
                "PMI_SIZE",
                "PMIX_SIZE",
                "MPI_LOCALNRANKS",
            ] {
                if let Some(n) = std::env::var(var)
                    .ok()
                    .and_then(|v| v.parse::<usize>().ok())
                {
                    if n > 1 {
                        return Err(Failure::input(format!(
                            "started as one of {n} MPI processes, but this neural-sde was built without the `mpi` feature, so each would fit alone and write the same files; rebuild with `cargo build --release --features mpi`, or run one process"
                        )));
                    }
                }
            }
            Ok(Self {
                shared: Rc::new(neural_sde::SingleProcess),
            })
        }
    }

    /// This process's rank.
    pub fn rank(&self) -> usize {
        self.shared.rank()
    }

    /// Whether this process writes files and prints results.
    pub fn is_root(&self) -> bool {
        self.rank() == 0
    }

    /// Process 0's answer to a yes-or-no question, on every process (for choices that depend
    /// on a process's own clock, which must not differ between processes).
    pub fn root_decides(&self, yes: bool) -> Result<bool, Failure> {
        let mut b = vec![u8::from(yes)];
        self.shared.broadcast(&mut b, 0)?;
        Ok(b.first() == Some(&1))
    }

    /// A handle for a trainer.
    pub fn handle(&self) -> Box<dyn Collective> {
        Box::new(self.shared.clone())
    }

    /// Every process reports whether `ready` succeeded; if any failed, all stop, and only the
    /// lowest failing process prints its message.
    pub fn agree<T>(&self, ready: Result<T, Failure>) -> Result<T, Failure> {
        if self.shared.size() == 1 {
            return ready;
        }
        let failed = failed_ranks(self.shared.as_ref(), ready.is_ok())?;
        match (ready, failed.first()) {
            (Ok(v), None) => Ok(v),
            (Err(f), Some(&first)) if first == self.rank() => Err(f),
            (Err(f), _) => Err(f.quiet()),
            (Ok(_), Some(_)) => Err(Failure::input("another process failed").quiet()),
        }
    }

    /// The end of the run on every process: the process that owns a failure's message
    /// prints it, then all wait for each other, so that no process exits (which makes
    /// `mpirun` end the others) before the message is out.
    pub fn finish(&self, result: Result<(), Failure>) -> Result<(), Failure> {
        if self.shared.size() == 1 {
            return result;
        }
        let result = result.map_err(|f| {
            if !f.quiet {
                f.print();
            }
            f.quiet()
        });
        let mut token = [0.0];
        self.shared.sum_f64(&mut token)?;
        result
    }

    /// What to do with an error met after the group formed: errors every process meets are
    /// printed by process 0 only; an error of this process alone is printed here and ends
    /// every process of the job.
    pub fn settle(&self, e: neural_sde::Error) -> Failure {
        let shared = matches!(
            e,
            neural_sde::Error::Training(_) | neural_sde::Error::Collective(_)
        );
        let f = Failure::from(e);
        if self.shared.size() == 1 || (shared && self.is_root()) {
            return f;
        }
        if shared {
            return f.quiet();
        }
        #[cfg(feature = "mpi")]
        {
            eprintln!(
                "error (process {} of {}): {}",
                self.rank(),
                self.shared.size(),
                f.message
            );
            self.mpi.abort(f.code)
        }
        #[cfg(not(feature = "mpi"))]
        f
    }
}
