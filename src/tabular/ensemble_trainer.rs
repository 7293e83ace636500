//! Training several models of one table together: the members of an [`Ensemble`].

use std::path::{Path, PathBuf};

use crate::collective::on_root;
use crate::error::{Error, Result};
use crate::tabular::ensemble::Ensemble;
use crate::tabular::ensemble_file::{self, MemberParts, ENSEMBLE_FORMAT, MAX_MEMBERS, MAX_MODELS};
use crate::tabular::model::LatentConfig;
use crate::tabular::stacking::stacking_weight;
use crate::tabular::table::Table;

use crate::tabular::train::{
    checkpoint_parses_back, periodic, row_mean, TrainConfig, TrainReport, Trainer,
};

/// Trains the members of an [`Ensemble`]: one [`Trainer`] per member, on the same table and
/// settings, member `i` with seed `seed + i` (its own minibatches, start and noise) and
/// holding out block `i` of one shuffle of the rows ([`TrainConfig::split_seed`],
/// [`TrainConfig::validation_block`]), so that the members validate on different rows and,
/// with a fifth held out and up to five members, every row trains at least one member.
/// [`EnsembleTrainer::fit`] trains them in turn one epoch each, so that a time budget is
/// shared evenly and a paused run ([`EnsembleTrainer::set_epochs`]) leaves every member at
/// the same epoch. Its file ([`EnsembleTrainer::save`]) holds every member's training state,
/// and [`EnsembleTrainer::resume`] continues it exactly; with one member it is a single
/// trainer's checkpoint.
///
/// [`EnsembleTrainer::compare_starts`] may add a second fit of a member (from one Gaussian),
/// so the trainer holds models, each with a weight: the members' first fits, in order, then
/// the second fits kept.
///
/// ```
/// use neural_sde::{builtin_demo, EvalOptions, EnsembleTrainer, LatentConfig, TrainConfig};
///
/// let table = builtin_demo()?.take_rows(&(0..200).collect::<Vec<_>>())?;
/// let cfg = TrainConfig { epochs: 1, ..TrainConfig::default() };
/// let mut trainer = EnsembleTrainer::new(&table, LatentConfig::default(), cfg, 2)?;
/// let reports = trainer.fit()?;
/// assert_eq!(reports.len(), 2);
/// let ensemble = trainer.into_ensemble()?;
/// let e = ensemble.evaluate(&table, EvalOptions::new(8, 0))?;
/// assert!(e.loglik_per_dim.is_finite());
/// # Ok::<(), neural_sde::Error>(())
/// ```
#[derive(Debug)]
pub struct EnsembleTrainer {
    members: Vec<Trainer>,
    periodic: Option<(usize, PathBuf)>,
    /// One per trainer, positive; the ensemble's weights are these divided by their sum.
    weights: Vec<f64>,
}

/// How [`EnsembleTrainer::compare_starts`] weighed the two fits of one member.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StartComparison {
    /// Validation log-likelihood of the member's fit from the mixture start (standardised
    /// units, per row).
    pub mixture: f64,
    /// That of the fit from one Gaussian.
    pub gaussian: f64,
    /// The share of the member's weight given to the fit from the mixture
    /// ([`stacking_weight`]): 1 when only it was kept, 0 when only the fit from one Gaussian
    /// was.
    pub mixture_weight: f64,
    /// Where the fit from one Gaussian sits among the trainer's models (0-based), when it
    /// was kept beside the mixture's; when it was kept alone, it took the member's place.
    pub gaussian_at: Option<usize>,
    /// Seconds the fit from one Gaussian trained.
    pub seconds: f64,
}

