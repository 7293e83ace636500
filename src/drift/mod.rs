//! Drift (and control) networks: the [`Drift`] trait and ready-made implementations.
//!
//! A drift maps a batch of states `x` of shape `(batch, d)`, a time `t` and an optional
//! per-path context (for instance the observed row that an amortised control conditions on)
//! to a tensor of shape `(batch, d)`. The same trait serves the prior drift `b` and the
//! control `u` of the solver.

mod adapters;
mod mlp;

pub use adapters::{FnDrift, ModuleDrift};
pub use mlp::{MlpConfig, TimeMlp};

use candle_core::Tensor;

/// A drift or control function `f(x, t[, context])` evaluated on a batch.
///
/// Implement this to plug your own architecture into the solver; parameters should be
/// `Var`s of a candle `VarMap` (for instance created through [`crate::ParamBuilder`]) so that
/// gradients reach them. The trait is object safe.
///
/// # Example
/// ```
/// use candle_core::{Device, Tensor};
/// use neural_sde::Drift;
///
/// /// The Ornstein–Uhlenbeck drift −θx.
/// struct Linear { theta: f64, dim: usize }
/// impl Drift for Linear {
///     fn dim(&self) -> usize { self.dim }
///     fn forward(&self, x: &Tensor, _t: f64, _ctx: Option<&Tensor>) -> candle_core::Result<Tensor> {
///         x.affine(-self.theta, 0.0)
///     }
/// }
/// let d = Linear { theta: 2.0, dim: 1 };
/// let x = Tensor::new(&[[1.0f64], [0.5]], &Device::Cpu)?;
/// assert_eq!(d.forward(&x, 0.0, None)?.to_vec2::<f64>()?, vec![vec![-2.0], vec![-1.0]]);
/// # Ok::<(), candle_core::Error>(())
/// ```
pub trait Drift: Send + Sync {
    /// Dimension `d` of the state (and of the output).
    fn dim(&self) -> usize;

    /// Evaluates the drift on `x` of shape `(batch, d)` at time `t`; returns `(batch, d)`.
    ///
    /// `context`, when given, has shape `(batch, c)`: one row of conditioning data per path.
    fn forward(&self, x: &Tensor, t: f64, context: Option<&Tensor>) -> candle_core::Result<Tensor>;

    /// Dimension of the context this drift expects (0 when it takes none).
    fn context_dim(&self) -> usize {
        0
    }

    /// A copy whose parameters carry no autodiff history, used for inference (evaluation,
    /// generation) so that no graph is built. `None` (the default) means the drift itself is
    /// used, which works but records a graph.
    fn detached(&self) -> Option<Box<dyn Drift>> {
        None
    }

    /// The built-in network behind this drift, if it is one. The solver then runs the whole
    /// path through a fused kernel with a hand-written backward pass (see
    /// [`crate::SolverConfig::fused_networks`]). Custom drifts keep the default `None` and go
    /// through candle's generic autodiff.
    fn as_time_mlp(&self) -> Option<&TimeMlp> {
        None
    }
}

impl<D: Drift + ?Sized> Drift for Box<D> {
    fn dim(&self) -> usize {
        (**self).dim()
    }
    fn forward(&self, x: &Tensor, t: f64, context: Option<&Tensor>) -> candle_core::Result<Tensor> {
        (**self).forward(x, t, context)
    }
    fn context_dim(&self) -> usize {
        (**self).context_dim()
    }
    fn detached(&self) -> Option<Box<dyn Drift>> {
        (**self).detached()
    }
    fn as_time_mlp(&self) -> Option<&TimeMlp> {
        (**self).as_time_mlp()
    }
}

impl<D: Drift + ?Sized> Drift for std::sync::Arc<D> {
    fn dim(&self) -> usize {
        (**self).dim()
    }
    fn forward(&self, x: &Tensor, t: f64, context: Option<&Tensor>) -> candle_core::Result<Tensor> {
        (**self).forward(x, t, context)
    }
    fn context_dim(&self) -> usize {
        (**self).context_dim()
    }
    fn detached(&self) -> Option<Box<dyn Drift>> {
        (**self).detached()
    }
    fn as_time_mlp(&self) -> Option<&TimeMlp> {
        (**self).as_time_mlp()
    }
}
