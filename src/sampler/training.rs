//! [`Sampler`]: a learned control trained on the free energy, with the tabular trainer's
//! machinery: schedule, history, observers, non-finite recovery and exact checkpoints.

use std::ops::ControlFlow;
use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use candle_core::{Device, Tensor};
use candle_nn::VarMap;
use serde::{Deserialize, Serialize};

use super::config::SamplerConfig;
use super::log_z::{estimate_log_z, EstimateOptions, LogZEstimate};
use crate::collective::{check_group, on_root, share, Collective, SingleProcess};
use crate::error::{Error, Result};
use crate::nn::descent::group_gradient_step;
use crate::nn::optim::AdamW;
use crate::nn::params::{sorted_vars, ParamBuilder};
use crate::nn::recovery::{GoodPoint, RecoveryState};
use crate::nn::termination::Termination;
use crate::sampler::ratio::LogDensityRatio;
use crate::sampler::target::LogDensity;
use crate::sde::diffusion::Diffusion;
use crate::sde::drift::{Drift, TimeMlp};
use crate::sde::objective::{FreeEnergy, FreeEnergyValues};
use crate::sde::solver::{simulate, Sde};
use crate::util::rng::{generator, key2, streams};

/// Kind of object in a sampler checkpoint (the file's `format` entry).
pub(crate) const FORMAT: &str = "neural-sde-sampler";

/// Steps between the points that a non-finite step goes back to.
const GOOD_POINT_EVERY: u64 = 50;

/// One applied training step of a [`Sampler`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SamplerRecord {
    /// Optimiser steps taken so far, this one included (skipped ones count too).
    pub step: u64,
    /// Batch mean of the free energy (control cost + terminal cost).
    pub loss: f64,
    /// Batch mean of the control cost.
    pub control_cost: f64,
    /// Batch mean of the terminal cost.
    pub terminal_cost: f64,
    /// Learning rate of the step.
    pub learning_rate: f64,
    /// Gradient norm before clipping.
    pub grad_norm: f64,
}

/// Receives a [`Sampler`]'s progress. Return `Ok(ControlFlow::Break(()))` to stop
/// [`Sampler::fit`] normally ([`Termination::Requested`]); an `Err` stops it with that error.
pub trait SamplerObserver: Send {
    /// After every applied step.
    fn on_step(&mut self, record: &SamplerRecord) -> Result<ControlFlow<()>>;
}

/// Everything needed to continue training a [`Sampler`] exactly where it stopped.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SamplerState {
    /// Optimiser steps taken (including skipped ones). The training noise needs no other
    /// state: path `i` of step `s` draws from a generator keyed by `(s, i)`.
    pub step: u64,
    /// Non-finite steps so far and the learning-rate scale they left.
    #[serde(flatten)]
    pub recovery: RecoveryState,
    /// Set when [`Sampler::fit`] ended.
    pub finished: Option<Termination>,
    /// Seconds of training so far, over every run.
    pub seconds: f64,
}

/// Summary returned by [`Sampler::fit`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SamplerReport {
    /// Optimiser steps taken in all.
    pub steps: u64,
    /// Why training ended.
    pub termination: Termination,
    /// Seconds spent in this run.
    pub seconds: f64,
    /// The last applied step.
    pub last: Option<SamplerRecord>,
}

impl std::fmt::Display for SamplerReport {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{} after {} steps in {:.1} s",
            self.termination, self.steps, self.seconds
        )?;
        if let Some(r) = &self.last {
            write!(
                f,
                "; last batch: free energy {:.4}, control cost {:.4}",
                r.loss, r.control_cost
            )?;
        }
        Ok(())
    }
}

/// The sampler's part of a checkpoint header.
#[derive(Serialize, Deserialize)]
struct SamplerHeader {
    dim: usize,
    config: SamplerConfig,
    state: SamplerState,
    optimizer_steps: u64,
    history: Vec<SamplerRecord>,
    /// The only wall-clock figure (seconds of training), apart from the rest.
    timing: f64,
}

