//! One gradient step, the same for every trainer: build the loss, backpropagate, clip, update.

use candle_core::Tensor;

use crate::error::Result;
use crate::nn::optim::{AdamW, StepStats};
use crate::util::stack::run_deep;

/// Builds a scalar loss with `forward` (which also returns whatever the caller wants to keep,
/// such as the loss's parts), backpropagates it and takes one AdamW step at learning rate
/// `lr`, with the gradient clipped to norm `max_grad_norm`. The graph is built,
/// differentiated and dropped on a deep-stack thread (candle's backward pass recurses once
/// per node of the path).
///
/// # Errors
/// Whatever `forward` returns; [`crate::Error::NonFinite`] (and no update) when the gradient
/// is not finite.
pub(crate) fn gradient_step<V: Send>(
    optimizer: &mut AdamW,
    lr: f64,
    max_grad_norm: Option<f64>,
    forward: impl FnOnce() -> Result<(Tensor, V)> + Send,
) -> Result<(V, StepStats)> {
    optimizer.set_learning_rate(lr);
    run_deep(move || -> Result<(V, StepStats)> {
        let (loss, kept) = forward()?;
        let grads = loss.backward()?;
        let stats = optimizer.step(&grads, max_grad_norm)?;
        Ok((kept, stats))
    })?
}
