//! Fitting a latent-diffusion model to a table.

mod config;
pub(crate) mod history;
mod observer;
mod rows;
mod start;
mod state;
mod stop;

pub use config::TrainConfig;
pub use history::{EpochRecord, History};
pub use observer::{Observer, StepInfo};
pub use state::{TrainReport, TrainState};

use std::path::{Path, PathBuf};
use std::time::Instant;

use candle_core::{Device, Tensor};
use rand::seq::SliceRandom;

use crate::collective::{check_group, on_root, share, Collective, SingleProcess};
use crate::error::{Error, Result};
use crate::nn::average::WeightAverage;
use crate::nn::descent::group_gradient_step;
use crate::nn::optim::AdamW;
use crate::nn::params::sorted_vars;
use crate::nn::recovery::{restore, snapshot, GoodPoint, RecoveryState, Snapshot};
use crate::nn::termination::Termination;
use crate::sde::objective::FreeEnergyValues;
use crate::tabular::coding::RowCoder;
use crate::tabular::fitted::TabularModel;
use crate::tabular::model::{LatentConfig, LatentModel, PriorFactory, RowLayout};
use crate::tabular::scaler::Standardizer;
use crate::tabular::schema::Schema;
use crate::tabular::table::Table;
use crate::util::rng::{generator, key2, streams};
use rows::StoredRows;

/// Posterior paths per row of [`Trainer::validation_loglik`].
pub const VALIDATION_LOGLIK_PATHS: usize = 64;
use stop::StopRule;

/// The epoch in progress: its minibatches, where it is, and the point non-finite steps go
/// back to.
#[derive(Debug)]
struct EpochRun {
    minibatches: Vec<Vec<usize>>,
    next: usize,
    good: GoodPoint,
    /// The weight average at the epoch's start, which non-finite steps go back to with
    /// `good`.
    good_average: WeightAverage,
    sums: Sums,
    started: Instant,
    lr: f64,
}

/// Running sums of an epoch's applied steps.
#[derive(Debug, Default)]
struct Sums {
    loss: f64,
    control_cost: f64,
    reconstruction: f64,
    grad_norm: f64,
    count: usize,
}

impl Sums {
    fn add(&mut self, v: &FreeEnergyValues, grad_norm: f64) {
        self.loss += v.loss;
        self.control_cost += v.control_cost;
        self.reconstruction += v.terminal_cost;
        self.grad_norm += grad_norm;
        self.count += 1;
    }

    /// Mean training ELBO per row (NaN when no step was applied).
    fn mean_elbo(&self) -> f64 {
        if self.count > 0 {
            -self.loss / self.count as f64
        } else {
            f64::NAN
        }
    }

    fn record(
        &self,
        state: &TrainState,
        train_elbo: f64,
        val_elbo: Option<f64>,
        learning_rate: f64,
        seconds: f64,
    ) -> EpochRecord {
        let c = self.count.max(1) as f64;
        EpochRecord {
            epoch: state.epoch,
            step: state.step,
            train_elbo,
            val_elbo,
            control_cost: self.control_cost / c,
            reconstruction: self.reconstruction / c,
            learning_rate,
            grad_norm: self.grad_norm / c,
            seconds,
        }
    }
}

/// Refuses settings whose training step would not fit in memory.
fn check_step_size(model_cfg: &LatentConfig, layout: &RowLayout, batch: usize) -> Result<()> {
    let max = crate::util::limits::MAX_STEP_VALUES;
    match model_cfg.step_values(layout, batch) {
        Some(v) if v <= max => Ok(()),
        v => Err(Error::config(
            "batch_size",
            batch,
            format!(
                "a training step would keep about {} values for backpropagation (steps × batch × width × depth), more than the {max} allowed; lower the batch size, steps, width or depth",
                v.map_or("more than 2^64".to_string(), |v| v.to_string())
            ),
        )),
    }
}

/// Whether every value of `t` is finite.
fn all_finite(t: &Tensor) -> bool {
    t.flatten_all()
        .and_then(|t| t.to_dtype(candle_core::DType::F64))
        .and_then(|t| t.to_vec1::<f64>())
        .is_ok_and(|v| v.iter().all(|x| x.is_finite()))
}

fn no_epoch() -> Error {
    Error::Training("no epoch is in progress".into())
}

/// Training rows and the validation rows used for early stopping (a seeded subset of at
/// most `max_validation_rows` of the held-out rows), coded by `coder` and `scaler`. Rows with
/// no observed cell are left out.
fn stored_split(
    table: &Table,
    coder: &RowCoder,
    scaler: &Standardizer,
    cfg: &TrainConfig,
    dtype: candle_core::DType,
) -> Result<(StoredRows, StoredRows)> {
    let (train_idx, val_idx) = cfg.split(table.n_rows())?;
    let seen = |idx: Vec<usize>| -> Vec<usize> {
        idx.into_iter()
            .filter(|&i| table.row(i).iter().any(|v| !v.is_nan()))
            .collect()
    };
    let train = StoredRows::new(table, coder, scaler, &seen(train_idx), dtype);
    let val = StoredRows::new(
        table,
        coder,
        scaler,
        &validation_subset(seen(val_idx), cfg.max_validation_rows, cfg.seed),
        dtype,
    );
    Ok((train, val))
}

/// Rows of `table` with no observed cell.
fn empty_rows(table: &Table) -> usize {
    (0..table.n_rows())
        .filter(|&i| table.row(i).iter().all(|v| v.is_nan()))
        .count()
}

/// At most `max` of the validation rows `idx`, chosen by a seeded shuffle, in table order.
fn validation_subset(mut idx: Vec<usize>, max: usize, seed: u64) -> Vec<usize> {
    if idx.len() > max {
        idx.shuffle(&mut generator(seed, streams::VALIDATION_SUBSET));
        idx.truncate(max);
        idx.sort_unstable();
    }
    idx
}

