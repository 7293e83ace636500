//! The differentiable fixed-grid solver for additive-noise SDEs.
//!
//! It integrates `dX = (b(X,t) + u(X,t[,c])) dt + σ dW` on `[0, T]` from `X_0 = x0` on the
//! grid `t_k = k h`, `h = T/N`, for a batch of paths, with ordinary candle ops so that the
//! autodiff graph reaches every parameter of `b`, `u` and σ (the pathwise, reparameterised
//! gradient).
//!
//! # Control cost and Girsanov log-weight
//!
//! Along each path the solver accumulates, with `v_k = u(X_k, t_k)/σ` (per dimension),
//!
//! * the **control cost** `C = ½ Σ_k |v_k|² h`, whose expectation under the controlled law
//!   is the KL divergence between the controlled and the uncontrolled (`u = 0`) path laws;
//! * the **Girsanov log-weight** `log w = −Σ_k v_k·ΔW_k − C`, with `ΔW_k` the increment that
//!   generated the step.
//!
//! With Euler–Maruyama, `log w` is exactly `log dP/dQ` of the discretised paths: the
//! log-ratio of the uncontrolled transition densities `N(x_k + h b_k, σ²h)` to the controlled
//! ones `N(x_k + h(b_k + u_k), σ²h)`. Hence `E_Q[w] = 1` and `E_Q[w F(X)] = E_P[F(X)]` for
//! every N (an importance weight that turns controlled paths into uncontrolled ones).
//! With [`Scheme::Sra1`] the cost uses the scheme's own stage weights and the stochastic sum
//! uses the left-point control: a consistent approximation, not an exact density ratio, so
//! importance-sampling estimators in this crate use Euler–Maruyama.

mod step;

use candle_core::{DType, Device, Tensor};
use serde::{Deserialize, Serialize};

use crate::diffusion::Diffusion;
use crate::drift::Drift;
use crate::error::{check_positive, Error, Result};
use crate::noise::BrownianIncrements;

/// Time-stepping scheme.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Scheme {
    /// Euler–Maruyama: `X_{k+1} = X_k + h (b+u)(X_k, t_k) + σ ΔW_k`. Strong order 1 for
    /// additive noise (Kloeden & Platen 1992, §10.2–10.3).
    #[default]
    EulerMaruyama,
    /// Rößler's SRA1 stochastic Runge–Kutta scheme for additive noise, strong order 1.5
    /// (A. Rößler, *Runge–Kutta methods for the strong approximation of solutions of
    /// stochastic differential equations*, SIAM J. Numer. Anal. 48(3):922–952, 2010). Two
    /// drift evaluations per step; needs the `ΔZ` integrals in the noise.
    Sra1,
}

impl Scheme {
    /// Whether the scheme needs `ΔZ` in its noise.
    pub fn needs_area(self) -> bool {
        matches!(self, Scheme::Sra1)
    }
}

/// The time grid and scheme.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct SolverConfig {
    /// Final time `T` (> 0).
    pub t_end: f64,
    /// Number of steps `N` (≥ 1); the step is `h = T/N`.
    pub n_steps: usize,
    /// Time-stepping scheme.
    pub scheme: Scheme,
    /// Keep every state `X_0 … X_N` in [`Paths::path`] (costs memory; off by default).
    pub keep_path: bool,
    /// Run built-in networks ([`crate::TimeMlp`]) through the fused whole-path kernel with
    /// its hand-written backward pass (on by default). It applies with Euler–Maruyama, a
    /// fixed σ and no kept path, on the CPU in f32 or f64; values and gradients equal those of
    /// the generic autodiff path up to rounding. Off, every step goes through candle's
    /// generic ops (useful to check a result).
    pub fused_networks: bool,
}

impl Default for SolverConfig {
    fn default() -> Self {
        Self {
            t_end: 1.0,
            n_steps: 50,
            scheme: Scheme::EulerMaruyama,
            keep_path: false,
            fused_networks: true,
        }
    }
}

