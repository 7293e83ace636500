//! The [`Drift`] trait and the form in which the fused kernel runs a built-in drift.

use candle_core::Tensor;

use crate::nn::ops::Activation;

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

    /// Crate-internal: how the fused kernel runs a built-in network. Neither the token nor
    /// the form can be built outside the crate, so a user's drift keeps this default and
    /// runs on candle's generic autodiff.
    #[doc(hidden)]
    fn fused_form(&self, _token: Sealed) -> Option<FusedForm<'_>> {
        None
    }
}

/// The proof, passed to [`Drift::fused_form`], that the caller is this crate.
#[derive(Debug, Clone, Copy)]
pub struct Sealed(pub(crate) ());

/// A drift in the form the fused whole-path kernel runs: a built-in [`super::TimeMlp`],
/// optionally plus a linear feedback term `G(t) ⊙ (C − x A)` (the tabular model's score
/// term). Only the crate creates and reads these.
pub struct FusedForm<'a> {
    pub(crate) network: NetworkParts,
    pub(crate) feedback: Option<&'a dyn LinearFeedback>,
}

/// The layers of a built-in network: its shape and its parameter tensors in the order the
/// fused kernel packs them (first-layer weight, context weight if any, first-layer bias,
/// time weight, then weight and bias of each further hidden layer and of the output layer).
#[derive(Debug, Clone)]
pub(crate) struct NetworkParts {
    pub dim: usize,
    pub context_dim: usize,
    pub width: usize,
    pub depth: usize,
    pub activation: Activation,
    pub params: Vec<Tensor>,
}

impl std::fmt::Debug for FusedForm<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FusedForm")
            .field("network", &self.network)
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
    fn fused_form(&self, token: Sealed) -> Option<FusedForm<'_>> {
        (**self).fused_form(token)
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
    fn fused_form(&self, token: Sealed) -> Option<FusedForm<'_>> {
        (**self).fused_form(token)
    }
}