/// Trains a [`LatentModel`] on a table (see [`TrainConfig`]): minibatches, AdamW with
/// warm-up and cosine decay, gradient clipping, a validation ELBO each epoch, early stopping,
/// a time budget, recovery from non-finite steps, and exact checkpoints.
///
/// # Example
/// ```
/// use neural_sde::{EvalOptions, LatentConfig, Table, TrainConfig, Trainer};
/// // A tiny synthetic table (demo data, not a check).
/// let rows: Vec<Vec<f64>> = (0..80).map(|i| { let x = i as f64 / 40.0 - 1.0; vec![x, x * x + 0.1 * (i % 7) as f64] }).collect();
/// let table = Table::new(vec!["x".into(), "y".into()], rows)?;
/// let train = TrainConfig { epochs: 2, batch_size: 32, ..Default::default() };
/// let mut trainer = Trainer::new(&table, LatentConfig::default(), train)?;
/// let report = trainer.fit()?;
/// assert_eq!(report.epochs, 2);
/// let model = trainer.into_model();
/// let eval = model.evaluate(&table, EvalOptions::new(8, 0))?;
/// assert!(eval.loglik_per_row >= eval.elbo_per_row - 1.0);
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub struct Trainer {
    model: TabularModel,
    train_cfg: TrainConfig,
    train_rows: StoredRows,
    val_rows: StoredRows,
    optimizer: AdamW,
    /// The processes training this model together (one, unless set by
    /// [`Trainer::in_group`]).
    group: Box<dyn Collective>,
    state: TrainState,
    best: Snapshot,
    /// The running average of the weights that validation scores and `best` copies.
    average: WeightAverage,
    observers: Vec<Box<dyn Observer>>,
    /// Started when the trainer is made and at each [`Trainer::fit`]: the time budget's clock.
    clock: Instant,
    epoch_run: Option<EpochRun>,
    periodic: Option<(usize, PathBuf)>,
    /// The weights training had reached when [`Trainer::fit`] put the best ones in the
    /// model: training continues from them, and checkpoints keep them (`last.*`).
    last: Option<Snapshot>,
    warnings: Vec<String>,
    /// The user-defined prior drift's builder, when there is one (a refit needs it).
    prior: Option<PriorFactory>,
}

impl std::fmt::Debug for Trainer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Trainer")
            .field("train_cfg", &self.train_cfg)
            .field("state", &self.state)
            .finish()
    }
}

/// FNV-1a hash of the table's bit patterns and shape.
fn fingerprint(table: &Table) -> u64 {
    let mut h = crate::util::hash::Fnv1a::new();
    h.eat(&(table.n_rows() as u64).to_le_bytes());
    h.eat(&(table.n_cols() as u64).to_le_bytes());
    for levels in table.kinds().iter().filter_map(|k| k.levels()) {
        for l in levels {
            h.eat(l.as_bytes());
            h.eat(&[0]);
        }
    }
    for v in table.values() {
        h.eat(&v.to_bits().to_le_bytes());
    }
    h.finish()
}

impl Trainer {
    /// Prepares training on `table`: seeded split, standardisation fitted on the training
    /// rows, a model whose decoder starts at the rows' Gaussian fit.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for bad settings; [`Error::Data`] for a constant column or
    /// fewer training rows than one batch.
    pub fn new(table: &Table, model_cfg: LatentConfig, train_cfg: TrainConfig) -> Result<Self> {
        Self::create(table, model_cfg, train_cfg, None)
    }

    /// As [`Trainer::new`], with a user-defined prior drift built by `prior` (see
    /// [`PriorFactory`]). Load the result with [`TabularModel::load_with_prior`].
    ///
    /// # Errors
    /// As [`Trainer::new`].
    pub fn with_prior(
        table: &Table,
        model_cfg: LatentConfig,
        train_cfg: TrainConfig,
        prior: PriorFactory,
    ) -> Result<Self> {
        Self::create(table, model_cfg, train_cfg, Some(&prior))
    }

    fn create(
        table: &Table,
        model_cfg: LatentConfig,
        train_cfg: TrainConfig,
        prior: Option<&PriorFactory>,
    ) -> Result<Self> {
        train_cfg.validate()?;
        let mask_input = (0..table.n_rows()).any(|i| {
            table
                .row(i)
                .iter()
                .zip(table.kinds())
                .any(|(v, k)| v.is_nan() && !k.is_categorical())
        });
        let coder = RowCoder::new(table.kinds(), mask_input);
        model_cfg.validate_for(coder.layout())?;
        check_step_size(&model_cfg, coder.layout(), train_cfg.batch_size)?;
        let (train_idx, val_idx) = train_cfg.split(table.n_rows())?;
        let d = coder.layout().continuous;
        if train_idx.len() <= d {
            return Err(Error::Data {
                path: table.source().to_path_buf(),
                reason: format!(
                    "{} training rows ({} rows, {} held out for validation) for {d} columns: the model's full covariance needs more training rows than columns (at least {}, and many more for a useful fit); add rows, choose fewer columns, or hold out fewer rows",
                    train_idx.len(),
                    table.n_rows(),
                    val_idx.len(),
                    d + 1
                ),
            });
        }
        let mut warnings = Vec::new();
        let enough = (10 * d).max(50);
        if train_idx.len() < enough {
            warnings.push(format!(
                "only {} training rows for {d} columns (fewer than {enough}): the fit can be far too confident, and its likelihood on the training rows says little; judge it on held-out rows",
                train_idx.len()
            ));
        }
        if train_idx.len() < train_cfg.batch_size {
            return Err(Error::Data {
                path: table.source().to_path_buf(),
                reason: format!(
                    "{} training rows ({} rows, {} held out for validation) are fewer than the batch size {}; lower the batch size or the validation fraction, or add rows",
                    train_idx.len(),
                    table.n_rows(),
                    val_idx.len(),
                    train_cfg.batch_size
                ),
            });
        }
        let empty = empty_rows(table);
        if empty > 0 {
            warnings.push(format!(
                "{empty} rows have no observed cell and are left out of training and validation"
            ));
        }
        let scaler = Standardizer::fit_rows(table, &train_idx)?;
        let (train_rows, val_rows) = stored_split(
            table,
            &coder,
            &scaler,
            &train_cfg,
            model_cfg.precision.dtype(),
        )?;
        drop((train_idx, val_idx));
        let coded = train_rows.slice_f64(0..train_rows.len()).0;
        let mut model_cfg = model_cfg;
        let held_out = val_rows.slice_f64(0..val_rows.len()).0;
        let mixture = start::noise_mixture(
            &model_cfg,
            coder.layout(),
            &coded,
            &held_out,
            train_cfg.seed,
        )?;
        let mixture_chosen = model_cfg.noise_components.is_none() && mixture.is_some();
        model_cfg.noise_components = Some(mixture.as_ref().map_or(1, |m| m.0.len()));
        let model = LatentModel::build(&model_cfg, coder.layout(), train_cfg.seed, prior)?;
        match &mixture {
            Some((w, m, c)) => model.init_from_mixture(&coded, w, m, c)?,
            None => model.init_from_coded(&coded)?,
        }
        drop((coded, held_out));
        let optimizer = AdamW::new(model.varmap(), train_cfg.optimizer.adamw.clone())?;
        let best = snapshot(model.varmap())?;
        let state = TrainState {
            epoch: 0,
            step: 0,
            data_rng: generator(train_cfg.seed, streams::DATA),
            best_elbo: None,
            best_epoch: 0,
            epochs_since_best: 0,
            recovery: RecoveryState::default(),
            finished: None,
            table_rows: table.n_rows(),
            table_fingerprint: fingerprint(table),
            seconds: 0.0,
            planned_steps: None,
            mixture_chosen,
            starts_weighed: false,
        };
        let mut trainer = Self {
            model: TabularModel {
                model,
                scaler,
                columns: table.columns().to_vec(),
                history: History::default(),
                schema: Schema {
                    kinds: table.kinds().to_vec(),
                    missing_markers: table.missing_markers().to_vec(),
                },
                coder,
            },
            average: WeightAverage::new(train_cfg.weight_average),
            train_cfg,
            train_rows,
            val_rows,
            optimizer,
            group: Box::new(SingleProcess),
            state,
            best,
            observers: Vec::new(),
            clock: Instant::now(),
            epoch_run: None,
            periodic: None,
            last: None,
            warnings,
            prior: prior.cloned(),
        };
        trainer.state.planned_steps = Some(trainer.planned_steps());
        // The initial model is the rows' Gaussian fit: its ELBO is the bar to beat, so
        // early stopping never keeps weights worse than the starting point.
        let initial = if trainer.val_rows.is_empty() {
            let n = trainer.train_rows.len();
            let some = validation_subset(
                (0..n).collect(),
                trainer.train_cfg.max_validation_rows,
                trainer.train_cfg.seed,
            );
            trainer.elbo_of(&trainer.train_rows, &some)?
        } else {
            trainer.elbo_of(&trainer.val_rows, &[])?
        };
        if initial.is_finite() {
            trainer.state.best_elbo = Some(initial);
        }
        Ok(trainer)
    }

