//! Sampling an unnormalised density with a learned control (the free-energy route).
//!
//! With reference `dX = σ dW` on `[0, T]` from `X_0 = 0` (terminal law `ν = N(0, σ²T I)`)
//! and terminal cost `g = log ν − log π̃`, the free energy of a control `u` is
//! `J(u) = E[½ Σ_k |u_k/σ|² h + g(X_N)] ≥ −log Z`, with equality when `X_T ~ π`
//! (Zhang & Chen, *Path Integral Sampler*, ICLR 2022; for σ = T = 1 the optimum is the
//! Föllmer drift). Training minimises `J` by stochastic gradients; [`Sampler::estimate`]
//! then reports the importance-weighted `log Z`, which is unbiased for `Z` under the
//! Euler–Maruyama discretisation for any control, since Euler–Maruyama is exact for the
//! reference Brownian motion.

mod follmer;
pub(crate) mod ratio;
pub(crate) mod target;

pub use follmer::FollmerDrift;

use std::sync::Arc;

use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;
use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::nn::optim::{AdamW, AdamWConfig};
use crate::nn::params::{frozen, ParamBuilder};
use crate::sampler::ratio::LogDensityRatio;
use crate::sampler::target::LogDensity;
use crate::sde::diffusion::Diffusion;
use crate::sde::drift::{Drift, MlpConfig, TimeMlp};
use crate::sde::objective::{FreeEnergy, FreeEnergyValues};
use crate::sde::solver::{simulate, Scheme, Sde, SolverConfig};
use crate::sde::terminal::TerminalCost;
use crate::util::precision::Precision;
use crate::util::rng::{generator, streams, Generator};
use crate::util::stack::run_deep;

/// Settings of a [`Sampler`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct SamplerConfig {
    /// Time grid (the scheme must be Euler–Maruyama for exact importance weights).
    pub solver: SolverConfig,
    /// Noise scale σ of the reference process.
    pub sigma: f64,
    /// Shape of the control network.
    pub control: MlpConfig,
    /// Paths per training step.
    pub batch_size: usize,
    /// Optimiser settings.
    pub optimizer: AdamWConfig,
    /// Gradient-norm clipping threshold (`None`: no clipping).
    pub max_grad_norm: Option<f64>,
    /// Seed of every random draw (weights and noise).
    pub seed: u64,
    /// Tensor precision.
    pub precision: Precision,
}

impl Default for SamplerConfig {
    fn default() -> Self {
        Self {
            solver: SolverConfig::default(),
            sigma: 1.0,
            control: MlpConfig::default(),
            batch_size: 256,
            optimizer: AdamWConfig {
                learning_rate: 3e-3,
                ..AdamWConfig::default()
            },
            max_grad_norm: Some(10.0),
            seed: 0,
            precision: Precision::F32,
        }
    }
}

impl SamplerConfig {
    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        self.solver.validate()?;
        if self.solver.scheme != Scheme::EulerMaruyama {
            return Err(Error::config(
                "scheme",
                format!("{:?}", self.solver.scheme),
                "the sampler's importance weights need Euler–Maruyama",
            ));
        }
        check_positive("sigma", self.sigma)?;
        self.control.validate()?;
        if self.batch_size == 0 {
            return Err(Error::config(
                "batch_size",
                0,
                "use at least 1 path per step",
            ));
        }
        self.optimizer.validate()?;
        if let Some(c) = self.max_grad_norm {
            check_positive("max_grad_norm", c)?;
        }
        Ok(())
    }
}

/// Estimates from `K` paths of a trained (or any) control.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LogZEstimate {
    /// Number of paths `K`.
    pub paths: usize,
    /// `log((1/K) Σ_i w_i)`: unbiased for `Z` (not for `log Z`), a lower bound in expectation.
    pub log_z: f64,
    /// Delta-method standard error of `log_z`.
    pub log_z_se: f64,
    /// Mean objective `J` (an upper bound on `−log Z` in expectation).
    pub free_energy: f64,
    /// Standard error of `free_energy`.
    pub free_energy_se: f64,
    /// Mean control cost.
    pub control_cost: f64,
    /// Effective sample size `(Σ w)² / Σ w²`.
    pub ess: f64,
    /// End points `X_T`, one row per path.
    pub samples: Vec<Vec<f64>>,
    /// Log importance weights `log w_i = log dP/dQ − g(X_T)`, one per path.
    pub log_weights: Vec<f64>,
}