impl SolverConfig {
    /// Checks the configuration.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `n_steps == 0` or a non-finite or non-positive `t_end`.
    pub fn validate(&self) -> Result<()> {
        check_positive("t_end", self.t_end)?;
        if self.n_steps == 0 {
            return Err(Error::config("n_steps", 0, "use at least 1 solver step"));
        }
        Ok(())
    }

    /// The step size `h = T/N`.
    pub fn step(&self) -> f64 {
        self.t_end / self.n_steps as f64
    }

    /// Draws fresh noise for this grid and scheme from `rng`.
    ///
    /// # Errors
    /// As [`BrownianIncrements::sample`].
    pub fn sample_noise(
        &self,
        rng: &mut dyn rand::RngCore,
        batch: usize,
        dim: usize,
        dtype: DType,
        dev: &Device,
    ) -> Result<BrownianIncrements> {
        BrownianIncrements::sample(
            rng,
            batch,
            dim,
            self.n_steps,
            self.t_end,
            self.scheme.needs_area(),
            dtype,
            dev,
        )
    }
}

/// An additive-noise SDE: optional prior drift `b`, optional control `u`, and σ.
#[derive(Clone, Copy)]
pub struct Sde<'a> {
    prior: Option<&'a dyn Drift>,
    control: Option<&'a dyn Drift>,
    diffusion: &'a Diffusion,
}

impl std::fmt::Debug for Sde<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Sde")
            .field("prior", &self.prior.is_some())
            .field("control", &self.control.is_some())
            .field("diffusion", self.diffusion)
            .finish()
    }
}

impl<'a> Sde<'a> {
    /// `dX = σ dW` (no drift, no control).
    pub fn new(diffusion: &'a Diffusion) -> Self {
        Self {
            prior: None,
            control: None,
            diffusion,
        }
    }

    /// Sets the prior drift `b(x, t)` (it never sees the context).
    pub fn with_prior(mut self, prior: &'a dyn Drift) -> Self {
        self.prior = Some(prior);
        self
    }

    /// Sets the control `u(x, t[, c])`.
    pub fn with_control(mut self, control: &'a dyn Drift) -> Self {
        self.control = Some(control);
        self
    }

    /// The prior drift, if any.
    pub fn prior(&self) -> Option<&'a dyn Drift> {
        self.prior
    }

    /// The control, if any.
    pub fn control(&self) -> Option<&'a dyn Drift> {
        self.control
    }

    /// The diffusion coefficient.
    pub fn diffusion(&self) -> &'a Diffusion {
        self.diffusion
    }
}

/// The result of [`simulate`]: end points and per-path sums, all still differentiable.
#[derive(Debug, Clone)]
pub struct Paths {
    /// `X_N`, shape `(batch, d)`.
    pub end: Tensor,
    /// `X_0 … X_N` when [`SolverConfig::keep_path`] is set.
    pub path: Option<Vec<Tensor>>,
    /// Control cost `½ Σ_k |u_k/σ|² h` per path, shape `(batch,)`.
    pub control_cost: Tensor,
    /// Girsanov log-weight `log dP/dQ = −Σ_k (u_k/σ)·ΔW_k − ½ Σ_k |u_k/σ|² h` per path,
    /// shape `(batch,)` (see the module docs for the convention).
    pub log_weight: Tensor,
}