    /// Continues training from a checkpoint written by [`Trainer::save`], on the same table.
    ///
    /// # Errors
    /// [`Error::Checkpoint`] for an unreadable or inconsistent file; [`Error::Data`] when the
    /// table is not the one the checkpoint was trained on.
    pub fn resume(path: impl AsRef<Path>, table: &Table) -> Result<Self> {
        Self::resume_from(path.as_ref(), table, None)
    }

    /// As [`Trainer::resume`] for a model trained with [`Trainer::with_prior`].
    ///
    /// # Errors
    /// As [`Trainer::resume`].
    pub fn resume_with_prior(
        path: impl AsRef<Path>,
        table: &Table,
        prior: PriorFactory,
    ) -> Result<Self> {
        Self::resume_from(path.as_ref(), table, Some(&prior))
    }

    fn resume_from(path: &Path, table: &Table, prior: Option<&PriorFactory>) -> Result<Self> {
        let raw = crate::nn::checkpoint::read_raw(path)?;
        crate::tabular::ensemble_file::refuse_ensemble(path, &raw)?;
        let stored = raw.single(path, crate::tabular::fitted::FORMAT)?;
        Self::resume_stored(stored, table, prior)
    }

    /// As [`Trainer::resume`] for one object of a file (see
    /// [`crate::nn::checkpoint::Stored`]).
    pub(crate) fn resume_stored(
        stored: crate::nn::checkpoint::Stored<'_>,
        table: &Table,
        prior: Option<&PriorFactory>,
    ) -> Result<Self> {
        let path = stored.path;
        let (model, mut file, timing) = TabularModel::read_stored(stored, prior)?;
        let training: TrainingHeader = crate::nn::checkpoint::parse_header(path, stored.header)?;
        let missing = || Error::Checkpoint {
            path: path.to_path_buf(),
            reason: "it holds a model but no training state; train a new model instead of resuming"
                .into(),
        };
        let (Some(train_cfg), Some(mut state)) = (training.train_config, training.state) else {
            return Err(missing());
        };
        let invalid = |what: String| Error::Checkpoint {
            path: path.to_path_buf(),
            reason: format!("the stored training state is invalid ({what}); train a new model"),
        };
        train_cfg.validate().map_err(|e| invalid(e.to_string()))?;
        check_step_size(
            model.model.config(),
            model.coder.layout(),
            train_cfg.batch_size,
        )
        .map_err(|e| invalid(e.to_string()))?;
        let counts_ok = state.epoch <= 10_000_000
            && state.best_epoch <= state.epoch
            && state.epochs_since_best <= state.epoch
            && state.step <= i32::MAX as u64
            && state.planned_steps.is_none_or(|p| p <= i32::MAX as u64);
        if !counts_ok {
            return Err(invalid(format!(
                "epoch {}, best epoch {}, epochs since best {}, step {}",
                state.epoch, state.best_epoch, state.epochs_since_best, state.step
            )));
        }
        let r = state.recovery;
        if !(r.lr_scale.is_finite() && r.lr_scale > 0.0 && r.lr_scale <= 1.0) {
            return Err(invalid(format!("learning-rate scale {}", r.lr_scale)));
        }
        if state.best_elbo.is_some_and(|b| !b.is_finite()) || !state.seconds.is_finite() {
            return Err(invalid("a non-finite best ELBO or time".into()));
        }
        if let Some((name, _)) = file.iter().find(|(_, t)| !all_finite(t)) {
            return Err(Error::Checkpoint {
                path: path.to_path_buf(),
                reason: format!(
                    "tensor {name} holds NaN or infinite values; training cannot continue from it (resume from an earlier checkpoint)"
                ),
            });
        }
        if let Some(t) = timing.training_seconds {
            state.seconds = t;
        }
        let vars = sorted_vars(model.model.varmap())?;
        let mut moments = std::collections::HashMap::new();
        let mut best = Vec::with_capacity(vars.len());
        let mut last = Vec::new();
        let mut average = Vec::new();
        for (name, var) in &vars {
            for p in ["m", "v"] {
                if let Some(t) = file.remove(&format!("optim.{p}.{name}")) {
                    moments.insert(format!("{p}.{name}"), t);
                }
            }
            for (prefix, into) in [
                ("best", &mut best),
                ("last", &mut last),
                ("average", &mut average),
            ] {
                if let Some(t) = file.remove(&format!("{prefix}.{name}")) {
                    if t.dims() != var.dims() {
                        return Err(Error::Checkpoint {
                            path: path.to_path_buf(),
                            reason: format!(
                                "tensor {prefix}.{name} has shape {:?}, expected {:?}",
                                t.dims(),
                                var.dims()
                            ),
                        });
                    }
                    into.push((name.clone(), t));
                }
            }
        }
        // With a decay of 0 the trainer keeps no average and would never update a stored
        // one, so validation would score stale weights.
        if !average.is_empty() && train_cfg.weight_average == 0.0 {
            return Err(invalid(
                "average.* weights stored with weight_average 0".into(),
            ));
        }
        for (prefix, got) in [("last", &last), ("average", &average)] {
            if !got.is_empty() && got.len() != vars.len() {
                return Err(Error::Checkpoint {
                    path: path.to_path_buf(),
                    reason: format!(
                        "the training state is incomplete (some {prefix}.* weights missing)"
                    ),
                });
            }
        }
        if moments.len() != 2 * vars.len() || best.len() != vars.len() {
            return Err(Error::Checkpoint {
                path: path.to_path_buf(),
                reason:
                    "the training state is incomplete (optimiser moments or best weights missing)"
                        .into(),
            });
        }
        let optimizer_steps = training.optimizer_steps.unwrap_or(0);
        if table.columns() != model.columns.as_slice()
            || table.n_rows() != state.table_rows
            || fingerprint(table) != state.table_fingerprint
        {
            return Err(Error::Data {
                path: table.source().to_path_buf(),
                reason: format!(
                    "this is not the table the checkpoint {} was trained on ({} rows, columns [{}]); resume with that table",
                    path.display(),
                    state.table_rows,
                    model.columns.join(", ")
                ),
            });
        }
        if table.kinds() != model.schema.kinds.as_slice() {
            return Err(Error::Data {
                path: table.source().to_path_buf(),
                reason: format!(
                    "the table's column types differ from those the checkpoint {} was trained with; read it with the checkpoint's schema",
                    path.display()
                ),
            });
        }
        let (train_rows, val_rows) = stored_split(
            table,
            &model.coder,
            &model.scaler,
            &train_cfg,
            model.model.dtype(),
        )?;
        let mut optimizer = AdamW::new(model.model.varmap(), train_cfg.optimizer.adamw.clone())?;
        optimizer.load_state(&moments, optimizer_steps)?;
        Ok(Self {
            model,
            average: WeightAverage::from_weights(
                train_cfg.weight_average,
                (!average.is_empty()).then_some(average),
            ),
            train_cfg,
            train_rows,
            val_rows,
            optimizer,
            group: Box::new(SingleProcess),
            state,
            best,
            observers: Vec::new(),
            clock: Instant::now(),
            epoch_run: None,
            periodic: None,
            last: (!last.is_empty()).then_some(last),
            warnings: Vec::new(),
            prior: prior.cloned(),
        })
    }