impl EnsembleTrainer {
    /// `members` trainers of `table` (as [`Trainer::new`]), member `i` with seed
    /// `train_cfg.seed + i` (wrapping), split seed `train_cfg.split_seed` (or else
    /// `train_cfg.seed`) and validation block `train_cfg.validation_block + i`; one member is
    /// `Trainer::new` with `train_cfg` itself.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for 0 members or more than [`MAX_MEMBERS`]; as
    /// [`Trainer::new`].
    pub fn new(
        table: &Table,
        model_cfg: LatentConfig,
        train_cfg: TrainConfig,
        members: usize,
    ) -> Result<Self> {
        check_count(members, MAX_MEMBERS, "members of an ensemble")?;
        let trainers = (0..members)
            .map(|i| {
                if members == 1 {
                    return Trainer::new(table, model_cfg.clone(), train_cfg.clone());
                }
                let cfg = TrainConfig {
                    seed: train_cfg.seed.wrapping_add(i as u64),
                    split_seed: Some(train_cfg.split_seed.unwrap_or(train_cfg.seed)),
                    validation_block: train_cfg.validation_block.wrapping_add(i),
                    ..train_cfg.clone()
                };
                Trainer::new(table, model_cfg.clone(), cfg)
            })
            .collect::<Result<Vec<_>>>()?;
        Self::from_trainers(trainers)
    }

    /// Trains `members` together (trainers of the same columns), with equal weights.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for no trainer or more than [`MAX_MODELS`];
    /// [`Error::Data`] when their models' columns differ.
    pub fn from_trainers(members: Vec<Trainer>) -> Result<Self> {
        check_models(members.len())?;
        if let Some(m) = members
            .iter()
            .position(|t| !t.model().same_columns_as(members[0].model()))
        {
            return Err(Error::Data {
                path: "<ensemble>".into(),
                reason: format!(
                    "trainer {m} models other columns than trainer 0; the members of an ensemble model the same columns"
                ),
            });
        }
        Ok(Self {
            weights: vec![1.0; members.len()],
            members,
            periodic: None,
        })
    }

    /// Continues training from a file written by [`EnsembleTrainer::save`] (or by
    /// [`Trainer::save`]: an ensemble of one), on the same table.
    ///
    /// # Errors
    /// As [`Trainer::resume`] for each member, naming it.
    pub fn resume(path: impl AsRef<Path>, table: &Table) -> Result<Self> {
        let path = path.as_ref();
        let raw = crate::nn::checkpoint::read_raw(path)?;
        if raw.format != ENSEMBLE_FORMAT {
            return Self::from_trainers(vec![Trainer::resume(path, table)?]);
        }
        let header = ensemble_file::read_header(path, &raw)?;
        let members = ensemble_file::read_members(path, &raw, &header, |stored| {
            Trainer::resume_stored(stored, table, None)
        })?;
        let mut t = Self::from_trainers(members)?;
        t.set_weights(&header.weights)?;
        Ok(t)
    }

    /// Trains every member data-parallel in a group of processes (see [`Trainer::in_group`]),
    /// each member with its own handle from `handle`.
    ///
    /// # Errors
    /// As [`Trainer::in_group`].
    pub fn in_group(
        self,
        mut handle: impl FnMut() -> Box<dyn crate::collective::Collective>,
    ) -> Result<Self> {
        let members = self
            .members
            .into_iter()
            .map(|m| m.in_group(handle()))
            .collect::<Result<Vec<_>>>()?;
        Ok(Self { members, ..self })
    }

    /// The members' trainers.
    pub fn members(&self) -> &[Trainer] {
        &self.members
    }

    /// The members' trainers, to set up each (observers, a group of processes).
    pub fn members_mut(&mut self) -> &mut [Trainer] {
        &mut self.members
    }

    /// Ends training and returns the members' trainers.
    pub fn into_trainers(self) -> Vec<Trainer> {
        self.members
    }

    /// Each model's weight, proportional to its share of the ensemble
    /// ([`EnsembleTrainer::into_ensemble`] divides them by their sum).
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// Sets the models' weights (proportional; for instance those of another trainer whose
    /// models these refit).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a count that differs from the models' or a weight that
    /// is not finite and positive.
    pub fn set_weights(&mut self, weights: &[f64]) -> Result<()> {
        if weights.len() != self.members.len() {
            return Err(Error::config(
                "weights",
                weights.len(),
                format!("give one weight per model ({} models)", self.members.len()),
            ));
        }
        if let Some(w) = weights.iter().find(|w| !(w.is_finite() && **w > 0.0)) {
            return Err(Error::config(
                "weights",
                w,
                "every weight must be finite and positive",
            ));
        }
        self.weights = weights.to_vec();
        Ok(())
    }

