//! The process group of an MPI job (`mpirun -np P …`), through the `mpi` crate.

use mpi::collective::SystemOperation;
use mpi::topology::SimpleCommunicator;
use mpi::traits::{Communicator, CommunicatorCollectives, Root};

use super::reduce::Collective;
use crate::error::{Error, Result};

/// Every process of `MPI_COMM_WORLD`. Holds MPI initialised until it is dropped (then
/// `MPI_Finalize` runs), so make one per program, in `main`, and keep it to the end.
///
/// A program that was not started by `mpirun` is a world of one process.
pub struct MpiGroup {
    world: SimpleCommunicator,
    rank: usize,
    size: usize,
    // Dropped last: finalises MPI.
    _universe: mpi::environment::Universe,
}

impl std::fmt::Debug for MpiGroup {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("MpiGroup")
            .field("rank", &self.rank)
            .field("size", &self.size)
            .finish()
    }
}

impl MpiGroup {
    /// Initialises MPI and joins `MPI_COMM_WORLD`.
    ///
    /// # Errors
    /// [`Error::Collective`] when MPI is already initialised in this process.
    pub fn init() -> Result<Self> {
        let universe = mpi::initialize().ok_or_else(|| {
            Error::Collective(
                "MPI is already initialised in this process; make one MpiGroup".into(),
            )
        })?;
        let world = universe.world();
        let rank = usize::try_from(world.rank())
            .map_err(|_| Error::Collective("MPI returned a negative rank".into()))?;
        let size = usize::try_from(world.size())
            .map_err(|_| Error::Collective("MPI returned a negative size".into()))?;
        Ok(Self {
            world,
            rank,
            size,
            _universe: universe,
        })
    }

    /// Ends every process of the job at once with `code` (`MPI_Abort`): for an error that
    /// only this process saw, where the others would wait for it in the next reduction.
    pub fn abort(&self, code: i32) -> ! {
        self.world.abort(code)
    }
}

impl Collective for MpiGroup {
    fn rank(&self) -> usize {
        self.rank
    }

    fn size(&self) -> usize {
        self.size
    }

    fn sum_f32(&self, buf: &mut [f32]) -> Result<()> {
        if self.size > 1 {
            let send = buf.to_vec();
            self.world
                .all_reduce_into(&send[..], buf, SystemOperation::sum());
        }
        Ok(())
    }

    fn sum_f64(&self, buf: &mut [f64]) -> Result<()> {
        if self.size > 1 {
            let send = buf.to_vec();
            self.world
                .all_reduce_into(&send[..], buf, SystemOperation::sum());
        }
        Ok(())
    }

    fn broadcast(&self, bytes: &mut Vec<u8>, root: usize) -> Result<()> {
        if root >= self.size {
            return Err(Error::Collective(format!(
                "broadcast from process {root} in a group of {} processes",
                self.size
            )));
        }
        if self.size == 1 {
            return Ok(());
        }
        let root_i32 = i32::try_from(root)
            .map_err(|_| Error::Collective(format!("process {root} is not an MPI rank")))?;
        let proc = self.world.process_at_rank(root_i32);
        let mut len = bytes.len() as u64;
        proc.broadcast_into(&mut len);
        let len = usize::try_from(len)
            .map_err(|_| Error::Collective(format!("broadcast of {len} bytes")))?;
        bytes.resize(len, 0);
        proc.broadcast_into(&mut bytes[..]);
        Ok(())
    }
}