/// A learned control that transports `X_0 = 0` to an unnormalised target.
///
/// # Example
/// ```
/// use std::sync::Arc;
/// use neural_sde::{EstimateOptions, GaussianMixture, Sampler, SamplerConfig, SolverConfig};
///
/// let target = Arc::new(GaussianMixture::new(vec![vec![1.0, 0.0]], 1.0)?);
/// let cfg = SamplerConfig {
///     batch_size: 64,
///     iterations: 20,
///     solver: SolverConfig { n_steps: 10, ..Default::default() },
///     ..Default::default()
/// };
/// let mut sampler = Sampler::new(target, cfg)?;
/// let report = sampler.fit()?;
/// assert_eq!(report.steps, 20);
/// let est = sampler.estimate(EstimateOptions::new(512, 1))?;
/// assert!(est.log_z.abs() < 0.2); // the target is normalised: log Z = 0
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub struct Sampler {
    cfg: SamplerConfig,
    target: Arc<dyn LogDensity>,
    terminal: LogDensityRatio,
    diffusion: Diffusion,
    control: Box<dyn Drift>,
    varmap: VarMap,
    optimizer: AdamW,
    state: SamplerState,
    history: Vec<SamplerRecord>,
    observers: Vec<Box<dyn SamplerObserver>>,
    good: Option<GoodPoint>,
    clock: Instant,
    group: Box<dyn Collective>,
}

impl std::fmt::Debug for Sampler {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Sampler")
            .field("dim", &self.target.dim())
            .field("cfg", &self.cfg)
            .field("state", &self.state)
            .finish()
    }
}

impl Sampler {
    /// A sampler with the built-in control network ([`SamplerConfig::control`]).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a bad config.
    pub fn new(target: Arc<dyn LogDensity>, cfg: SamplerConfig) -> Result<Self> {
        let (control, varmap) = Self::builtin_control(target.dim(), &cfg)?;
        Self::with_control(target, control, varmap, cfg)
    }

    fn builtin_control(dim: usize, cfg: &SamplerConfig) -> Result<(Box<dyn Drift>, VarMap)> {
        cfg.validate()?;
        crate::util::limits::parameters(cfg.control.parameter_count(dim, 0))?;
        let varmap = VarMap::new();
        let pb = ParamBuilder::new(&varmap, cfg.precision.dtype(), &Device::Cpu).pp("control");
        let mut init_rng = generator(cfg.seed, streams::INIT);
        let control = TimeMlp::new(&cfg.control, dim, 0, &pb, &mut init_rng)?;
        Ok((Box::new(control), varmap))
    }

    /// A sampler with a user-supplied control whose parameters live in `varmap` (the
    /// optimiser trains every variable of it).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a bad config; [`Error::Shape`] if the control's dimension
    /// differs from the target's or it expects a context.
    pub fn with_control(
        target: Arc<dyn LogDensity>,
        control: Box<dyn Drift>,
        varmap: VarMap,
        cfg: SamplerConfig,
    ) -> Result<Self> {
        cfg.validate()?;
        if control.dim() != target.dim() {
            return Err(Error::shape(
                "control dimension vs target",
                target.dim(),
                control.dim(),
            ));
        }
        if control.context_dim() != 0 {
            return Err(Error::shape(
                "control context dimension (the sampler passes no context)",
                0,
                control.context_dim(),
            ));
        }
        let reference_var = cfg.sigma * cfg.sigma * cfg.solver.t_end;
        let terminal = LogDensityRatio::new(target.clone(), reference_var)?;
        let optimizer = AdamW::new(&varmap, cfg.optimizer.adamw.clone())?;
        Ok(Self {
            diffusion: Diffusion::constant(cfg.sigma)?,
            state: SamplerState {
                step: 0,
                recovery: RecoveryState::default(),
                finished: None,
                seconds: 0.0,
            },
            cfg,
            target,
            terminal,
            control,
            varmap,
            optimizer,
            history: Vec::new(),
            observers: Vec::new(),
            good: None,
            clock: Instant::now(),
            group: Box::new(SingleProcess),
        })
    }

    /// The settings.
    pub fn config(&self) -> &SamplerConfig {
        &self.cfg
    }

    /// The control's parameters.
    pub fn varmap(&self) -> &VarMap {
        &self.varmap
    }

    /// The control.
    pub fn control(&self) -> &dyn Drift {
        self.control.as_ref()
    }