    /// Stops every member once [`EnsembleTrainer::fit`] has run `seconds` (wall clock, all
    /// members together; `None`: no limit).
    ///
    /// # Errors
    /// As [`Trainer::set_time_budget`].
    pub fn set_time_budget(&mut self, seconds: Option<f64>) -> Result<()> {
        self.members
            .iter_mut()
            .try_for_each(|m| m.set_time_budget(seconds))
    }

    /// Ends each member's training at epoch `epochs` (see [`Trainer::set_epochs`]).
    pub fn set_epochs(&mut self, epochs: usize) {
        for m in &mut self.members {
            m.set_epochs(epochs);
        }
    }

    /// Writes the file ([`EnsembleTrainer::save`]) whenever a member ends an epoch that is a
    /// multiple of `epochs`, once every member has trained it.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `epochs == 0`.
    pub fn checkpoint_every(&mut self, epochs: usize, path: impl Into<PathBuf>) -> Result<()> {
        self.periodic = Some(periodic(epochs, path.into())?);
        Ok(())
    }

    /// Trains every member until its stop rule ends it, one epoch of each member in turn,
    /// then restores each member's best weights; returns each member's report (its seconds
    /// are the wall time of the whole run).
    ///
    /// # Errors
    /// As [`Trainer::fit`] for a member; [`Error::Io`] or [`Error::Checkpoint`] when a
    /// periodic checkpoint cannot be written.
    pub fn fit(&mut self) -> Result<Vec<TrainReport>> {
        for m in &mut self.members {
            m.begin_run();
        }
        loop {
            let mut trained = false;
            let mut due = false;
            for i in 0..self.members.len() {
                let m = &mut self.members[i];
                if m.state().finished.is_some() {
                    continue;
                }
                trained = true;
                if let Err(e) = m.run_epoch() {
                    // The failed member has restored its best weights; so do the others,
                    // so that what is saved next holds every member's best model.
                    for (j, other) in self.members.iter_mut().enumerate() {
                        if j != i && !other.mid_epoch() {
                            other.end_run()?;
                        }
                    }
                    return Err(e);
                }
                if let Some((every, _)) = &self.periodic {
                    due |= self.members[i].state().epoch.is_multiple_of(*every);
                }
            }
            if !trained {
                break;
            }
            if let (true, Some((_, path))) = (due, &self.periodic) {
                self.save(path)?;
            }
        }
        self.members.iter_mut().map(Trainer::end_run).collect()
    }

