//! Unnormalised target densities for the sampler.

use candle_core::{Device, Tensor};

use crate::error::{Error, Result};

/// An unnormalised log-density `log π̃(x)` evaluated on a batch.
///
/// Gradients, where needed, come from candle's autodiff through [`LogDensity::log_density`],
/// so write it with differentiable tensor ops.
pub trait LogDensity: Send + Sync {
    /// Dimension of the space.
    fn dim(&self) -> usize;
    /// `log π̃(x)` for `x` of shape `(batch, d)`; returns shape `(batch,)`.
    fn log_density(&self, x: &Tensor) -> candle_core::Result<Tensor>;
}

impl<T: LogDensity + ?Sized> LogDensity for std::sync::Arc<T> {
    fn dim(&self) -> usize {
        (**self).dim()
    }
    fn log_density(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        (**self).log_density(x)
    }
}

/// A log-density from a closure.
pub struct FnDensity<F> {
    dim: usize,
    f: F,
}

impl<F> FnDensity<F>
where
    F: Fn(&Tensor) -> candle_core::Result<Tensor> + Send + Sync,
{
    /// Wraps `f`, a function from `(batch, dim)` to `(batch,)`.
    pub fn new(dim: usize, f: F) -> Self {
        Self { dim, f }
    }
}

impl<F> std::fmt::Debug for FnDensity<F> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FnDensity").field("dim", &self.dim).finish()
    }
}

impl<F> LogDensity for FnDensity<F>
where
    F: Fn(&Tensor) -> candle_core::Result<Tensor> + Send + Sync,
{
    fn dim(&self) -> usize {
        self.dim
    }
    fn log_density(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        (self.f)(x)
    }
}

/// An equal-weight mixture of isotropic Gaussians `N(c_i, s² I)`, unnormalised by a known
/// factor: `π̃ = scale · π`, so `log Z = log scale`.
#[derive(Debug, Clone)]
pub struct GaussianMixture {
    centers: Vec<Vec<f64>>,
    std: f64,
    log_scale: f64,
}

impl GaussianMixture {
    /// A mixture with the given centers (all of one dimension) and component std `std`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for no centers, ragged centers, or a bad std.
    pub fn new(centers: Vec<Vec<f64>>, std: f64) -> Result<Self> {
        crate::error::check_positive("std", std)?;
        let d = centers
            .first()
            .map(Vec::len)
            .ok_or_else(|| Error::config("centers", "[]", "give at least one center"))?;
        if d == 0 || centers.iter().any(|c| c.len() != d) {
            return Err(Error::config(
                "centers",
                format!("{centers:?}"),
                "all centers need the same, nonzero dimension",
            ));
        }
        Ok(Self {
            centers,
            std,
            log_scale: 0.0,
        })
    }

    /// Multiplies the density by `exp(log_scale)` (then `log Z = log_scale`).
    pub fn with_log_scale(mut self, log_scale: f64) -> Self {
        self.log_scale = log_scale;
        self
    }

    /// The log normalising constant of the unnormalised density.
    pub fn log_z(&self) -> f64 {
        self.log_scale
    }

    /// A 2-D demo target: four components of std 0.5 at (±2, 0) and (0, ±2), separated well
    /// enough that a sampler that follows only one mode is visibly wrong.
    pub fn ring_2d() -> Self {
        let c = 2.0;
        Self {
            centers: vec![vec![c, 0.0], vec![-c, 0.0], vec![0.0, c], vec![0.0, -c]],
            std: 0.5,
            log_scale: 0.0,
        }
    }

    /// The component centers.
    pub fn centers(&self) -> &[Vec<f64>] {
        &self.centers
    }

    /// The component std.
    pub fn std(&self) -> f64 {
        self.std
    }
}

impl LogDensity for GaussianMixture {
    fn dim(&self) -> usize {
        self.centers[0].len()
    }

