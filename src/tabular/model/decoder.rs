//! The observation mean map `m(z)` of the latent model.

use candle_core::{Module, Tensor};
use rand::RngCore;
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::nn::ops::{self, Activation};
use crate::nn::params::{Param, ParamBuilder};

/// Form of the decoder mean `m(z)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum DecoderKind {
    /// `m(z) = W z + b`.
    #[default]
    Linear,
    /// `m(z) = W z + b + MLP(z)`: a linear map plus a residual network (starting at zero).
    Mlp,
}

/// Decoder settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct DecoderConfig {
    /// Linear or residual MLP.
    pub kind: DecoderKind,
    /// Hidden units of the residual MLP.
    pub width: usize,
    /// Hidden layers of the residual MLP.
    pub depth: usize,
    /// Nonlinearity of the residual MLP.
    pub activation: Activation,
}

impl Default for DecoderConfig {
    fn default() -> Self {
        Self {
            kind: DecoderKind::Linear,
            width: 64,
            depth: 2,
            activation: Activation::Silu,
        }
    }
}

impl DecoderConfig {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a zero width or depth of an MLP decoder.
    pub fn validate(&self) -> Result<()> {
        if self.kind == DecoderKind::Mlp && (self.width == 0 || self.depth == 0) {
            return Err(Error::config(
                "decoder",
                format!("width {} depth {}", self.width, self.depth),
                "an MLP decoder needs width and depth of at least 1",
            ));
        }
        use crate::util::limits::{at_most, MAX_DEPTH, MAX_WIDTH};
        at_most("decoder.width", self.width, MAX_WIDTH, "hidden units")?;
        at_most("decoder.depth", self.depth, MAX_DEPTH, "hidden layers")
    }

    /// Number of parameters of the decoder's mean map from `latent_dim` to `data_dim`
    /// (`None` if it overflows).
    pub(crate) fn parameter_count(&self, latent_dim: usize, data_dim: usize) -> Option<u64> {
        let (d, dd, w) = (latent_dim as u64, data_dim as u64, self.width as u64);
        let mut n = dd.checked_mul(d)?.checked_add(dd)?;
        if self.kind == DecoderKind::Mlp {
            let mut fan_in = d;
            for _ in 0..self.depth {
                n = n.checked_add(w.checked_mul(fan_in)?.checked_add(w)?)?;
                fan_in = w;
            }
            n = n.checked_add(dd.checked_mul(w)?.checked_add(dd)?)?;
        }
        Some(n)
    }
}

/// The decoder mean map, a candle [`Module`] from `(batch, d)` to `(batch, D)`.
#[derive(Debug, Clone)]
pub struct Decoder {
    weight: Param,
    bias: Param,
    hidden: Vec<(Param, Param)>,
    out: Option<(Param, Param)>,
    activation: Activation,
}

impl Decoder {
    /// Builds (or reuses) the parameters `linear.weight` `(D, d)`, `linear.bias`, and for an
    /// MLP decoder `layer{i}.weight`/`.bias` and `out.weight`/`.bias` (zero at start).
    ///
    /// # Errors
    /// [`Error::Shape`] if existing parameters have other shapes.
    pub fn new(
        cfg: &DecoderConfig,
        latent_dim: usize,
        data_dim: usize,
        pb: &ParamBuilder,
        rng: &mut dyn RngCore,
    ) -> Result<Self> {
        cfg.validate()?;
        let lin = pb.pp("linear");
        let bound = 1.0 / (latent_dim as f64).sqrt();
        let weight = lin.uniform(&[data_dim, latent_dim], "weight", bound, rng)?;
        let bias = lin.zeros(&[data_dim], "bias")?;
        let mut hidden = Vec::new();
        let mut out = None;
        if cfg.kind == DecoderKind::Mlp {
            let mut fan_in = latent_dim;
            for i in 0..cfg.depth {
                let li = pb.pp(&format!("layer{i}"));
                let b = 1.0 / (fan_in as f64).sqrt();
                hidden.push((
                    li.uniform(&[cfg.width, fan_in], "weight", b, rng)?,
                    li.uniform(&[cfg.width], "bias", b, rng)?,
                ));
                fan_in = cfg.width;
            }
            let lo = pb.pp("out");
            out = Some((
                lo.zeros(&[data_dim, cfg.width], "weight")?,
                lo.zeros(&[data_dim], "bias")?,
            ));
        }
        Ok(Self {
            weight,
            bias,
            hidden,
            out,
            activation: cfg.activation,
        })
    }

    /// The linear part's weight `(D, d)`.
    pub fn linear_weight(&self) -> &Tensor {
        &self.weight
    }

    /// The bias `b` of the linear part.
    pub fn linear_bias(&self) -> &Tensor {
        &self.bias
    }

    /// The linear part `W z + b`.
    pub fn linear_mean(&self, z: &Tensor) -> candle_core::Result<Tensor> {
        ops::linear(z, &self.weight, Some(&self.bias))
    }
}

impl Module for Decoder {
    fn forward(&self, z: &Tensor) -> candle_core::Result<Tensor> {
        let lin = ops::linear(z, &self.weight, Some(&self.bias))?;
        match &self.out {
            None => Ok(lin),
            Some((wo, bo)) => {
                let mut h = z.clone();
                for (w, b) in &self.hidden {
                    h = ops::dense(&h, w, b, self.activation)?;
                }
                lin + ops::linear(&h, wo, Some(bo))?
            }
        }
    }
}