/// A learned control that transports `X_0 = 0` to an unnormalised target.
///
/// # Example
/// ```
/// use std::sync::Arc;
/// use neural_sde::{GaussianMixture, Sampler, SamplerConfig, SolverConfig};
///
/// let target = Arc::new(GaussianMixture::new(vec![vec![1.0, 0.0]], 1.0)?);
/// let cfg = SamplerConfig { batch_size: 64, solver: SolverConfig { n_steps: 10, ..Default::default() }, ..Default::default() };
/// let mut sampler = Sampler::new(target, cfg)?;
/// for _ in 0..20 {
///     sampler.step()?;
/// }
/// let est = sampler.estimate(512, 1)?;
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
    noise_rng: Generator,
    device: Device,
}

impl std::fmt::Debug for Sampler {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Sampler")
            .field("dim", &self.target.dim())
            .field("cfg", &self.cfg)
            .field("optimizer", &self.optimizer)
            .finish()
    }
}

impl Sampler {
    /// A sampler with the built-in control network ([`SamplerConfig::control`]).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a bad config.
    pub fn new(target: Arc<dyn LogDensity>, cfg: SamplerConfig) -> Result<Self> {
        cfg.validate()?;
        let device = Device::Cpu;
        let varmap = VarMap::new();
        let pb = ParamBuilder::new(&varmap, cfg.precision.dtype(), &device).pp("control");
        let mut init_rng = generator(cfg.seed, streams::INIT);
        let control = TimeMlp::new(&cfg.control, target.dim(), 0, &pb, &mut init_rng)?;
        Self::with_control(target, Box::new(control), varmap, cfg)
    }

    /// A sampler with a user-supplied control whose parameters live in `varmap`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a bad config; [`Error::Shape`] if the control's dimension
    /// differs from the target's.
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
        let reference_var = cfg.sigma * cfg.sigma * cfg.solver.t_end;
        let terminal = LogDensityRatio::new(target.clone(), reference_var)?;
        let optimizer = AdamW::new(&varmap, cfg.optimizer.clone())?;
        Ok(Self {
            diffusion: Diffusion::constant(cfg.sigma)?,
            noise_rng: generator(cfg.seed, streams::NOISE),
            device: Device::Cpu,
            cfg,
            target,
            terminal,
            control,
            varmap,
            optimizer,
        })
    }

    /// The control's parameters.
    pub fn varmap(&self) -> &VarMap {
        &self.varmap
    }

    /// The control.
    pub fn control(&self) -> &dyn Drift {
        self.control.as_ref()
    }

    /// The optimiser (to change its learning rate, say).
    pub fn optimizer_mut(&mut self) -> &mut AdamW {
        &mut self.optimizer
    }

    /// One stochastic-gradient step on a fresh batch; returns the batch's objective.
    ///
    /// # Errors
    /// [`Error::NonFinite`] (and no update) when the objective or gradient is not finite.
    pub fn step(&mut self) -> Result<FreeEnergyValues> {
        let d = self.target.dim();
        let dtype = self.cfg.precision.dtype();
        let noise = self.cfg.solver.sample_noise(
            &mut self.noise_rng,
            self.cfg.batch_size,
            d,
            dtype,
            &self.device,
        )?;
        let sde = Sde::new(&self.diffusion).with_control(self.control.as_ref());
        let (solver, terminal, optimizer) = (&self.cfg.solver, &self.terminal, &mut self.optimizer);
        let max_norm = self.cfg.max_grad_norm;
        let batch = self.cfg.batch_size;
        let device = &self.device;
        run_deep(move || -> Result<FreeEnergyValues> {
            let x0 = Tensor::zeros((batch, d), dtype, device)?;
            let paths = simulate(&sde, solver, &x0, &noise, None)?;
            let fe = FreeEnergy::new(&paths, terminal, None)?;
            let values = fe.values()?;
            let grads = fe.loss.backward()?;
            optimizer.step(&grads, max_norm)?;
            Ok(values)
        })?
    }

    /// Runs `iterations` training steps; returns each step's objective.
    ///
    /// # Errors
    /// As [`Sampler::step`].
    pub fn train(&mut self, iterations: usize) -> Result<Vec<FreeEnergyValues>> {
        (0..iterations).map(|_| self.step()).collect()
    }

    /// Simulates `paths` paths (in chunks of at most 1024) with noise from `seed` and reports
    /// the free energy, the importance-weighted `log Z`, the effective sample size and the
    /// weighted samples.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `paths == 0`; [`Error::NonFinite`] if every weight is zero.
    pub fn estimate(&self, paths: usize, seed: u64) -> Result<LogZEstimate> {
        let sde = Sde::new(&self.diffusion).with_control(self.control.as_ref());
        estimate_log_z(
            &sde,
            &self.terminal,
            &self.cfg.solver,
            self.cfg.precision.dtype(),
            paths,
            seed,
        )
    }
}

