//! Fitting a latent-diffusion model to a table.

mod config;
pub(crate) mod history;
mod observer;
mod state;

pub use config::TrainConfig;
pub use history::{EpochRecord, History};
pub use observer::{Observer, StepInfo};
pub use state::{Termination, TrainReport, TrainState};

use std::path::Path;
use std::time::Instant;

use candle_core::{Device, Tensor};
use rand::seq::SliceRandom;

use crate::error::{Error, Result};
use crate::nn::optim::{AdamW, AdamWConfig};
use crate::nn::params::sorted_vars;
use crate::tabular::fitted::TabularModel;
use crate::tabular::model::{LatentConfig, LatentModel, PriorFactory};
use crate::tabular::scaler::Standardizer;
use crate::tabular::split::split_rows;
use crate::tabular::table::Table;
use crate::util::rng::{generator, streams};
use crate::util::stack::run_deep;

type Snapshot = Vec<(String, Tensor)>;

/// Standardised training and validation rows of `table` for the seeded split of `cfg`.
fn standardised_split(
    table: &Table,
    scaler: &Standardizer,
    cfg: &TrainConfig,
) -> Result<(Vec<f64>, Vec<f64>)> {
    let (train_idx, val_idx) = split_rows(table.n_rows(), cfg.validation_fraction, cfg.seed)?;
    let train = scaler.transform(&table.take_rows(&train_idx)?);
    let val = if val_idx.is_empty() {
        Vec::new()
    } else {
        scaler.transform(&table.take_rows(&val_idx)?)
    };
    Ok((train, val))
}

/// Trains a [`LatentModel`] on a table (see [`TrainConfig`]): minibatches, AdamW with
/// warm-up and cosine decay, gradient clipping, a validation ELBO each epoch, early stopping,
/// a time budget, recovery from non-finite steps, and exact checkpoints.
///
/// # Example
/// ```
/// use neural_sde::{LatentConfig, Table, TrainConfig, Trainer};
/// // A tiny synthetic table (demo data, not a check).
/// let rows: Vec<Vec<f64>> = (0..80).map(|i| { let x = i as f64 / 40.0 - 1.0; vec![x, x * x + 0.1 * (i % 7) as f64] }).collect();
/// let table = Table::new(vec!["x".into(), "y".into()], rows)?;
/// let train = TrainConfig { epochs: 2, batch_size: 32, ..Default::default() };
/// let mut trainer = Trainer::new(&table, LatentConfig::default(), train)?;
/// let report = trainer.fit()?;
/// assert_eq!(report.epochs, 2);
/// let model = trainer.into_model();
/// let eval = model.evaluate(&table, 8, 0)?;
/// assert!(eval.loglik_per_row >= eval.elbo_per_row - 1.0);
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub struct Trainer {
    model: TabularModel,
    train_cfg: TrainConfig,
    train_rows: Vec<f64>,
    val_rows: Vec<f64>,
    optimizer: AdamW,
    state: TrainState,
    best: Snapshot,
    observers: Vec<Box<dyn Observer>>,
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
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |x: u64| {
        for b in x.to_le_bytes() {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0100_0000_01b3);
        }
    };
    eat(table.n_rows() as u64);
    eat(table.n_cols() as u64);
    for v in table.values() {
        eat(v.to_bits());
    }
    h
}

fn snapshot(model: &LatentModel) -> Result<Snapshot> {
    sorted_vars(model.varmap())?
        .into_iter()
        .map(|(n, v)| Ok((n, v.as_tensor().copy()?)))
        .collect()
}