    /// The training state.
    pub fn state(&self) -> &SamplerState {
        &self.state
    }

    /// Every applied step so far (across resumes).
    pub fn history(&self) -> &[SamplerRecord] {
        &self.history
    }

    /// Trains data-parallel in `group`: each process simulates its share of every batch of
    /// paths (path `i` of step `s` draws the same noise on whichever process), the gradients
    /// are summed over the group and every process applies the same update. Every process
    /// must build its sampler with the same settings (checked here) and make the same calls;
    /// only process 0 writes checkpoints.
    ///
    /// # Errors
    /// [`Error::Collective`] when a process has other settings than process 0, or there are
    /// more processes than paths per batch.
    pub fn in_group(mut self, group: Box<dyn Collective>) -> Result<Self> {
        check_group(
            group.as_ref(),
            self.cfg.batch_size,
            "paths per batch",
            0,
            &self.cfg,
        )?;
        self.group = group;
        Ok(self)
    }

    /// Adds an observer of progress.
    pub fn add_observer(&mut self, observer: Box<dyn SamplerObserver>) {
        self.observers.push(observer);
    }

    /// Sets the planned steps (to train longer after [`Sampler::fit`] ended, say). The
    /// learning-rate schedule is planned over this number.
    pub fn set_iterations(&mut self, iterations: usize) {
        self.cfg.iterations = iterations;
        if self.state.finished == Some(Termination::MaxEpochs)
            && (iterations as u64) > self.state.step
        {
            self.state.finished = None;
        }
    }

    /// One stochastic-gradient step on a fresh batch at the scheduled learning rate.
    ///
    /// # Errors
    /// [`Error::NonFinite`] when the objective or gradient was not finite: the step was not
    /// applied, the weights and optimiser went back to the last good point (at most 50
    /// steps back) and the learning rate was halved; [`Error::Training`] once more than
    /// `max_failures` steps have failed.
    pub fn step(&mut self) -> Result<SamplerRecord> {
        if self.good.is_none() || self.state.step.is_multiple_of(GOOD_POINT_EVERY) {
            self.good = Some(GoodPoint::take(&self.varmap, &self.optimizer)?);
        }
        let d = self.target.dim();
        let dtype = self.cfg.precision.dtype();
        let global = self.cfg.batch_size;
        let mine = share(global, self.group.rank(), self.group.size());
        let keys: Vec<u64> = mine.map(|i| key2(self.state.step, i as u64)).collect();
        let noise = if keys.is_empty() {
            None
        } else {
            Some(self.cfg.solver.sample_noise_keyed(
                self.cfg.seed,
                streams::NOISE_ROWS,
                &keys,
                d,
                dtype,
                &Device::Cpu,
            )?)
        };
        let lr = self
            .cfg
            .optimizer
            .learning_rate_at(self.state.step, self.cfg.iterations as u64)
            * self.state.recovery.lr_scale;
        self.state.step = self.state.step.saturating_add(1);
        let sde = Sde::new(&self.diffusion).with_control(self.control.as_ref());
        let (solver, terminal) = (&self.cfg.solver, &self.terminal);
        // Each process's loss is its paths' share of the batch mean (exactly the mean in a
        // group of one).
        let part = keys.len() as f64 / global as f64;
        let outcome = group_gradient_step(
            &mut self.optimizer,
            lr,
            self.cfg.optimizer.max_grad_norm,
            self.group.as_ref(),
            FreeEnergyValues::PARTS,
            move || {
                let Some(noise) = noise else {
                    return Ok(None);
                };
                let x0 = Tensor::zeros((keys.len(), d), dtype, &Device::Cpu)?;
                let paths = simulate(&sde, solver, &x0, &noise, None)?;
                let fe = FreeEnergy::new(&paths, terminal, None)?;
                let (loss, figures) = fe.share(part)?;
                Ok(Some((loss, (), figures)))
            },
        )
        .map(|(_, f, stats)| (FreeEnergyValues::from_parts(&f), stats));
        match outcome {
            Ok((v, stats)) => {
                let record = SamplerRecord {
                    step: self.state.step,
                    loss: v.loss,
                    control_cost: v.control_cost,
                    terminal_cost: v.terminal_cost,
                    learning_rate: lr,
                    grad_norm: stats.grad_norm,
                };
                self.history.push(record);
                Ok(record)
            }
            Err(Error::NonFinite { what, detail }) => {
                let good = self
                    .good
                    .as_ref()
                    .ok_or_else(|| Error::Training("no good point to go back to".into()))?;
                self.state.recovery.recover(
                    good,
                    &self.varmap,
                    &mut self.optimizer,
                    self.cfg.max_failures,
                    (&what, &detail),
                )?;
                Err(Error::NonFinite { what, detail })
            }
            Err(e) => Err(e),
        }
    }

