//! Terminal costs `g(X_T)`: the second half of the free-energy objective.

use std::sync::Arc;

use candle_core::{Module, Tensor};

use crate::error::{Error, Result};
use crate::nn::params::{Param, ParamBuilder};

/// A terminal cost `g(x[, y])` per path.
///
/// `x` is the end point `X_T` of shape `(batch, d)`; `observation`, when the cost needs one,
/// is the observed row of each path, shape `(batch, D)`. Returns shape `(batch,)`.
pub trait TerminalCost: Send + Sync {
    /// Evaluates the cost, differentiably.
    fn cost(&self, x: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor>;
}

impl<T: TerminalCost + ?Sized> TerminalCost for Arc<T> {
    fn cost(&self, x: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        (**self).cost(x, observation)
    }
}

impl<T: TerminalCost + ?Sized> TerminalCost for Box<T> {
    fn cost(&self, x: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        (**self).cost(x, observation)
    }
}

type MeanMap = Arc<dyn Module + Send + Sync>;

fn need_observation<'a>(obs: Option<&'a Tensor>, who: &str) -> candle_core::Result<&'a Tensor> {
    obs.ok_or_else(|| {
        candle_core::Error::Msg(format!(
            "{who} needs an observation per path; pass the observed rows"
        ))
    })
}

fn apply_mean_map(map: &Option<MeanMap>, x: &Tensor) -> candle_core::Result<Tensor> {
    match map {
        Some(m) => m.forward(x),
        None => Ok(x.clone()),
    }
}

/// Gaussian negative log-likelihood `−log N(y; m(x), diag s²)` with a fixed or learned
/// per-dimension scale `s`; the mean map `m` defaults to the identity.
#[derive(Clone)]
pub struct GaussianNll {
    log_scale: Param,
    mean_map: Option<MeanMap>,
}

impl std::fmt::Debug for GaussianNll {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("GaussianNll")
            .field("dims", &self.log_scale.dims())
            .field("mean_map", &self.mean_map.is_some())
            .finish()
    }
}

impl GaussianNll {
    /// A fixed scale, one value per observed dimension.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a non-positive or non-finite scale.
    pub fn fixed(
        scale: &[f64],
        dtype: candle_core::DType,
        dev: &candle_core::Device,
    ) -> Result<Self> {
        for &s in scale {
            crate::error::check_positive("scale", s)?;
        }
        if scale.is_empty() {
            return Err(Error::config(
                "scale",
                "[]",
                "give one scale per observed dimension",
            ));
        }
        let logs: Vec<f64> = scale.iter().map(|s| s.ln()).collect();
        let n = logs.len();
        Ok(Self {
            log_scale: Param::new(Tensor::from_vec(logs, n, dev)?.to_dtype(dtype)?),
            mean_map: None,
        })
    }

    /// A learned scale stored as `log_scale` under `pb`, initialised at `init`.
    ///
    /// # Errors
    /// As [`GaussianNll::fixed`]; [`Error::Shape`] if `log_scale` exists with another shape.
    pub fn learned(pb: &ParamBuilder, init: &[f64]) -> Result<Self> {
        for &s in init {
            crate::error::check_positive("scale", s)?;
        }
        let logs: Vec<f64> = init.iter().map(|s| s.ln()).collect();
        Ok(Self {
            log_scale: pb.get_or_init(&[init.len()], "log_scale", |_| logs)?,
            mean_map: None,
        })
    }

    /// Uses `m(x)` as the mean instead of `x` (for instance a decoder network).
    pub fn with_mean_map(mut self, mean_map: Arc<dyn Module + Send + Sync>) -> Self {
        self.mean_map = Some(mean_map);
        self
    }

    /// The per-dimension log scale (differentiable when learned).
    pub fn log_scale(&self) -> &Tensor {
        &self.log_scale
    }

    /// The mean `m(x)`.
    ///
    /// # Errors
    /// Whatever the mean map raises.
    pub fn mean(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        apply_mean_map(&self.mean_map, x)
    }

    /// Per-path, per-dimension negative log-likelihood, shape `(batch, D)`.
    ///
    /// # Errors
    /// Shape mismatches between the mean and `y`.
    pub fn nll_per_dim(&self, x: &Tensor, y: &Tensor) -> candle_core::Result<Tensor> {
        let mu = self.mean(x)?;
        let ls = self.log_scale.to_dtype(x.dtype())?.unsqueeze(0)?;
        let z = (y - mu)?.broadcast_mul(&ls.neg()?.exp()?)?;
        let half_log_2pi = 0.5 * (2.0 * std::f64::consts::PI).ln();
        z.sqr()?.affine(0.5, half_log_2pi)?.broadcast_add(&ls)
    }
}

impl TerminalCost for GaussianNll {
    fn cost(&self, x: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let y = need_observation(observation, "GaussianNll")?;
        self.nll_per_dim(x, y)?.sum(1)
    }
}

/// Bernoulli negative log-likelihood on logits, `softplus(l) − y·l` summed over dimensions,
/// with logits `l = m(x)` (identity by default) and observations `y ∈ {0, 1}`.
#[derive(Clone, Default)]
pub struct BernoulliNll {
    mean_map: Option<MeanMap>,
}

impl std::fmt::Debug for BernoulliNll {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("BernoulliNll")
            .field("mean_map", &self.mean_map.is_some())
            .finish()
    }
}

impl BernoulliNll {
    /// Logits are the state itself.
    pub fn new() -> Self {
        Self::default()
    }

    /// Logits are `m(x)`.
    pub fn with_logit_map(mut self, map: Arc<dyn Module + Send + Sync>) -> Self {
        self.mean_map = Some(map);
        self
    }
}

impl TerminalCost for BernoulliNll {
    fn cost(&self, x: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let y = need_observation(observation, "BernoulliNll")?;
        let l = apply_mean_map(&self.mean_map, x)?;
        // softplus(l) = max(l, 0) + log(1 + exp(−|l|)), stable for large |l|.
        let sp = (l.relu()? + (l.abs()?.neg()?.exp()? + 1.0)?.log()?)?;
        (sp - (y * l)?)?.sum(1)
    }
}
