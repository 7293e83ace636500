//! An additive-noise SDE and the paths simulated from it.

use candle_core::Tensor;

use crate::sde::diffusion::Diffusion;
use crate::sde::drift::Drift;

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

/// The result of [`crate::simulate`]: end points and per-path sums, all still differentiable.
#[derive(Debug, Clone)]
pub struct Paths {
    /// `X_N`, shape `(batch, d)`.
    pub end: Tensor,
    /// `X_0 … X_N` when [`crate::SolverConfig::keep_path`] is set.
    pub path: Option<Vec<Tensor>>,
    /// Control cost `½ Σ_k |u_k/σ|² h` per path, shape `(batch,)`.
    pub control_cost: Tensor,
    /// Girsanov log-weight `log dP/dQ = −Σ_k (u_k/σ)·ΔW_k − ½ Σ_k |u_k/σ|² h` per path,
    /// shape `(batch,)` (see the module docs for the convention).
    pub log_weight: Tensor,
}