    /// Trains until [`SamplerConfig::iterations`] steps have been taken in all, the time
    /// budget of this call is spent or an observer asks to stop; non-finite steps are
    /// recovered from (see [`Sampler::step`]). Called again after a time-budget or observer
    /// stop, it continues.
    ///
    /// # Errors
    /// [`Error::Training`] after more than `max_failures` non-finite steps; errors raised
    /// by observers.
    pub fn fit(&mut self) -> Result<SamplerReport> {
        self.clock = Instant::now();
        if matches!(
            self.state.finished,
            Some(Termination::TimeBudget | Termination::Requested)
        ) {
            self.state.finished = None;
        }
        let mut last = None;
        while self.state.finished.is_none() {
            let elapsed = self.clock.elapsed().as_secs_f64();
            if self.state.step >= self.cfg.iterations as u64 {
                self.state.finished = Some(Termination::MaxEpochs);
                break;
            }
            if self.cfg.time_budget_secs.is_some_and(|b| elapsed > b) {
                self.state.finished = Some(Termination::TimeBudget);
                break;
            }
            let record = match self.step() {
                Ok(r) => r,
                Err(Error::NonFinite { .. }) => continue,
                Err(e) => return Err(e),
            };
            last = Some(record);
            for o in &mut self.observers {
                if o.on_step(&record)?.is_break() {
                    self.state.finished = Some(Termination::Requested);
                }
            }
        }
        let seconds = self.clock.elapsed().as_secs_f64();
        self.state.seconds += seconds;
        Ok(SamplerReport {
            steps: self.state.step,
            termination: self.state.finished.unwrap_or(Termination::MaxEpochs),
            seconds,
            last: last.or_else(|| self.history.last().copied()),
        })
    }

    /// Simulates paths (in chunks of at most 1024) with the given noise seed and reports
    /// the free energy, the importance-weighted `log Z`, the effective sample size and the
    /// weighted samples. Builds no autodiff graph.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for 0 paths; [`Error::NonFinite`] if every weight is zero.
    pub fn estimate(&self, options: EstimateOptions) -> Result<LogZEstimate> {
        let sde = Sde::new(&self.diffusion).with_control(self.control.as_ref());
        estimate_log_z(
            &sde,
            &self.terminal,
            &self.cfg.solver,
            self.cfg.precision.dtype(),
            options,
        )
    }