    /// The second part of the `fit` command's protocol, for each member whose
    /// [`Trainer::gaussian_start`] offers a fit from one Gaussian: trains those fits together
    /// (each first passed to `join`, which may put it in a group of processes or add
    /// observers), within `time_budget` seconds, and weighs each member's two fits by their
    /// likelihood on the member's validation rows ([`stacking_weight`]): the member's weight
    /// is split between them, and a fit whose share is 0 is dropped (the fit from one
    /// Gaussian takes the member's place when the mixture's share is 0). The fits from one
    /// Gaussian kept beside their member's are appended, in the members' order. Returns, per
    /// member, how its fits were weighed (`None` for a member with nothing to compare).
    ///
    /// The validation rows are held out from both fits, so the weight is chosen on rows
    /// neither trained on. Measured on the crate's open tables (benchmarks document), it
    /// gained on every table over keeping the better fit.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] when keeping a second fit of every member that offers one
    /// could take the trainer past [`MAX_MODELS`] models (a file's limit; it cannot happen
    /// with the at most [`MAX_MEMBERS`] members of [`EnsembleTrainer::new`]); as
    /// [`Trainer::gaussian_start`], `join`, [`EnsembleTrainer::fit`] and
    /// [`Trainer::validation_logliks`].
    pub fn compare_starts(
        &mut self,
        table: &Table,
        time_budget: Option<f64>,
        mut join: impl FnMut(Trainer) -> Result<Trainer>,
    ) -> Result<Vec<Option<StartComparison>>> {
        let mut starts = Vec::new();
        for (i, m) in self.members.iter().enumerate() {
            if let Some(other) = m.gaussian_start(table)? {
                starts.push((i, other));
            }
        }
        let mut out = vec![None; self.members.len()];
        if starts.is_empty() {
            return Ok(out);
        }
        if self.members.len() + starts.len() > MAX_MODELS {
            return Err(Error::config(
                "members",
                self.members.len(),
                format!(
                    "comparing starts may keep two fits of each member and a file holds at most {MAX_MODELS} models; use at most {MAX_MEMBERS} members"
                ),
            ));
        }
        let (which, others): (Vec<usize>, Vec<Trainer>) = starts.into_iter().unzip();
        let others = others.into_iter().map(&mut join).collect::<Result<_>>()?;
        let mut together = Self::from_trainers(others)?;
        together.set_time_budget(time_budget)?;
        let reports = together.fit()?;
        let mut appended = Vec::new();
        for ((i, mut other), report) in which.into_iter().zip(together.members).zip(reports) {
            let mine = self.members[i].validation_logliks()?;
            let theirs = other.validation_logliks()?;
            let w = stacking_weight(&mine, &theirs);
            self.members[i].mark_starts_weighed();
            other.mark_starts_weighed();
            // The fit from one Gaussian ran within what was left of the budget, which differs
            // from run to run; it records its member's whole budget instead, so that a file
            // does not depend on the clock (as the member's own configuration does not).
            other.set_time_budget(self.members[i].config().time_budget_secs)?;
            let mut gaussian_at = None;
            if w <= 0.0 {
                self.members[i] = other;
            } else if w < 1.0 {
                gaussian_at = Some(self.members.len() + appended.len());
                appended.push((other, self.weights[i] * (1.0 - w)));
                self.weights[i] *= w;
            }
            out[i] = Some(StartComparison {
                // Both hold validation rows (`gaussian_start` offers a start only then).
                mixture: row_mean(&mine).unwrap_or(f64::NAN),
                gaussian: row_mean(&theirs).unwrap_or(f64::NAN),
                mixture_weight: w,
                gaussian_at,
                seconds: report.seconds,
            });
        }
        for (t, w) in appended {
            self.members.push(t);
            self.weights.push(w);
        }
        Ok(out)
    }

    /// Writes every member's checkpoint (as [`Trainer::save`]) into one file, atomically; with
    /// one member the file is that member's checkpoint. In a group of processes only process
    /// 0 writes, and every process returns the outcome.
    ///
    /// # Errors
    /// As [`Trainer::save`].
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        let path = path.as_ref();
        if let [one] = self.members.as_slice() {
            return one.save(path);
        }
        if self.members.iter().any(Trainer::mid_epoch) {
            return Err(Error::Training(format!(
                "cannot save {} in the middle of an epoch",
                path.display()
            )));
        }
        let what = format!("the checkpoint {}", path.display());
        on_root(self.members[0].group(), &what, || {
            let parts = self
                .members
                .iter()
                .map(|m| {
                    let (tensors, header) = m.checkpoint_parts()?;
                    let header = serde_json::value::to_raw_value(&header)?;
                    Ok(MemberParts { tensors, header })
                })
                .collect::<Result<Vec<_>>>()?;
            ensemble_file::write(path, parts, &self.weights, checkpoint_parses_back)
        })
    }

    /// The ensemble of the trainers' models, with their [`EnsembleTrainer::weights`] (and
    /// the network weights they have now: the best ones once [`EnsembleTrainer::fit`] has
    /// returned).
    ///
    /// # Errors
    /// As [`Ensemble::with_weights`].
    pub fn into_ensemble(self) -> Result<Ensemble> {
        let weights = self.weights;
        Ensemble::with_weights(
            self.members.into_iter().map(Trainer::into_model).collect(),
            &weights,
        )
    }
}

/// At most [`MAX_MODELS`] trainers (a file's limit).
fn check_models(models: usize) -> Result<()> {
    check_count(models, MAX_MODELS, "models of an ensemble")
}

/// 1 to `max` of `what`.
fn check_count(n: usize, max: usize, what: &str) -> Result<()> {
    if n == 0 {
        return Err(Error::config(
            "members",
            0,
            "an ensemble needs at least one member",
        ));
    }
    crate::util::limits::at_most("members", n, max, what)
}
