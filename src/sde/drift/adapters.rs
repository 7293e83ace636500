//! Wrapping closures and candle modules as drifts.

use candle_core::{Module, Tensor};

use super::base::Drift;

/// A drift from a closure `Fn(x, t, context) -> Tensor`.
///
/// # Example
/// ```
/// use neural_sde::{Drift, FnDrift};
/// let ou = FnDrift::new(2, |x, _t, _ctx| x.affine(-1.0, 0.0));
/// assert_eq!(ou.dim(), 2);
/// ```
pub struct FnDrift<F> {
    dim: usize,
    context_dim: usize,
    f: F,
}

impl<F> FnDrift<F>
where
    F: Fn(&Tensor, f64, Option<&Tensor>) -> candle_core::Result<Tensor> + Send + Sync,
{
    /// Wraps `f` as a drift on states of dimension `dim` without context.
    pub fn new(dim: usize, f: F) -> Self {
        Self {
            dim,
            context_dim: 0,
            f,
        }
    }

    /// Declares that `f` reads a context of dimension `context_dim`.
    pub fn with_context_dim(mut self, context_dim: usize) -> Self {
        self.context_dim = context_dim;
        self
    }
}

impl<F> std::fmt::Debug for FnDrift<F> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FnDrift").field("dim", &self.dim).finish()
    }
}

impl<F> Drift for FnDrift<F>
where
    F: Fn(&Tensor, f64, Option<&Tensor>) -> candle_core::Result<Tensor> + Send + Sync,
{
    fn dim(&self) -> usize {
        self.dim
    }
    fn forward(&self, x: &Tensor, t: f64, context: Option<&Tensor>) -> candle_core::Result<Tensor> {
        (self.f)(x, t, context)
    }
    fn context_dim(&self) -> usize {
        self.context_dim
    }
}

/// A drift from any candle [`Module`] applied to the concatenation `[x, t, context]`.
///
/// The module must map `(batch, d + 1 + c)` to `(batch, d)`.
#[derive(Debug)]
pub struct ModuleDrift<M> {
    module: M,
    dim: usize,
    context_dim: usize,
}

impl<M: Module + Send + Sync> ModuleDrift<M> {
    /// Wraps `module` for states of dimension `dim` and contexts of dimension `context_dim`.
    pub fn new(module: M, dim: usize, context_dim: usize) -> Self {
        Self {
            module,
            dim,
            context_dim,
        }
    }
}

impl<M: Module + Send + Sync> Drift for ModuleDrift<M> {
    fn dim(&self) -> usize {
        self.dim
    }
    fn forward(&self, x: &Tensor, t: f64, context: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let batch = x.dim(0)?;
        let tt = Tensor::full(t, (batch, 1), x.device())?.to_dtype(x.dtype())?;
        let input = match context {
            Some(c) => Tensor::cat(&[x, &tt, c], 1)?,
            None => Tensor::cat(&[x, &tt], 1)?,
        };
        self.module.forward(&input)
    }
    fn context_dim(&self) -> usize {
        self.context_dim
    }
}
