//! The latent model's observation density: a Gaussian with full covariance over the
//! continuous cells, times one categorical distribution (softmax of the decoder's logits) per
//! categorical cell; missing cells are marginalised out.

use std::sync::Arc;

use candle_core::{DType, Device, Module, Tensor};

use super::decoder::Decoder;
use super::layout::RowLayout;
use super::noise_mixture::NoiseMixture;
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
    pub(crate) decoder: Arc<Decoder>,
    lower: Param,
    log_diag: Param,
    mask: Tensor,
    eye: Tensor,
    /// Continuous cells `D_c` (the decoder's first `D_c` outputs are their means).
    dim: usize,
    /// Decoder outputs (means and logits).
    outputs: usize,
}

impl FullGaussian {
    pub(crate) fn new(
        decoder: Arc<Decoder>,
        data_dim: usize,
        outputs: usize,
        pb: &ParamBuilder,
    ) -> Result<Self> {
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
            dim: data_dim,
            outputs,
        })
    }

    /// The Gaussian part of the decoder's outputs `out` `(n, outputs)`.
    fn gaussian_part(&self, out: Tensor) -> candle_core::Result<Tensor> {
        if self.outputs == self.dim {
            Ok(out)
        } else {
            out.narrow(1, 0, self.dim)
        }
    }

    /// The linear part of the Gaussian means, `W_c z + b_c`.
    pub(crate) fn gaussian_linear_mean(&self, z: &Tensor) -> candle_core::Result<Tensor> {
        self.linear_mean_c(z)
    }

    fn linear_mean_c(&self, z: &Tensor) -> candle_core::Result<Tensor> {
        self.gaussian_part(self.decoder.linear_mean(z)?)
    }

    /// The rows of the decoder's linear weight that give the Gaussian means, `(D_c, d)`.
    pub(crate) fn linear_weight_c(&self) -> candle_core::Result<Tensor> {
        let w = self.decoder.linear_weight();
        if self.outputs == self.dim {
            Ok(w.clone())
        } else {
            w.narrow(0, 0, self.dim)
        }
    }

    /// The bias of the Gaussian means.
    pub(crate) fn linear_bias_c(&self) -> candle_core::Result<Tensor> {
        let b = self.decoder.linear_bias();
        if self.outputs == self.dim {
            Ok(b.clone())
        } else {
            b.narrow(0, 0, self.dim)
        }
    }

    /// `−log p(y_o | z)` per row over the observed continuous cells `observed` (row-major,
    /// `true` observed), `(batch)`, for Gaussian means `mean`.
    pub(crate) fn masked_nll(
        &self,
        mean: &Tensor,
        y: &Tensor,
        observed: Vec<bool>,
    ) -> candle_core::Result<Tensor> {
        super::marginal::masked_gaussian_nll(&self.factor()?, &(y - mean)?, observed)
    }

    /// `−log p(y_j | y_<j, z)` per row and cell for Gaussian means `mean`, `(batch, D_c)`.
    fn nll_per_dim_at(&self, mean: &Tensor, y: &Tensor) -> candle_core::Result<Tensor> {
        let p = self.factor()?;
        let e = (y - mean)?.matmul(&p.t()?)?;
        let half_log_2pi = 0.5 * (2.0 * std::f64::consts::PI).ln();
        e.sqr()?
            .affine(0.5, half_log_2pi)?
            .broadcast_sub(&self.log_diag.unsqueeze(0)?)
    }

    /// The precision factor `P`.
    pub(crate) fn factor(&self) -> candle_core::Result<Tensor> {
        let diag = self
            .eye
            .broadcast_mul(&self.log_diag.exp()?.unsqueeze(0)?)?;
        (self.lower.tensor() * &self.mask)? + diag
    }

    /// `PᵀP (y − m(z))` for the linear mean part, `(batch, D)`: with `Wᵀ` on the right it is
    /// the score `∇_z log p(y | z)` of the linear decoder.
    pub(crate) fn whitened_back(&self, z: &Tensor, y: &Tensor) -> candle_core::Result<Tensor> {
        self.whiten_residual(&(y - self.linear_mean_c(z)?)?)
    }

    /// `PᵀP r` for residuals `r` `(batch, D_c)`.
    pub(crate) fn whiten_residual(&self, r: &Tensor) -> candle_core::Result<Tensor> {
        let p = self.factor()?;
        r.matmul(&p.t()?)?.matmul(&p)
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

/// The whole observation density of a coded row (see [`RowLayout`]): the terminal cost
/// `−log p(y_obs | z)`.
///
/// It reads either a row's first [`RowLayout::output_width`] values (every continuous cell
/// observed) or the whole coded row with its mask (some missing: the Gaussian term is then the
/// marginal of the observed cells).
#[derive(Clone)]
pub(crate) struct Observation {
    pub(crate) gaussian: FullGaussian,
    /// The continuous cells' noise when it is a mixture (the Gaussian's own precision
    /// factor then serves the control's score term only).
    pub(crate) mixture: Option<NoiseMixture>,
    layout: RowLayout,
}

impl Observation {
    pub(crate) fn new(
        gaussian: FullGaussian,
        mixture: Option<NoiseMixture>,
        layout: RowLayout,
    ) -> Self {
        Self {
            gaussian,
            mixture,
            layout,
        }
    }

    /// `−log p(y_obs | z)` per row from the decoder's outputs `out` at `z`.
    pub(crate) fn cost_from_outputs(
        &self,
        out: &Tensor,
        y: &Tensor,
    ) -> candle_core::Result<Tensor> {
        let l = &self.layout;
        let dc = l.continuous;
        let width = y.dim(1)?;
        let mean = self.gaussian.gaussian_part(out.clone())?;
        let y_c = if width == dc {
            y.clone()
        } else {
            y.narrow(1, 0, dc)?
        };
        let mut cost = if width == l.coded_width() && width != l.output_width() {
            let mask = y
                .narrow(1, l.output_width(), dc)?
                .to_dtype(candle_core::DType::F64)?
                .flatten_all()?
                .to_vec1::<f64>()?;
            let observed: Vec<bool> = mask.iter().map(|&m| m > 0.5).collect();
            if let Some(mix) = &self.mixture {
                let r = (&y_c - &mean)?;
                if observed.iter().all(|&o| o) {
                    mix.nll(&r)?
                } else {
                    mix.masked_nll(&r, &observed)?
                }
            } else if observed.iter().all(|&o| o) {
                self.gaussian.nll_per_dim_at(&mean, &y_c)?.sum(1)?
            } else {
                self.gaussian.masked_nll(&mean, &y_c, observed)?
            }
        } else if width == l.output_width() {
            match &self.mixture {
                Some(mix) => mix.nll(&(&y_c - &mean)?)?,
                None => self.gaussian.nll_per_dim_at(&mean, &y_c)?.sum(1)?,
            }
        } else {
            return Err(candle_core::Error::Msg(format!(
                "observation rows have {width} values; expected {} or {}",
                l.output_width(),
                l.coded_width()
            )));
        };
        let mut at = 0;
        for &k in &l.levels {
            let logits = out.narrow(1, dc + at, k)?;
            let hot = y.narrow(1, dc + at, k)?;
            let logp = candle_nn::ops::log_softmax(&logits, 1)?;
            cost = (cost - (logp * hot)?.sum(1)?)?;
            at += k;
        }
        Ok(cost)
    }
}

impl TerminalCost for Observation {
    fn cost(&self, z: &Tensor, observation: Option<&Tensor>) -> candle_core::Result<Tensor> {
        let y = observation.ok_or_else(|| {
            candle_core::Error::Msg("the observation density needs the observed row".into())
        })?;
        self.cost_from_outputs(&self.gaussian.decoder.forward(z)?, y)
    }
}