    /// Writes a checkpoint (control weights, optimiser moments, settings, state, history)
    /// atomically to `path`; [`Sampler::load`] continues from it bit for bit.
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Checkpoint`] if it cannot be written.
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        let path = path.as_ref();
        let what = format!("the checkpoint {}", path.display());
        on_root(self.group.as_ref(), &what, || self.write_checkpoint(path))
    }

    fn write_checkpoint(&self, path: &Path) -> Result<()> {
        let mut tensors: Vec<(String, Tensor)> = sorted_vars(&self.varmap)?
            .into_iter()
            .map(|(n, v)| (n, v.as_tensor().clone()))
            .collect();
        for (n, m) in self.optimizer.state_tensors() {
            tensors.push((format!("optim.{n}"), m));
        }
        let mut state = self.state.clone();
        let timing = std::mem::take(&mut state.seconds);
        let header = SamplerHeader {
            dim: self.target.dim(),
            config: self.cfg.clone(),
            state,
            timing,
            optimizer_steps: self.optimizer.steps(),
            history: self.history.clone(),
        };
        crate::nn::checkpoint::write(
            path,
            FORMAT,
            tensors,
            &header,
            crate::nn::checkpoint::parses_as::<SamplerHeader>,
        )
    }

    /// Loads a sampler with the built-in control saved by [`Sampler::save`], ready to
    /// estimate or to continue training exactly where it stopped.
    ///
    /// # Errors
    /// [`Error::Checkpoint`] for an unreadable or inconsistent file, or a target of another
    /// dimension.
    pub fn load(path: impl AsRef<Path>, target: Arc<dyn LogDensity>) -> Result<Self> {
        let path = path.as_ref();
        let (bytes, header) = Self::read_header(path, target.as_ref())?;
        header
            .config
            .validate()
            .map_err(|e| bad(path, format!("the stored settings are invalid ({e})")))?;
        crate::nn::checkpoint::check_implied_size(
            path,
            &bytes,
            header.config.control.parameter_count(header.dim, 0),
            &["optim."],
        )?;
        let (control, varmap) = Self::builtin_control(header.dim, &header.config)
            .map_err(|e| bad(path, format!("the stored settings are invalid ({e})")))?;
        Self::restore(path, &bytes, header, target, control, varmap)
    }

    /// As [`Sampler::load`] for a sampler made with [`Sampler::with_control`]: build the
    /// same control over a fresh `varmap`, and the file's weights are copied into it.
    ///
    /// # Errors
    /// As [`Sampler::load`]; [`Error::Checkpoint`] if the control's parameters differ from
    /// the file's.
    pub fn load_with_control(
        path: impl AsRef<Path>,
        target: Arc<dyn LogDensity>,
        control: Box<dyn Drift>,
        varmap: VarMap,
    ) -> Result<Self> {
        let path = path.as_ref();
        let (bytes, header) = Self::read_header(path, target.as_ref())?;
        Self::restore(path, &bytes, header, target, control, varmap)
    }

    fn read_header(path: &Path, target: &dyn LogDensity) -> Result<(Vec<u8>, SamplerHeader)> {
        let (bytes, _, header): (_, _, SamplerHeader) =
            crate::nn::checkpoint::read_header(path, FORMAT)?;
        if header.dim != target.dim() {
            return Err(bad(
                path,
                format!(
                    "the sampler was trained for dimension {}, the target has {}; load it with the same target",
                    header.dim,
                    target.dim()
                ),
            ));
        }
        Ok((bytes, header))
    }

    fn restore(
        path: &Path,
        bytes: &[u8],
        header: SamplerHeader,
        target: Arc<dyn LogDensity>,
        control: Box<dyn Drift>,
        varmap: VarMap,
    ) -> Result<Self> {
        let mut file =
            crate::nn::checkpoint::read_tensors(path, bytes, header.config.precision.dtype())?;
        crate::nn::checkpoint::load_vars(path, &varmap, &file)?;
        let mut s = Self::with_control(target, control, varmap, header.config)
            .map_err(|e| bad(path, format!("the stored settings are invalid ({e})")))?;
        let mut moments = std::collections::HashMap::new();
        for (name, _) in sorted_vars(&s.varmap)? {
            file.remove(&name);
            for p in ["m", "v"] {
                let key = format!("optim.{p}.{name}");
                let t = file
                    .remove(&key)
                    .ok_or_else(|| bad(path, format!("tensor {key} is missing")))?;
                moments.insert(format!("{p}.{name}"), t);
            }
        }
        if let Some(name) = file.keys().next() {
            return Err(bad(
                path,
                format!("unexpected tensor {name}: it does not belong to this control"),
            ));
        }
        s.optimizer
            .load_state(&moments, header.optimizer_steps)
            .map_err(|e| bad(path, e.to_string()))?;
        let st = &header.state;
        let r = st.recovery;
        if st.step > i32::MAX as u64
            || !(r.lr_scale.is_finite() && r.lr_scale > 0.0 && r.lr_scale <= 1.0)
            || !header.timing.is_finite()
        {
            return Err(bad(
                path,
                format!(
                    "the stored training state is invalid (step {}, learning-rate scale {}); train a new sampler",
                    st.step, r.lr_scale
                ),
            ));
        }
        s.state = header.state;
        s.state.seconds = header.timing;
        s.history = header.history;
        Ok(s)
    }
}

fn bad(path: &Path, reason: String) -> Error {
    Error::Checkpoint {
        path: path.to_path_buf(),
        reason,
    }
}