fn restore(model: &LatentModel, snap: &Snapshot) -> Result<()> {
    let vars = sorted_vars(model.varmap())?;
    for ((name, var), (sname, t)) in vars.iter().zip(snap) {
        if name != sname {
            return Err(Error::Training(format!(
                "snapshot holds {sname} where the model has {name}"
            )));
        }
        var.set(t)?;
    }
    Ok(())
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
        model_cfg.validate()?;
        let (train_idx, val_idx) = split_rows(
            table.n_rows(),
            train_cfg.validation_fraction,
            train_cfg.seed,
        )?;
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
        let scaler = Standardizer::fit(&table.take_rows(&train_idx)?)?;
        let (train_rows, val_rows) = standardised_split(table, &scaler, &train_cfg)?;
        let model = LatentModel::build(&model_cfg, table.n_cols(), train_cfg.seed, prior)?;
        model.init_from_data(&train_rows)?;
        let optimizer = AdamW::new(model.varmap(), Self::adam_cfg(&train_cfg))?;
        let best = snapshot(&model)?;
        let state = TrainState {
            epoch: 0,
            step: 0,
            data_rng: generator(train_cfg.seed, streams::DATA),
            noise_rng: generator(train_cfg.seed, streams::NOISE),
            best_elbo: None,
            best_epoch: 0,
            epochs_since_best: 0,
            failures: 0,
            lr_scale: 1.0,
            finished: None,
            table_rows: table.n_rows(),
            table_fingerprint: fingerprint(table),
        };
        let mut trainer = Self {
            model: TabularModel {
                model,
                scaler,
                columns: table.columns().to_vec(),
                history: History::default(),
            },
            train_cfg,
            train_rows,
            val_rows,
            optimizer,
            state,
            best,
            observers: Vec::new(),
        };
        // The initial model is the rows' Gaussian fit: its ELBO is the bar to beat, so
        // early stopping never keeps weights worse than the starting point.
        let rows = if trainer.val_rows.is_empty() {
            &trainer.train_rows
        } else {
            &trainer.val_rows
        };
        let initial = trainer.elbo_of(rows)?;
        if initial.is_finite() {
            trainer.state.best_elbo = Some(initial);
        }
        Ok(trainer)
    }

    fn adam_cfg(c: &TrainConfig) -> AdamWConfig {
        AdamWConfig {
            learning_rate: c.learning_rate,
            weight_decay: c.weight_decay,
            ..AdamWConfig::default()
        }
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
        let (model, mut file) = TabularModel::read(path, prior)?;
        let (_, _, training): (_, _, TrainingHeader) =
            crate::nn::checkpoint::read_header(path, crate::tabular::fitted::FORMAT)?;
        let missing = || Error::Checkpoint {
            path: path.to_path_buf(),
            reason: "it holds a model but no training state; train a new model instead of resuming"
                .into(),
        };
        let (Some(train_cfg), Some(state)) = (training.train_config, training.state) else {
            return Err(missing());
        };
        let vars = sorted_vars(model.model.varmap())?;
        let mut moments = std::collections::HashMap::new();
        let mut best = Vec::with_capacity(vars.len());
        for (name, var) in &vars {
            for p in ["m", "v"] {
                if let Some(t) = file.remove(&format!("optim.{p}.{name}")) {
                    moments.insert(format!("{p}.{name}"), t);
                }
            }
            if let Some(t) = file.remove(&format!("best.{name}")) {
                if t.dims() != var.dims() {
                    return Err(Error::Checkpoint {
                        path: path.to_path_buf(),
                        reason: format!(
                            "tensor best.{name} has shape {:?}, expected {:?}",
                            t.dims(),
                            var.dims()
                        ),
                    });
                }
                best.push((name.clone(), t));
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
        let (train_rows, val_rows) = standardised_split(table, &model.scaler, &train_cfg)?;
        let mut optimizer = AdamW::new(model.model.varmap(), Self::adam_cfg(&train_cfg))?;
        optimizer.load_state(&moments, optimizer_steps)?;
        Ok(Self {
            model,
            train_cfg,
            train_rows,
            val_rows,
            optimizer,
            state,
            best,
            observers: Vec::new(),
        })
    }

    /// Adds an observer of progress.
    pub fn add_observer(&mut self, observer: Box<dyn Observer>) {
        self.observers.push(observer);
    }

    /// The training settings.
    pub fn config(&self) -> &TrainConfig {
        &self.train_cfg
    }

    /// Sets the time budget of the remaining training (for instance after resuming).
    pub fn set_time_budget(&mut self, seconds: Option<f64>) {
        self.train_cfg.time_budget_secs = seconds;
    }

    /// Sets the planned number of epochs (for instance to train longer after resuming).
    /// Changing it changes the learning-rate schedule.
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
        restore(&self.model.model, &self.best)
    }

    /// Ends training and returns the model (with the weights it currently has).
    pub fn into_model(self) -> TabularModel {
        self.model
    }

    /// Passes over the training rows per epoch and minibatches per epoch.
    fn epoch_shape(&self) -> (usize, usize) {
        let n = self.train_rows.len() / self.model.columns.len();
        let per_pass = n.div_ceil(self.train_cfg.batch_size);
        let passes = self.train_cfg.min_steps_per_epoch.div_ceil(per_pass).max(1);
        (passes, passes * per_pass)
    }

    fn batches_per_epoch(&self) -> usize {
        self.epoch_shape().1
    }

    fn planned_steps(&self) -> u64 {
        (self.train_cfg.epochs * self.batches_per_epoch()) as u64
    }

    /// Mean ELBO per row of standardised `rows`, with fixed noise (the same every epoch).
    fn elbo_of(&self, rows: &[f64]) -> Result<f64> {
        let d = self.model.columns.len();
        let k = self.train_cfg.validation_paths;
        let mut rng = generator(self.train_cfg.seed, streams::EVAL);
        let (mut sum, mut n) = (0.0, 0usize);
        for chunk in rows.chunks((4096 / k).max(1) * d) {
            let t = self.model.model.posterior_terms(chunk, k, &mut rng)?;
            sum += t.elbo.iter().sum::<f64>();
            n += t.elbo.len();
        }
        Ok(sum / n as f64)
    }

    /// Runs one epoch (or what the time budget allows of it) and records it.
    ///
    /// # Errors
    /// [`Error::Training`] after too many non-finite steps (the best weights are restored
    /// first); errors raised by observers.
    pub fn run_epoch(&mut self, started: Instant) -> Result<EpochRecord> {
        let t0 = Instant::now();
        let d = self.model.columns.len();
        let n = self.train_rows.len() / d;
        let (passes, batches) = self.epoch_shape();
        let bsz = self.train_cfg.batch_size;
        let mut minibatches: Vec<Vec<usize>> = Vec::with_capacity(batches);
        for _ in 0..passes {
            let mut order: Vec<usize> = (0..n).collect();
            order.shuffle(&mut self.state.data_rng);
            minibatches.extend(order.chunks(bsz).map(<[usize]>::to_vec));
        }
        let total = self.planned_steps();
        let dev = Device::Cpu;
        let dtype = self.model.model.dtype();
        let latent = self.model.model.latent_dim();
        let epoch_start = snapshot(&self.model.model)?;
        let epoch_opt = (self.optimizer.state_tensors(), self.optimizer.steps());
        let (mut sum_loss, mut sum_cost, mut sum_rec, mut sum_gn, mut count) =
            (0.0, 0.0, 0.0, 0.0, 0usize);
        let mut lr = self.optimizer.learning_rate();
        for (bi, idx) in minibatches.iter().enumerate() {
            if let Some(budget) = self.train_cfg.time_budget_secs {
                if started.elapsed().as_secs_f64() > budget {
                    self.state.finished = Some(Termination::TimeBudget);
                    break;
                }
            }
            lr = self.train_cfg.learning_rate_at(self.state.step, total) * self.state.lr_scale;
            self.optimizer.set_learning_rate(lr);
            self.state.step += 1;
            let mut rows = Vec::with_capacity(idx.len() * d);
            for &i in idx.iter() {
                rows.extend_from_slice(&self.train_rows[i * d..(i + 1) * d]);
            }
            let y = Tensor::from_vec(rows, (idx.len(), d), &dev)?.to_dtype(dtype)?;
            let noise = self.model.model.config().solver.sample_noise(
                &mut self.state.noise_rng,
                idx.len(),
                latent,
                dtype,
                &dev,
            )?;
            let model = &self.model.model;
            let optimizer = &mut self.optimizer;
            let clip = self.train_cfg.max_grad_norm;
            let outcome = run_deep(
                move || -> Result<(crate::sde::objective::FreeEnergyValues, f64)> {
                    let fe = model.free_energy(&y, &noise)?;
                    let v = fe.values()?;
                    let grads = fe.loss.backward()?;
                    let stats = optimizer.step(&grads, Some(clip))?;
                    Ok((v, stats.grad_norm))
                },
            )?;
            match outcome {
                Ok((v, gn)) => {
                    sum_loss += v.loss;
                    sum_cost += v.control_cost;
                    sum_rec += v.terminal_cost;
                    sum_gn += gn;
                    count += 1;
                    let info = StepInfo {
                        epoch: self.state.epoch + 1,
                        epochs: self.train_cfg.epochs,
                        batch: bi + 1,
                        batches,
                        loss: v.loss,
                        elapsed: started.elapsed().as_secs_f64(),
                    };
                    for o in &mut self.observers {
                        o.on_step(&info)?;
                    }
                }
                Err(Error::NonFinite { what, detail }) => {
                    self.state.failures += 1;
                    restore(&self.model.model, &epoch_start)?;
                    let moments = epoch_opt.0.iter().cloned().collect();
                    self.optimizer.load_state(&moments, epoch_opt.1)?;
                    self.state.lr_scale *= 0.5;
                    if self.state.failures > self.train_cfg.max_failures {
                        restore(&self.model.model, &self.best)?;
                        return Err(Error::Training(format!(
                            "{} non-finite steps (last: {what}: {detail}); stopped and kept the best weights (epoch {}). Lower the learning rate or standardise unusual columns",
                            self.state.failures, self.state.best_epoch
                        )));
                    }
                }
                Err(e) => return Err(e),
            }
        }
        self.state.epoch += 1;
        let train_elbo = if count > 0 {
            -sum_loss / count as f64
        } else {
            f64::NAN
        };
        let val_elbo = if self.val_rows.is_empty() {
            None
        } else {
            Some(self.elbo_of(&self.val_rows)?)
        };
        let score = val_elbo.unwrap_or(train_elbo);
        let improved = score.is_finite()
            && self
                .state
                .best_elbo
                .is_none_or(|b| score > b + self.train_cfg.min_improvement);
        if improved {
            self.state.best_elbo = Some(score);
            self.state.best_epoch = self.state.epoch;
            self.state.epochs_since_best = 0;
            self.best = snapshot(&self.model.model)?;
        } else {
            self.state.epochs_since_best += 1;
            if self.state.epochs_since_best >= self.train_cfg.patience
                && self.state.finished.is_none()
            {
                self.state.finished = Some(Termination::EarlyStopped);
            }
        }
        if self.state.epoch >= self.train_cfg.epochs && self.state.finished.is_none() {
            self.state.finished = Some(Termination::MaxEpochs);
        }
        let c = count.max(1) as f64;
        let record = EpochRecord {
            epoch: self.state.epoch,
            step: self.state.step,
            train_elbo,
            val_elbo,
            control_cost: sum_cost / c,
            reconstruction: sum_rec / c,
            learning_rate: lr,
            grad_norm: sum_gn / c,
            seconds: t0.elapsed().as_secs_f64(),
        };
        self.model.history.epochs.push(record.clone());
        for o in &mut self.observers {
            o.on_epoch(&record)?;
        }
        Ok(record)
    }

    /// Trains until the epochs run out, early stopping triggers or the time budget is spent,
    /// then restores the best weights.
    ///
    /// # Errors
    /// As [`Trainer::run_epoch`].
    pub fn fit(&mut self) -> Result<TrainReport> {
        let started = Instant::now();
        while self.state.finished.is_none() {
            self.run_epoch(started)?;
        }
        self.restore_best()?;
        Ok(TrainReport {
            epochs: self.state.epoch,
            best_epoch: self.state.best_epoch,
            best_elbo: self.state.best_elbo,
            termination: self.state.finished.unwrap_or(Termination::MaxEpochs),
            seconds: started.elapsed().as_secs_f64(),
        })
    }

    /// Writes a checkpoint (weights, optimiser moments, best weights, configuration, scaler,
    /// columns, state, history) atomically to `path`.
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Checkpoint`] if it cannot be written.
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        let mut tensors = self.model.tensors()?;
        for (n, m) in self.optimizer.state_tensors() {
            tensors.push((format!("optim.{n}"), m));
        }
        for (n, b) in &self.best {
            tensors.push((format!("best.{n}"), b.clone()));
        }
        let header = CheckpointHeader {
            model: self.model.header(),
            training: TrainingHeader {
                train_config: Some(self.train_cfg.clone()),
                state: Some(self.state.clone()),
                optimizer_steps: Some(self.optimizer.steps()),
            },
        };
        crate::nn::checkpoint::write(
            path.as_ref(),
            crate::tabular::fitted::FORMAT,
            tensors,
            &header,
        )
    }
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
struct CheckpointHeader {
    #[serde(flatten)]
    model: crate::tabular::fitted::ModelHeader,
    #[serde(flatten)]
    training: TrainingHeader,
}
