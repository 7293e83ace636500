//! The sampler's terminal cost: the log-density ratio of the target to the reference.

use std::sync::Arc;

use candle_core::Tensor;

use crate::error::Result;
use crate::sampler::target::{log_normal_isotropic, LogDensity};
use crate::sde::terminal::TerminalCost;

/// The log-density ratio `g(x) = log ν(x) − log π̃(x)` of a target against the reference
/// `ν = N(0, σ² T I)`, the law of `X_T` under `dX = σ dW`, `X_0 = 0`.
///
/// With this terminal cost the free energy is `−log Z` at the optimal control, and
/// `J(u) ≥ −log Z` for every control (σ = T = 1 gives ν = γ, the standard Gaussian).
#[derive(Clone)]
pub struct LogDensityRatio {
    target: Arc<dyn LogDensity>,
    reference_var: f64,
}

impl std::fmt::Debug for LogDensityRatio {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("LogDensityRatio")
            .field("dim", &self.target.dim())
            .field("reference_var", &self.reference_var)
            .finish()
    }
}

impl LogDensityRatio {
    /// Against `ν = N(0, reference_var · I)`; use `σ² T`.
    ///
    /// # Errors
    /// [`crate::Error::InvalidConfig`] for a non-positive variance.
    pub fn new(target: Arc<dyn LogDensity>, reference_var: f64) -> Result<Self> {
        crate::error::check_positive("reference_var", reference_var)?;
        Ok(Self {
            target,
            reference_var,
        })
    }

    /// The target.
    pub fn target(&self) -> &Arc<dyn LogDensity> {
        &self.target
    }
}

impl TerminalCost for LogDensityRatio {
    fn cost(&self, x: &Tensor, _observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        log_normal_isotropic(x, self.reference_var)? - self.target.log_density(x)?
    }
}
