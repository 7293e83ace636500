//! The time grid, the scheme and the choice of kernel.

use candle_core::{DType, Device};
use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::sde::noise::BrownianIncrements;

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
    /// Keep every state `X_0 … X_N` in [`crate::Paths::path`] (costs memory; off by default).
    pub keep_path: bool,
    /// Which implementation integrates the paths (see [`Kernel`]).
    pub kernel: Kernel,
}

impl Default for SolverConfig {
    fn default() -> Self {
        Self {
            t_end: 1.0,
            n_steps: 50,
            scheme: Scheme::EulerMaruyama,
            keep_path: false,
            kernel: Kernel::Auto,
        }
    }
}

impl SolverConfig {
    /// Checks the configuration.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `n_steps` of 0 or above [`crate::limits::MAX_STEPS`], or a
    /// non-finite or non-positive `t_end`.
    pub fn validate(&self) -> Result<()> {
        check_positive("t_end", self.t_end)?;
        if self.n_steps == 0 {
            return Err(Error::config("n_steps", 0, "use at least 1 solver step"));
        }
        crate::util::limits::at_most(
            "n_steps",
            self.n_steps,
            crate::util::limits::MAX_STEPS,
            "solver steps",
        )
    }

    /// The step size `h = T/N`.
    pub fn step(&self) -> f64 {
        self.t_end / self.n_steps as f64
    }

    /// Draws fresh noise for this grid and scheme from `rng`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for zero sizes.
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

    /// As [`SolverConfig::sample_noise`], path `i` drawing from its own keyed generator
    /// (see `BrownianIncrements::sample_keyed`).
    pub(crate) fn sample_noise_keyed(
        &self,
        seed: u64,
        stream: u64,
        keys: &[u64],
        dim: usize,
        dtype: DType,
        dev: &Device,
    ) -> Result<BrownianIncrements> {
        BrownianIncrements::sample_keyed(
            seed,
            stream,
            keys,
            dim,
            self.n_steps,
            self.t_end,
            self.scheme.needs_area(),
            dtype,
            dev,
        )
    }
}

/// Which implementation [`crate::simulate`] uses.
///
/// The fused whole-path kernel runs the path as one operation with a hand-written backward
/// pass; it applies when every drift is a built-in network ([`crate::TimeMlp`], or the
/// tabular model's control), σ is fixed, the scheme is Euler–Maruyama, no path is kept, and
/// the tensors are f32 or f64 on the CPU. Its values and gradients equal those of the generic
/// autodiff path up to rounding.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Kernel {
    /// The fused kernel where it applies, the generic path elsewhere.
    #[default]
    Auto,
    /// Every step through candle's generic operations (useful to check a result).
    Generic,
    /// The fused kernel; an error says why where it cannot run.
    Fused,
}
