//! The noise scale σ of the additive-noise SDE `dX = (b + u) dt + σ dW`.

use candle_core::{DType, Tensor};

use crate::error::{check_positive, Error, Result};
use crate::nn::params::{Param, ParamBuilder};

/// The diffusion coefficient σ: a constant, one constant per dimension, or learnable.
///
/// A learnable σ is stored as `log σ` (one value per dimension) in the `VarMap` under the
/// name `log_sigma` of the given builder, which keeps σ positive.
#[derive(Clone)]
pub struct Diffusion {
    kind: Kind,
}

#[derive(Clone)]
enum Kind {
    Constant(f64),
    PerDim(Vec<f64>),
    Learned(Param),
}

impl std::fmt::Debug for Diffusion {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match &self.kind {
            Kind::Constant(s) => write!(f, "Diffusion::Constant({s})"),
            Kind::PerDim(v) => write!(f, "Diffusion::PerDim({v:?})"),
            Kind::Learned(t) => write!(f, "Diffusion::Learned({:?})", t.dims()),
        }
    }
}

impl Diffusion {
    /// The same σ in every dimension.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] if `sigma` is not finite and positive.
    pub fn constant(sigma: f64) -> Result<Self> {
        check_positive("sigma", sigma)?;
        Ok(Self {
            kind: Kind::Constant(sigma),
        })
    }

    /// One σ per dimension.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] if any value is not finite and positive, or the list is empty.
    pub fn per_dim(sigma: &[f64]) -> Result<Self> {
        if sigma.is_empty() {
            return Err(Error::config("sigma", "[]", "give one value per dimension"));
        }
        for &s in sigma {
            check_positive("sigma", s)?;
        }
        Ok(Self {
            kind: Kind::PerDim(sigma.to_vec()),
        })
    }

    /// A learnable σ, one value per dimension, initialised at `init`.
    ///
    /// # Errors
    /// As [`Diffusion::per_dim`]; [`Error::Shape`] if `log_sigma` exists with another shape.
    pub fn learned(pb: &ParamBuilder, init: &[f64]) -> Result<Self> {
        Self::per_dim(init)?;
        let logs: Vec<f64> = init.iter().map(|s| s.ln()).collect();
        let t = pb.get_or_init(&[1, init.len()], "log_sigma", |_| logs)?;
        Ok(Self {
            kind: Kind::Learned(t),
        })
    }

    /// Whether σ has trainable parameters.
    pub fn is_learned(&self) -> bool {
        matches!(self.kind, Kind::Learned(_))
    }

    /// The current σ per dimension, for a state of dimension `dim`.
    ///
    /// # Errors
    /// [`Error::Shape`] if σ was given for another number of dimensions.
    pub fn values(&self, dim: usize) -> Result<Vec<f64>> {
        let v = match &self.kind {
            Kind::Constant(s) => vec![*s; dim],
            Kind::PerDim(v) => v.clone(),
            Kind::Learned(t) => t
                .to_dtype(DType::F64)?
                .flatten_all()?
                .to_vec1::<f64>()?
                .into_iter()
                .map(f64::exp)
                .collect(),
        };
        if v.len() != dim {
            return Err(Error::shape(
                "sigma (one value per dimension)",
                dim,
                v.len(),
            ));
        }
        Ok(v)
    }

    /// Checks that σ fits states of dimension `dim` (once, where a simulation starts).
    pub(crate) fn check_dim(&self, dim: usize) -> Result<()> {
        let n = match &self.kind {
            Kind::Constant(_) => return Ok(()),
            Kind::PerDim(v) => v.len(),
            Kind::Learned(t) => {
                if t.dims() != [1, dim] {
                    return Err(Error::shape("learned log_sigma", [1, dim], t.dims()));
                }
                dim
            }
        };
        if n != dim {
            return Err(Error::shape("sigma (one value per dimension)", dim, n));
        }
        Ok(())
    }

    /// σ as a `(1, d)` row in `like`'s dtype and device (carrying gradients when learned).
    fn row(&self, like: &Tensor) -> candle_core::Result<Tensor> {
        match &self.kind {
            Kind::Constant(s) => {
                Tensor::full(*s, (1, like.dim(1)?), like.device())?.to_dtype(like.dtype())
            }
            Kind::PerDim(v) => {
                Tensor::from_vec(v.clone(), (1, v.len()), like.device())?.to_dtype(like.dtype())
            }
            Kind::Learned(t) => t.to_dtype(like.dtype())?.exp(),
        }
    }

    /// `x · σ` (per dimension).
    pub(crate) fn scale(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        match &self.kind {
            // σ = 1 (the default) needs neither a copy nor a graph node on the solver's path.
            Kind::Constant(s) if *s == 1.0 => Ok(x.clone()),
            Kind::Constant(s) => x.affine(*s, 0.0),
            _ => x.broadcast_mul(&self.row(x)?),
        }
    }

    /// `x / σ` (per dimension).
    pub(crate) fn unscale(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        match &self.kind {
            Kind::Constant(s) if *s == 1.0 => Ok(x.clone()),
            Kind::Constant(s) => x.affine(1.0 / *s, 0.0),
            _ => x.broadcast_div(&self.row(x)?),
        }
    }
}
