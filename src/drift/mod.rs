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

    /// How the solver's fused kernel can run this drift (see
    /// [`crate::SolverConfig::fused_networks`]): only the crate's built-in drifts return one
    /// (a [`FusedForm`] cannot be built outside the crate). Custom drifts keep the default
    /// `None` and go through candle's generic autodiff.
    fn fused_form(&self) -> Option<FusedForm<'_>> {
        None
    }
}

/// A drift in the form the fused whole-path kernel runs: a built-in [`TimeMlp`], optionally
/// plus a linear feedback term `G(t) ⊙ (C − x A)` (the tabular model's score term). Returned by
/// [`Drift::fused_form`]; only the crate creates these.
#[derive(Clone, Copy)]
pub struct FusedForm<'a> {
    pub(crate) network: &'a TimeMlp,
    pub(crate) feedback: Option<&'a dyn LinearFeedback>,
}

impl std::fmt::Debug for FusedForm<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FusedForm")
            .field("network", self.network)
            .field("feedback", &self.feedback.is_some())
            .finish()
    }
}

/// The feedback term `G(t_k) ⊙ (C − x A)` added to a network's output, as tensors that
/// keep their autodiff history.
pub(crate) trait LinearFeedback: Send + Sync {
    /// `(C, A, G)` for the context rows `context` `(batch, c)` and the step times `times`:
    /// `C` `(batch, d)`, `A` `(d, d)` and `G` `(times.len(), d)`.
    fn terms(
        &self,
        context: &Tensor,
        times: &[f64],
    ) -> candle_core::Result<(Tensor, Tensor, Tensor)>;
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
    fn fused_form(&self) -> Option<FusedForm<'_>> {
        (**self).fused_form()
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
    fn fused_form(&self) -> Option<FusedForm<'_>> {
        (**self).fused_form()
    }
}