    fn log_density(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        let (_, d) = x.dims2()?;
        let k = self.centers.len();
        let flat: Vec<f64> = self.centers.iter().flatten().copied().collect();
        let c = Tensor::from_vec(flat, (1, k, d), x.device())?.to_dtype(x.dtype())?;
        let diff = x.unsqueeze(1)?.broadcast_sub(&c)?; // (batch, k, d)
        let s2 = self.std * self.std;
        let quad = diff.sqr()?.sum(2)?.affine(-0.5 / s2, 0.0)?; // (batch, k)
        let log_norm = -0.5 * d as f64 * (2.0 * std::f64::consts::PI * s2).ln() - (k as f64).ln()
            + self.log_scale;
        log_sum_exp_rows(&quad)?.affine(1.0, log_norm)
    }
}

/// Row-wise `log Σ_j exp(a_ij)` of a `(batch, k)` tensor, stable and differentiable.
pub(crate) fn log_sum_exp_rows(a: &Tensor) -> candle_core::Result<Tensor> {
    let m = a.max_keepdim(1)?.detach();
    let s = a.broadcast_sub(&m)?.exp()?.sum(1)?.log()?;
    s + m.squeeze(1)?
}

/// A Gaussian `N(m, S)` multiplied by `exp(log_scale)`, with full covariance.
#[derive(Debug, Clone)]
pub struct GaussianDensity {
    mean: Vec<f64>,
    precision: Vec<f64>,
    log_norm: f64,
    log_scale: f64,
}

impl GaussianDensity {
    /// `N(mean, cov)`; `cov` is row-major `d × d`, symmetric positive definite.
    ///
    /// # Errors
    /// [`Error::Shape`] for mismatched sizes; [`Error::InvalidConfig`] when `cov` is not
    /// positive definite.
    pub fn new(mean: Vec<f64>, cov: Vec<f64>) -> Result<Self> {
        let d = mean.len();
        if cov.len() != d * d || d == 0 {
            return Err(Error::shape("covariance (d × d)", d * d, cov.len()));
        }
        let l = crate::util::linalg::cholesky(&cov, d).ok_or_else(|| {
            Error::config(
                "cov",
                format!("{cov:?}"),
                "must be symmetric positive definite",
            )
        })?;
        let log_det = crate::util::linalg::log_det_from_cholesky(&l, d);
        let precision = crate::util::linalg::cholesky_inverse(&l, d);
        let log_norm = -0.5 * (d as f64 * (2.0 * std::f64::consts::PI).ln() + log_det);
        Ok(Self {
            mean,
            precision,
            log_norm,
            log_scale: 0.0,
        })
    }

    /// Multiplies the density by `exp(log_scale)` (then `log Z = log_scale`).
    pub fn with_log_scale(mut self, log_scale: f64) -> Self {
        self.log_scale = log_scale;
        self
    }

    /// The log normalising constant of the unnormalised density.
    pub fn log_z(&self) -> f64 {
        self.log_scale
    }
}

impl LogDensity for GaussianDensity {
    fn dim(&self) -> usize {
        self.mean.len()
    }

    fn log_density(&self, x: &Tensor) -> candle_core::Result<Tensor> {
        let d = self.mean.len();
        let dev: &Device = x.device();
        let m = Tensor::from_vec(self.mean.clone(), (1, d), dev)?.to_dtype(x.dtype())?;
        let p = Tensor::from_vec(self.precision.clone(), (d, d), dev)?.to_dtype(x.dtype())?;
        let diff = x.broadcast_sub(&m)?;
        let quad = (diff.matmul(&p)? * &diff)?.sum(1)?;
        quad.affine(-0.5, self.log_norm + self.log_scale)
    }
}

/// `log N(x; 0, var·I)` per row of `x` `(batch, d)`.
pub(crate) fn log_normal_isotropic(x: &Tensor, var: f64) -> candle_core::Result<Tensor> {
    let d = x.dim(1)? as f64;
    let c = -0.5 * d * (2.0 * std::f64::consts::PI * var).ln();
    x.sqr()?.sum(1)?.affine(-0.5 / var, c)
}