    /// The second half of the default model-selection protocol: once this fit has held rows
    /// out and ended by its plan or by early stopping, a fresh trainer with the same model
    /// settings and seed on **every** row of `table` (the table this trainer was made with:
    /// the training and the held-out rows), for the number of epochs validation chose (the
    /// best epoch, at least 1), its learning-rate schedule planned over them, with no rows
    /// held out and no early stopping. Run [`Trainer::fit`] on it for the final model.
    /// `None` when [`TrainConfig::refit`] is off, no rows were held out, or the fit was
    /// paused before its plan ended ([`Trainer::set_epochs`]) or stopped by its time budget
    /// or a request (its best epoch then says little about how long to train).
    ///
    /// Holding out a fifth of a small table for early stopping costs its model a fifth of
    /// the data; refitting on all rows with the validated budget gets it back, but loses the
    /// choice of the best epoch among many: measured on the crate's open tables (benchmarks
    /// document), it helped iris and lost a little on wine, diabetes and the demo table.
    ///
    /// # Errors
    /// As [`Trainer::new`] on `table`.
    pub fn refit(&self, table: &Table) -> Result<Option<Trainer>> {
        let cfg = &self.train_cfg;
        if !cfg.refit
            || cfg.validation_fraction == 0.0
            || self.val_rows.is_empty()
            || !self.ended_well()
        {
            return Ok(None);
        }
        let epochs = self.state.best_epoch.max(1);
        let all = TrainConfig {
            epochs,
            validation_fraction: 0.0,
            patience: epochs,
            time_budget_secs: None,
            refit: false,
            ..cfg.clone()
        };
        let model_cfg = self.model.model.config().clone();
        let mut t = Self::create(table, model_cfg, all, self.prior.as_ref())?;
        t.warnings.clear();
        t.state.starts_weighed = self.state.starts_weighed;
        Ok(Some(t))
    }

    /// [`TrainConfig::mixture_learning_rate_scale`] when the observation noise is a mixture
    /// of several components, else 1.
    fn mixture_scale(&self) -> f64 {
        if self.model.model.config().noise_components.unwrap_or(1) > 1 {
            self.train_cfg.mixture_learning_rate_scale
        } else {
            1.0
        }
    }

    /// Whether training ran its whole plan (not a pause set by [`Trainer::set_epochs`]) or
    /// stopped early.
    fn ended_well(&self) -> bool {
        match self.state.finished {
            Some(Termination::EarlyStopped) => true,
            Some(Termination::MaxEpochs) => self.state.epoch >= self.planned_epochs(),
            _ => false,
        }
    }