/// Importance-weighted `log Z` estimate for any control (see [`Sampler::estimate`]).
///
/// `sde` must have no prior drift and σ matching `terminal`'s reference; the scheme must be
/// Euler–Maruyama.
///
/// # Errors
/// As [`Sampler::estimate`].
pub fn estimate_log_z(
    sde: &Sde<'_>,
    terminal: &LogDensityRatio,
    solver: &SolverConfig,
    dtype: DType,
    paths: usize,
    seed: u64,
) -> Result<LogZEstimate> {
    if paths == 0 {
        return Err(Error::config("paths", 0, "use at least 1 path"));
    }
    if solver.scheme != Scheme::EulerMaruyama {
        return Err(Error::config(
            "scheme",
            format!("{:?}", solver.scheme),
            "log Z estimates need Euler–Maruyama",
        ));
    }
    let d = terminal.target().dim();
    let dev = Device::Cpu;
    let mut rng = generator(seed, streams::EVAL);
    let mut log_w = Vec::with_capacity(paths);
    let mut objective = Vec::with_capacity(paths);
    let mut cost = Vec::with_capacity(paths);
    let mut samples = Vec::with_capacity(paths);
    let mut done = 0;
    while done < paths {
        let n = (paths - done).min(1024);
        let noise = solver.sample_noise(&mut rng, n, d, dtype, &dev)?;
        let (lw, obj, c, x) = run_deep(|| {
            frozen(|| -> Result<_> {
                let x0 = Tensor::zeros((n, d), dtype, &dev)?;
                let p = simulate(sde, solver, &x0, &noise, None)?;
                let g = terminal.cost(&p.end, None)?;
                let to = |t: &Tensor| -> Result<Vec<f64>> {
                    Ok(t.to_dtype(DType::F64)?.to_vec1::<f64>()?)
                };
                let lw = to(&(&p.log_weight - &g)?)?;
                let obj = to(&(&p.control_cost + &g)?)?;
                let c = to(&p.control_cost)?;
                let x = p.end.to_dtype(DType::F64)?.to_vec2::<f64>()?;
                Ok((lw, obj, c, x))
            })
        })??;
        log_w.extend(lw);
        objective.extend(obj);
        cost.extend(c);
        samples.extend(x);
        done += n;
    }
    summarise(log_w, &objective, &cost, samples)
}

fn mean_se(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = if v.len() > 1 {
        v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)
    } else {
        0.0
    };
    (mean, (var / n).sqrt())
}

fn summarise(
    log_weights: Vec<f64>,
    objective: &[f64],
    cost: &[f64],
    samples: Vec<Vec<f64>>,
) -> Result<LogZEstimate> {
    let k = log_weights.len() as f64;
    let max = log_weights
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max);
    if !max.is_finite() {
        return Err(Error::NonFinite {
            what: "importance weights".into(),
            detail: format!("largest log-weight is {max}; check the target density"),
        });
    }
    // Normalised weights r_i = w_i / max w.
    let r: Vec<f64> = log_weights.iter().map(|l| (l - max).exp()).collect();
    let s1: f64 = r.iter().sum();
    let s2: f64 = r.iter().map(|x| x * x).sum();
    let log_z = max + (s1 / k).ln();
    let mean_r = s1 / k;
    let var_r = if k > 1.0 {
        r.iter().map(|x| (x - mean_r).powi(2)).sum::<f64>() / (k - 1.0)
    } else {
        0.0
    };
    let (free_energy, free_energy_se) = mean_se(objective);
    let (control_cost, _) = mean_se(cost);
    Ok(LogZEstimate {
        paths: log_weights.len(),
        log_z,
        log_z_se: (var_r / k).sqrt() / mean_r,
        free_energy,
        free_energy_se,
        control_cost,
        ess: s1 * s1 / s2,
        samples,
        log_weights,
    })
}