/// Integrates `sde` from `x0` (shape `(batch, d)`) with the given noise, keeping the graph.
///
/// `context` (shape `(batch, c)`) is passed to the control only.
///
/// # Errors
/// [`Error::Shape`] when the noise, `x0`, the context or a drift's output disagree in shape;
/// [`Error::InvalidConfig`] for a bad config, a noise grid that differs from the config, or
/// SRA1 without `ΔZ`; [`Error::Candle`] for errors raised by a drift.
///
/// # Example
/// ```
/// use candle_core::{DType, Device, Tensor};
/// use neural_sde::{generator, simulate, Diffusion, FnDrift, Sde, SolverConfig};
///
/// let dev = Device::Cpu;
/// let cfg = SolverConfig { n_steps: 20, ..Default::default() };
/// let sigma = Diffusion::constant(1.0)?;
/// let control = FnDrift::new(2, |x, _t, _c| x.affine(0.0, 0.5)); // u = 0.5
/// let sde = Sde::new(&sigma).with_control(&control);
/// let noise = cfg.sample_noise(&mut generator(1, 0), 1000, 2, DType::F64, &dev)?;
/// let x0 = Tensor::zeros((1000, 2), DType::F64, &dev)?;
/// let paths = neural_sde::simulate(&sde, &cfg, &x0, &noise, None)?;
/// // The control cost of a constant u is ½ |u|² T per path.
/// let cost = paths.control_cost.mean_all()?.to_scalar::<f64>()?;
/// assert!((cost - 0.25).abs() < 1e-12);
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub fn simulate(
    sde: &Sde<'_>,
    cfg: &SolverConfig,
    x0: &Tensor,
    noise: &BrownianIncrements,
    context: Option<&Tensor>,
) -> Result<Paths> {
    cfg.validate()?;
    let (batch, dim) = x0
        .dims2()
        .map_err(|_| Error::shape("x0", "(batch, d)", x0.dims()))?;
    check_inputs(sde, cfg, batch, dim, noise, context)?;
    if let Some(paths) = crate::fused::try_simulate(sde, cfg, x0, noise, context)? {
        return Ok(paths);
    }
    let sigma = sde.diffusion.resolve(dim, x0.dtype(), x0.device())?;
    let mut st = step::State::new(x0.clone(), cfg.keep_path);
    let h = cfg.step();
    for k in 0..cfg.n_steps {
        let t = k as f64 * h;
        let dw = &noise.dw()[k];
        match cfg.scheme {
            Scheme::EulerMaruyama => step::euler_maruyama(&mut st, sde, &sigma, t, h, dw, context)?,
            Scheme::Sra1 => {
                let dz = noise
                    .dz()
                    .ok_or_else(|| {
                        Error::config(
                            "scheme",
                            "sra1",
                            "SRA1 needs noise drawn with ΔZ (with_area = true)",
                        )
                    })?
                    .get(k)
                    .ok_or_else(|| Error::shape("number of ΔZ increments", cfg.n_steps, k))?;
                step::sra1(&mut st, sde, &sigma, t, h, dw, dz, context)?
            }
        }
    }
    st.finish(batch, h)
}

fn check_inputs(
    sde: &Sde<'_>,
    cfg: &SolverConfig,
    batch: usize,
    dim: usize,
    noise: &BrownianIncrements,
    context: Option<&Tensor>,
) -> Result<()> {
    if noise.shape() != (batch, dim) {
        return Err(Error::shape(
            "noise vs x0 (batch, d)",
            (batch, dim),
            noise.shape(),
        ));
    }
    if noise.n_steps() != cfg.n_steps {
        return Err(Error::config(
            "n_steps",
            cfg.n_steps,
            format!(
                "the noise has {} steps; draw it with the same config",
                noise.n_steps()
            ),
        ));
    }
    let h = cfg.step();
    if (noise.step() - h).abs() > 1e-12 * h.max(1.0) {
        return Err(Error::config(
            "t_end",
            cfg.t_end,
            format!(
                "the noise was drawn with step {} but the grid step is {h}",
                noise.step()
            ),
        ));
    }
    for (name, d) in [("prior drift", sde.prior), ("control", sde.control)] {
        if let Some(d) = d {
            if d.dim() != dim {
                return Err(Error::shape(
                    format!("{name} dimension vs state"),
                    dim,
                    d.dim(),
                ));
            }
        }
    }
    if let Some(u) = sde.control {
        match context {
            Some(c) => {
                let want = (batch, u.context_dim());
                if c.dims2().ok() != Some(want) {
                    return Err(Error::shape("context (batch, context_dim)", want, c.dims()));
                }
            }
            None if u.context_dim() > 0 => {
                return Err(Error::shape(
                    "context (batch, context_dim): the control needs a context",
                    (batch, u.context_dim()),
                    "none",
                ))
            }
            None => {}
        }
    }
    Ok(())
}