    /// When this fit started from a Gaussian mixture whose count the trainer chose (see
    /// [`LatentConfig::noise_components`]), holds out validation rows and ran its plan or
    /// stopped early: a fresh trainer on
    /// the same table, split and settings that starts from one Gaussian instead. Train it and
    /// keep whichever model has the higher [`Trainer::validation_loglik`]: the mixture start
    /// helps tables with clusters or spikes, and on others the Gaussian start lets the latent
    /// path explain more (measured in the benchmarks document). `None` otherwise.
    ///
    /// # Errors
    /// As [`Trainer::new`].
    pub fn gaussian_start(&self, table: &Table) -> Result<Option<Trainer>> {
        if !self.state.mixture_chosen
            || self.state.starts_weighed
            || self.val_rows.is_empty()
            || !self.ended_well()
        {
            return Ok(None);
        }
        let model_cfg = LatentConfig {
            noise_components: Some(1),
            ..self.model.model.config().clone()
        };
        let mut t = Self::create(
            table,
            model_cfg,
            self.train_cfg.clone(),
            self.prior.as_ref(),
        )?;
        t.warnings.clear();
        Ok(Some(t))
    }

    /// Becomes `other` (trained on the same table and split, e.g. the one
    /// [`Trainer::gaussian_start`] made) if its [`Trainer::validation_loglik`] is higher than
    /// this one's; returns both values (this one's first, as it was before).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] if either has no validation rows; as
    /// [`Trainer::validation_loglik`].
    pub fn keep_better(&mut self, other: Trainer) -> Result<(f64, f64)> {
        let none = || {
            Error::config(
                "validation_fraction",
                0,
                "comparing two fits needs validation rows",
            )
        };
        let mine = self.validation_loglik()?.ok_or_else(none)?;
        let theirs = other.validation_loglik()?.ok_or_else(none)?;
        if theirs > mine {
            *self = other;
        }
        self.state.starts_weighed = true;
        Ok((mine, theirs))
    }

    /// Records that this fit's starts were weighed ([`crate::EnsembleTrainer::compare_starts`]):
    /// [`Trainer::gaussian_start`] offers no other start after it, here or once resumed.
    pub(crate) fn mark_starts_weighed(&mut self) {
        self.state.starts_weighed = true;
    }

    /// The importance-weighted log-likelihood per row of the validation rows (standardised
    /// units; [`VALIDATION_LOGLIK_PATHS`] posterior paths per row, noise keyed by the seed and
    /// each row, so two trainers on the same table and seed use the same noise). `None`
    /// without validation rows. The rows are shared out over the group.
    ///
    /// # Errors
    /// [`Error::Candle`] on tensor errors; [`Error::Collective`] when the group fails.
    pub fn validation_loglik(&self) -> Result<Option<f64>> {
        Ok(row_mean(&self.validation_logliks()?))
    }

    /// Each validation row's importance-weighted log-likelihood, in the order the trainer
    /// holds them (as [`Trainer::validation_loglik`], which is their mean; empty without
    /// validation rows). Two trainers on the same table, seed and split hold the same rows in
    /// the same order. The rows are shared out over the group, and every process gets every
    /// value.
    ///
    /// # Errors
    /// As [`Trainer::validation_loglik`].
    pub fn validation_logliks(&self) -> Result<Vec<f64>> {
        let k = VALIDATION_LOGLIK_PATHS;
        let n = self.val_rows.len();
        // Each process fills its share and the others' stay 0, so the group's sum is exact.
        let mut out = vec![0.0; n];
        let mine = share(n, self.group.rank(), self.group.size());
        let chunk_rows = self.chunk_rows(k);
        let mut at = mine.start;
        while at < mine.end {
            let end = (at + chunk_rows).min(mine.end);
            let (values, keys) = self.val_rows.slice_f64(at..end);
            let t =
                self.model
                    .model
                    .posterior_terms_keyed(&values, k, self.train_cfg.seed, keys)?;
            for (r, lw) in t.log_weight.chunks_exact(k).take(end - at).enumerate() {
                let max = lw.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                out[at + r] =
                    max + (lw.iter().map(|l| (l - max).exp()).sum::<f64>() / k as f64).ln();
            }
            at = end;
        }
        if self.group.size() > 1 {
            self.group.sum_f64(&mut out)?;
        }
        Ok(out)
    }

    /// Trains data-parallel in `group` (for instance every process of an MPI job): each
    /// process computes the gradient of its share of every minibatch, the gradients are
    /// summed over the group, and every process applies the same update, so all of them hold
    /// the same model. Every process must build its trainer from the same table and settings
    /// (checked here) and make the same calls; only process 0 writes checkpoints.
    ///
    /// A row's noise is keyed by the row and the step, not by the process, so the model is
    /// the one a single process trains on the same minibatches, up to the rounding of the
    /// sums (measured in the contributor guide).
    ///
    /// # Errors
    /// [`Error::Collective`] when a process holds another table or other settings than
    /// process 0, or there are more processes than training rows.
    pub fn in_group(mut self, group: Box<dyn Collective>) -> Result<Self> {
        check_group(
            group.as_ref(),
            self.train_rows.len(),
            "training rows",
            self.state.table_fingerprint,
            &(&self.train_cfg, self.model.model.config()),
        )?;
        self.group = group;
        Ok(self)
    }

    /// The processes training this model (one unless [`Trainer::in_group`] set a group).
    pub fn group(&self) -> &dyn Collective {
        self.group.as_ref()
    }

    /// Adds an observer of progress.
    pub fn add_observer(&mut self, observer: Box<dyn Observer>) {
        self.observers.push(observer);
    }

