//! The latent model's observation density: a Gaussian with full covariance.

use std::sync::Arc;

use candle_core::{DType, Device, Module, Tensor};

use super::decoder::Decoder;
use crate::error::{Error, Result};
use crate::nn::params::{Param, ParamBuilder};
use crate::sde::terminal::TerminalCost;

/// `y | z ~ N(m(z), (PᵀP)⁻¹)` with a learned lower-triangular precision factor `P` whose
/// diagonal is kept positive (`P = tril(A, −1) + diag(exp(c))`).
///
/// `−log p(y | z) = ½ |P (y − m(z))|² − Σ_j c_j + (D/2) log 2π`, and term `j` of that sum is
/// `−log p(y_j | y_<j, z)`, which gives the per-dimension breakdown. Parameters:
/// `precision_lower` `(D, D)` (only the strictly lower part is used) and
/// `precision_log_diag` `(D)` under the decoder's prefix.
#[derive(Clone)]
pub(crate) struct FullGaussian {
    decoder: Arc<Decoder>,
    lower: Param,
    log_diag: Param,
    mask: Tensor,
    eye: Tensor,
}

impl FullGaussian {
    pub(crate) fn new(decoder: Arc<Decoder>, data_dim: usize, pb: &ParamBuilder) -> Result<Self> {
        let lower = pb.zeros(&[data_dim, data_dim], "precision_lower")?;
        let log_diag = pb.zeros(&[data_dim], "precision_log_diag")?;
        let mask: Vec<f64> = (0..data_dim * data_dim)
            .map(|k| {
                if k % data_dim < k / data_dim {
                    1.0
                } else {
                    0.0
                }
            })
            .collect();
        let mask =
            Tensor::from_vec(mask, (data_dim, data_dim), pb.device())?.to_dtype(pb.dtype())?;
        let eye = Tensor::eye(data_dim, pb.dtype(), pb.device())?;
        Ok(Self {
            decoder,
            lower,
            log_diag,
            mask,
            eye,
        })
    }

    /// The precision factor `P`.
    pub(crate) fn factor(&self) -> candle_core::Result<Tensor> {
        let diag = self
            .eye
            .broadcast_mul(&self.log_diag.exp()?.unsqueeze(0)?)?;
        (self.lower.tensor() * &self.mask)? + diag
    }

    pub(crate) fn mean(&self, z: &Tensor) -> candle_core::Result<Tensor> {
        self.decoder.forward(z)
    }

    /// `−log p(y_j | y_<j, z)` per path and dimension, `(batch, D)`.
    pub(crate) fn nll_per_dim(&self, z: &Tensor, y: &Tensor) -> candle_core::Result<Tensor> {
        let p = self.factor()?;
        let e = (y - self.mean(z)?)?.matmul(&p.t()?)?;
        let half_log_2pi = 0.5 * (2.0 * std::f64::consts::PI).ln();
        e.sqr()?
            .affine(0.5, half_log_2pi)?
            .broadcast_sub(&self.log_diag.unsqueeze(0)?)
    }

    /// `PᵀP (y − m(z))` for the linear mean part, `(batch, D)`: with `Wᵀ` on the right it is
    /// the score `∇_z log p(y | z)` of the linear decoder.
    pub(crate) fn whitened_back(&self, z: &Tensor, y: &Tensor) -> candle_core::Result<Tensor> {
        let p = self.factor()?;
        (y - self.decoder.linear_mean(z)?)?
            .matmul(&p.t()?)?
            .matmul(&p)
    }

    /// The noise factor `P⁻¹` as f64 row-major (for sampling).
    pub(crate) fn noise_factor(&self) -> Result<Vec<f64>> {
        let p = self.factor()?.to_dtype(DType::F64)?;
        let d = p.dim(0)?;
        let v = p.flatten_all()?.to_vec1::<f64>()?;
        crate::util::linalg::lower_triangular_inverse(&v, d).ok_or_else(|| Error::NonFinite {
            what: "observation precision".into(),
            detail: "the precision factor has a zero or non-finite diagonal; retrain with a lower learning rate".into(),
        })
    }

    /// Sets `P` from a lower-triangular f64 matrix.
    pub(crate) fn set_factor(
        &self,
        varmap: &candle_nn::VarMap,
        prefix: &str,
        p: &[f64],
        d: usize,
    ) -> Result<()> {
        let map = varmap
            .data()
            .lock()
            .map_err(|_| Error::Training("parameter map lock poisoned by a panic".into()))?;
        let get = |name: &str| {
            map.get(&format!("{prefix}.{name}"))
                .ok_or_else(|| Error::shape(format!("parameter {prefix}.{name}"), [d], "missing"))
        };
        let lower: Vec<f64> = (0..d * d)
            .map(|k| if k % d < k / d { p[k] } else { 0.0 })
            .collect();
        let log_diag: Vec<f64> = (0..d).map(|i| p[i * d + i].ln()).collect();
        let dev = Device::Cpu;
        let lv = get("precision_lower")?;
        lv.set(&Tensor::from_vec(lower, (d, d), &dev)?.to_dtype(lv.dtype())?)?;
        let dv = get("precision_log_diag")?;
        dv.set(&Tensor::from_vec(log_diag, d, &dev)?.to_dtype(dv.dtype())?)?;
        Ok(())
    }
}

impl TerminalCost for FullGaussian {
    fn cost(&self, z: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let y = observation.ok_or_else(|| {
            candle_core::Error::Msg("the observation density needs the observed row".into())
        })?;
        self.nll_per_dim(z, y)?.sum(1)
    }
}