    /// What looks doubtful about the table for this model (too few rows for its columns,
    /// say); training runs anyway. The command-line tool prints these.
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }

    /// The training settings.
    pub fn config(&self) -> &TrainConfig {
        &self.train_cfg
    }

    /// Sets the time budget of each later [`Trainer::fit`] call (for instance after
    /// resuming).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a budget that is not finite and positive.
    pub fn set_time_budget(&mut self, seconds: Option<f64>) -> Result<()> {
        if let Some(t) = seconds {
            crate::error::check_positive("time_budget_secs", t)?;
        }
        self.train_cfg.time_budget_secs = seconds;
        Ok(())
    }

    /// Sets the epoch after which training ends (for instance to train longer after
    /// resuming). The learning-rate schedule keeps the plan it started with
    /// ([`Trainer::planned_epochs`]), so `k` epochs, a checkpoint and a resumed run to `N`
    /// give exactly the weights of `N` epochs in one run; epochs past the plan run at the
    /// schedule's final learning rate.
    pub fn set_epochs(&mut self, epochs: usize) {
        self.train_cfg.epochs = epochs;
        if self.state.finished == Some(Termination::MaxEpochs) && epochs > self.state.epoch {
            self.state.finished = None;
        }
    }

    /// The training state.
    pub fn state(&self) -> &TrainState {
        &self.state
    }

    /// The model with its current weights.
    pub fn model(&self) -> &TabularModel {
        &self.model
    }

    /// The per-epoch history.
    pub fn history(&self) -> &History {
        &self.model.history
    }

    /// The model with the best weights seen (the ones [`Trainer::fit`] keeps).
    ///
    /// # Errors
    /// [`Error::Candle`] if the weights cannot be copied.
    pub fn restore_best(&mut self) -> Result<()> {
        restore(self.model.model.varmap(), &self.best)
    }

    /// Whether an epoch is in progress (a checkpoint cannot be taken then).
    pub(crate) fn mid_epoch(&self) -> bool {
        self.epoch_run.is_some()
    }

    /// Ends training and returns the model (with the weights it currently has).
    pub fn into_model(self) -> TabularModel {
        self.model
    }

    /// Passes over the training rows per epoch and minibatches per epoch.
    /// On big tables (a pass longer than `max_steps_per_epoch` minibatches) an epoch is
    /// that many minibatches of a fresh shuffle, so validation, history and early stopping
    /// come every fixed number of steps: `(1, max_steps_per_epoch)`.
    fn epoch_shape(&self) -> (usize, usize) {
        let n = self.train_rows.len();
        let per_pass = n.div_ceil(self.train_cfg.batch_size);
        if per_pass > self.train_cfg.max_steps_per_epoch {
            return (1, self.train_cfg.max_steps_per_epoch);
        }
        let passes = self.train_cfg.min_steps_per_epoch.div_ceil(per_pass).max(1);
        (passes, passes * per_pass)
    }

    fn batches_per_epoch(&self) -> usize {
        self.epoch_shape().1
    }

    /// Steps the schedule is planned over: stored when training started.
    fn planned_steps(&self) -> u64 {
        self.state.planned_steps.unwrap_or(
            (self.train_cfg.epochs as u64).saturating_mul(self.batches_per_epoch() as u64),
        )
    }

    /// Epochs the learning-rate schedule is planned over (see [`TrainState::planned_steps`]).
    pub fn planned_epochs(&self) -> usize {
        let per = self.batches_per_epoch().max(1) as u64;
        self.planned_steps().div_ceil(per) as usize
    }

    /// Mean ELBO per row of the stored rows at `positions` (all of them when empty), with
    /// fixed noise keyed by each row (the same every epoch, whichever process evaluates the
    /// row). The rows are shared out over the group and the sums reduced.
    fn elbo_of(&self, rows: &StoredRows, positions: &[usize]) -> Result<f64> {
        let k = self.train_cfg.validation_paths;
        self.row_sums(rows, positions, k, k, |t, _| t.elbo.iter().sum())
    }

    /// Rows per chunk when scoring rows with `paths` posterior paths each (about 4,096 paths
    /// per chunk, within the model's memory bound).
    fn chunk_rows(&self, paths: usize) -> usize {
        self.model
            .model
            .config()
            .chunk_rows(self.model.coder.layout(), paths, (4096 / paths).max(1))
            .max(1)
    }

    /// Over the stored rows at `positions` (all of them when empty), with `paths` posterior
    /// paths per row (noise keyed by each row): the sum of `per_chunk` (which reads the terms
    /// of a chunk of rows and their count) divided by `per_row` times the rows. The rows are
    /// shared out over the group and the sums reduced.
    fn row_sums(
        &self,
        rows: &StoredRows,
        positions: &[usize],
        paths: usize,
        per_row: usize,
        per_chunk: impl Fn(&crate::tabular::model::PathTerms, usize) -> f64,
    ) -> Result<f64> {
        let d = self.model.coder.layout().coded_width();
        let k = paths;
        let n = if positions.is_empty() {
            rows.len()
        } else {
            positions.len()
        };
        let mine = share(n, self.group.rank(), self.group.size());
        let chunk_rows = self.chunk_rows(k);
        let mut sums = [0.0, 0.0];
        let mut at = mine.start;
        while at < mine.end {
            let end = (at + chunk_rows).min(mine.end);
            let (values, keys) = if positions.is_empty() {
                let (v, k) = rows.slice_f64(at..end);
                (v, k.to_vec())
            } else {
                let mut v = Vec::with_capacity((end - at) * d);
                let mut keys = Vec::with_capacity(end - at);
                for &p in &positions[at..end] {
                    let (row, key) = rows.slice_f64(p..p + 1);
                    v.extend(row);
                    keys.extend_from_slice(key);
                }
                (v, keys)
            };
            let t =
                self.model
                    .model
                    .posterior_terms_keyed(&values, k, self.train_cfg.seed, &keys)?;
            sums[0] += per_chunk(&t, end - at);
            sums[1] += ((end - at) * per_row) as f64;
            at = end;
        }
        self.group.sum_f64(&mut sums)?;
        Ok(sums[0] / sums[1])
    }

    /// Runs one optimiser step on the next minibatch, starting an epoch first if none is in
    /// progress (the epoch's minibatch order is drawn then). Returns the epoch's record when
    /// this step ended an epoch: its last minibatch ran, the time budget of this run is spent,
    /// or an observer asked to stop. Non-finite steps are not applied: the weights and
    /// optimiser go back to the epoch's start and the learning rate is halved.
    ///
    /// Checkpoints are taken between epochs: [`Trainer::save`] in the middle of one is an
    /// error.
    ///
    /// # Errors
    /// [`Error::Training`] after more than `max_failures` non-finite steps (the best weights
    /// are restored first); errors raised by observers.
    pub fn step(&mut self) -> Result<Option<EpochRecord>> {
        if let Some(last) = self.last.take() {
            restore(self.model.model.varmap(), &last)?;
        }
        if self.epoch_run.is_none() {
            self.epoch_run = Some(self.begin_epoch()?);
        }
        if let Some(why) = StopRule(&self.train_cfg).before_step(self.clock.elapsed().as_secs_f64())
        {
            self.state.finished = Some(why);
            return self.end_epoch().map(Some);
        }
        let planned = self.planned_steps();
        let mixture_scale = self.mixture_scale();
        let run = self.epoch_run.as_mut().ok_or_else(no_epoch)?;
        let batch = run.next;
        let batches = run.minibatches.len();
        let idx = std::mem::take(&mut run.minibatches[batch]);
        run.next += 1;
        let lr = self
            .train_cfg
            .optimizer
            .learning_rate_at(self.state.step, planned)
            * self.state.recovery.lr_scale
            * mixture_scale;
        run.lr = lr;
        self.state.step = self.state.step.saturating_add(1);
        let model = &self.model.model;
        let global = idx.len();
        let mine = &idx[share(global, self.group.rank(), self.group.size())];
        let local = if mine.is_empty() {
            None
        } else {
            Some(self.train_rows.gather(mine, model.dtype(), &Device::Cpu)?)
        };
        // Each process's loss is its rows' share of the minibatch mean, so the parts sum to
        // the mean; in a group of one the factor is exactly 1.
        let part = mine.len() as f64 / global as f64;
        let (seed, step) = (self.train_cfg.seed, self.state.step);
        let outcome = group_gradient_step(
            &mut self.optimizer,
            lr,
            self.train_cfg.optimizer.max_grad_norm,
            self.group.as_ref(),
            FreeEnergyValues::PARTS,
            move || {
                let Some((y, rows)) = local else {
                    return Ok(None);
                };
                let keys: Vec<u64> = rows.iter().map(|&r| key2(step, r)).collect();
                let fe = model.free_energy_keyed(&y, seed, &keys)?;
                let (loss, figures) = fe.share(part)?;
                Ok(Some((loss, (), figures)))
            },
        )
        .map(|(_, f, stats)| (FreeEnergyValues::from_parts(&f), stats));
        match outcome {
            Ok((v, stats)) => {
                self.average.update(self.model.model.varmap())?;
                run.sums.add(&v, stats.grad_norm);
                let info = StepInfo {
                    epoch: self.state.epoch.saturating_add(1),
                    epochs: self.train_cfg.epochs,
                    batch: batch + 1,
                    batches,
                    loss: v.loss,
                    elapsed: self.clock.elapsed().as_secs_f64(),
                };
                for o in &mut self.observers {
                    if o.on_step(&info)?.is_break() {
                        self.state.finished = Some(Termination::Requested);
                    }
                }
            }
            Err(Error::NonFinite { what, detail }) => {
                let recovered = self.state.recovery.recover(
                    &run.good,
                    self.model.model.varmap(),
                    &mut self.optimizer,
                    self.train_cfg.max_failures,
                    (&what, &detail),
                );
                self.average = run.good_average.clone();
                if let Err(e) = recovered {
                    self.epoch_run = None;
                    self.restore_best()?;
                    let why = match e {
                        Error::Training(m) => m,
                        other => other.to_string(),
                    };
                    return Err(Error::Training(format!(
                        "{why}; stopped and kept the best weights (epoch {}). Lower the learning rate or standardise unusual columns",
                        self.state.best_epoch
                    )));
                }
            }
            Err(e) => return Err(e),
        }
        if batch + 1 == batches || self.state.finished.is_some() {
            return self.end_epoch().map(Some);
        }
        Ok(None)
    }

    /// Draws the epoch's minibatches and records the point non-finite steps go back to.
    fn begin_epoch(&mut self) -> Result<EpochRun> {
        let n = self.train_rows.len();
        let (passes, batches) = self.epoch_shape();
        let mut minibatches: Vec<Vec<usize>> = Vec::with_capacity(batches);
        for _ in 0..passes {
            let mut order: Vec<usize> = (0..n).collect();
            order.shuffle(&mut self.state.data_rng);
            minibatches.extend(
                order
                    .chunks(self.train_cfg.batch_size)
                    .take(batches)
                    .map(<[usize]>::to_vec),
            );
        }
        Ok(EpochRun {
            minibatches,
            next: 0,
            good: GoodPoint::take(self.model.model.varmap(), &self.optimizer)?,
            good_average: self.average.clone(),
            sums: Sums::default(),
            started: Instant::now(),
            lr: self.optimizer.learning_rate(),
        })
    }

    /// Closes the epoch in progress: validation ELBO, best weights, the stop rule, the
    /// record, observers and the periodic checkpoint.
    fn end_epoch(&mut self) -> Result<EpochRecord> {
        let run = self.epoch_run.take().ok_or_else(no_epoch)?;
        self.state.epoch = self.state.epoch.saturating_add(1);
        let train_elbo = run.sums.mean_elbo();
        // Validation scores the averaged weights, and they are what `best` keeps.
        let varmap = self.model.model.varmap();
        let (val_elbo, best) = self.average.with_average(varmap, || {
            let val_elbo = if self.val_rows.is_empty() {
                None
            } else {
                Some(self.elbo_of(&self.val_rows, &[])?)
            };
            let score = val_elbo.unwrap_or(train_elbo);
            let best = if StopRule(&self.train_cfg).improves(&self.state, score) {
                Some((score, snapshot(varmap)?))
            } else {
                None
            };
            Ok((val_elbo, best))
        })?;
        let rule = StopRule(&self.train_cfg);
        if let Some((score, weights)) = best {
            self.state.best_elbo = Some(score);
            self.state.best_epoch = self.state.epoch;
            self.state.epochs_since_best = 0;
            self.best = weights;
        } else {
            self.state.epochs_since_best = self.state.epochs_since_best.saturating_add(1);
        }
        if self.state.finished.is_none() {
            self.state.finished = rule.after_epoch(&self.state);
        }
        let seconds = run.started.elapsed().as_secs_f64();
        self.state.seconds += seconds;
        let record = run
            .sums
            .record(&self.state, train_elbo, val_elbo, run.lr, seconds);
        self.model.history.epochs.push(record.clone());
        for o in &mut self.observers {
            if o.on_epoch(&record)?.is_break() && self.state.finished.is_none() {
                self.state.finished = Some(Termination::Requested);
            }
        }
        if let Some((every, path)) = &self.periodic {
            if self.state.epoch.is_multiple_of(*every) {
                self.save(path)?;
            }
        }
        Ok(record)
    }

    /// Runs the rest of the epoch in progress, or a whole new one.
    ///
    /// # Errors
    /// As [`Trainer::step`].
    pub fn run_epoch(&mut self) -> Result<EpochRecord> {
        loop {
            if let Some(record) = self.step()? {
                return Ok(record);
            }
        }
    }

    /// Trains until the stop rule ends training (the planned epochs, patience, the time
    /// budget of this call, or an observer's request), then restores the best weights. A
    /// trainer stopped by its time budget or by an observer continues when `fit` is called
    /// again (each call has the full budget).
    ///
    /// # Errors
    /// As [`Trainer::step`].
    pub fn fit(&mut self) -> Result<TrainReport> {
        self.begin_run();
        while self.state.finished.is_none() {
            self.step()?;
        }
        self.end_run()
    }

    /// Starts a run of [`Trainer::fit`]: the clock of the time budget, and a trainer stopped
    /// by its budget or a request continues.
    pub(crate) fn begin_run(&mut self) {
        self.clock = Instant::now();
        if matches!(
            self.state.finished,
            Some(Termination::TimeBudget | Termination::Requested)
        ) {
            self.state.finished = None;
        }
    }

    /// Ends a run of [`Trainer::fit`] once training has finished: keeps the weights training
    /// reached (to continue from) and restores the best ones.
    pub(crate) fn end_run(&mut self) -> Result<TrainReport> {
        // The best weights differ from the ones training reached unless the last epoch was
        // the best and no average stands in for its weights.
        let differ = self.state.best_epoch != self.state.epoch || self.average.weights().is_some();
        if self.last.is_none() && differ {
            self.last = Some(snapshot(self.model.model.varmap())?);
        }
        self.restore_best()?;
        Ok(TrainReport {
            epochs: self.state.epoch,
            best_epoch: self.state.best_epoch,
            best_elbo: self.state.best_elbo,
            termination: self.state.finished.unwrap_or(Termination::MaxEpochs),
            seconds: self.clock.elapsed().as_secs_f64(),
        })
    }

    /// Writes a checkpoint every `epochs` epochs to `path` (atomically, replacing the last
    /// one), so a long fit that is killed can be resumed with [`Trainer::resume`].
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `epochs == 0`.
    pub fn checkpoint_every(&mut self, epochs: usize, path: impl Into<PathBuf>) -> Result<()> {
        self.periodic = Some(periodic(epochs, path.into())?);
        Ok(())
    }

    /// Writes a checkpoint (weights, optimiser moments, best weights, configuration, scaler,
    /// columns, state, history) atomically to `path`. In a group of processes only process 0
    /// writes, and every process returns the outcome.
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Checkpoint`] if it cannot be written.
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        let path = path.as_ref();
        if self.epoch_run.is_some() {
            return Err(Error::Training(format!(
                "cannot save {} in the middle of an epoch; save after Trainer::run_epoch or Trainer::fit, or when Trainer::step returns the epoch's record",
                path.display()
            )));
        }
        let what = format!("the checkpoint {}", path.display());
        on_root(self.group.as_ref(), &what, || self.write_checkpoint(path))
    }

    fn write_checkpoint(&self, path: &Path) -> Result<()> {
        let (tensors, header) = self.checkpoint_parts()?;
        crate::nn::checkpoint::write(
            path,
            crate::tabular::fitted::FORMAT,
            tensors,
            &header,
            checkpoint_parses_back,
        )
    }

    /// The tensors and the header of this trainer's checkpoint.
    pub(crate) fn checkpoint_parts(&self) -> Result<(Vec<(String, Tensor)>, CheckpointHeader)> {
        let mut tensors = self.model.tensors()?;
        for (n, m) in self.optimizer.state_tensors() {
            tensors.push((format!("optim.{n}"), m));
        }
        for (n, b) in &self.best {
            tensors.push((format!("best.{n}"), b.clone()));
        }
        for (n, b) in self.last.iter().flatten() {
            tensors.push((format!("last.{n}"), b.clone()));
        }
        for (n, b) in self.average.weights().into_iter().flatten() {
            tensors.push((format!("average.{n}"), b.clone()));
        }
        let mut model = self.model.header();
        let mut state = self.state.clone();
        model.timing.training_seconds = Some(std::mem::take(&mut state.seconds));
        let header = CheckpointHeader {
            model,
            training: TrainingHeader {
                train_config: Some(self.train_cfg.clone()),
                state: Some(state),
                optimizer_steps: Some(self.optimizer.steps()),
            },
        };
        Ok((tensors, header))
    }
}

/// A periodic checkpoint's setting: every `epochs` epochs (at least 1) to `path`.
///
/// # Errors
/// [`Error::InvalidConfig`] for `epochs == 0`.
pub(crate) fn periodic(epochs: usize, path: PathBuf) -> Result<(usize, PathBuf)> {
    if epochs == 0 {
        return Err(Error::config(
            "checkpoint_every",
            0,
            "write a checkpoint every 1 or more epochs",
        ));
    }
    Ok((epochs, path))
}

/// The `parses_back` check of a trainer's checkpoint header (see
/// [`crate::nn::checkpoint::write`]).
pub(crate) fn checkpoint_parses_back(text: &str) -> serde_json::Result<()> {
    use crate::nn::checkpoint::parses_as;
    parses_as::<crate::tabular::fitted::ModelHeader>(text)?;
    parses_as::<TrainingHeader>(text)
}

/// The trainer's part of a checkpoint header, beside the model's.
#[derive(serde::Serialize, serde::Deserialize)]
pub(crate) struct TrainingHeader {
    pub train_config: Option<TrainConfig>,
    pub state: Option<TrainState>,
    pub optimizer_steps: Option<u64>,
}

/// The whole header of a training checkpoint: one flat JSON object.
#[derive(serde::Serialize)]
pub(crate) struct CheckpointHeader {
    #[serde(flatten)]
    model: crate::tabular::fitted::ModelHeader,
    #[serde(flatten)]
    training: TrainingHeader,
}

/// The mean of per-row values (as [`Trainer::validation_logliks`] gives them); `None` for no
/// rows.
pub(crate) fn row_mean(rows: &[f64]) -> Option<f64> {
    (!rows.is_empty()).then(|| rows.iter().sum::<f64>() / rows.len() as f64)
}
