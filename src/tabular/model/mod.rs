//! The latent-diffusion model: prior SDE, amortised control, decoder.
//!
//! A row `y ∈ R^D` is explained by a latent path on `[0, T]` in `R^d`: `Z_0 = 0`,
//! prior `dZ = b_θ(Z, t) dt + σ dW`, observation `y | Z_T ~ N(m_θ(Z_T), Σ_θ)` (full
//! covariance through a learned triangular precision factor). The
//! variational posterior adds a control `u_φ(Z, t; y)` that sees the row (amortised
//! inference). The loss per row is the free energy `½ Σ_k |u_k/σ|² h − log p_θ(y | Z_N)`,
//! whose negative is the ELBO of the Euler–Maruyama model; the Girsanov log-weight turns `K`
//! posterior paths into an importance-weighted log-likelihood estimate.

mod control;
mod decoder;
mod observation;

pub use decoder::{Decoder, DecoderConfig, DecoderKind};

use std::sync::Arc;

use candle_core::{DType, Device, Tensor};
use candle_nn::VarMap;
use rand::RngCore;
use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::nn::params::{frozen, ParamBuilder};
use crate::sde::diffusion::Diffusion;
use crate::sde::drift::{Drift, MlpConfig, TimeMlp};
use crate::sde::noise::BrownianIncrements;
use crate::sde::objective::FreeEnergy;
use crate::sde::solver::{simulate, Scheme, Sde, SolverConfig};
use crate::util::precision::Precision;
use crate::util::rng::{generator, key2, standard_normals, streams};
use crate::util::stack::run_deep;

/// Settings of a [`LatentModel`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct LatentConfig {
    /// Latent dimension `d` (`None`: the data dimension `D`).
    pub latent_dim: Option<usize>,
    /// Prior drift network `b(z, t)`.
    pub prior: MlpConfig,
    /// Control network `u(z, t; y)`.
    pub control: MlpConfig,
    /// Decoder mean map.
    pub decoder: DecoderConfig,
    /// Noise scale σ of the latent SDE.
    pub sigma: f64,
    /// Time grid (Euler–Maruyama is required for exact importance weights).
    pub solver: SolverConfig,
    /// Share α of the data covariance given to the observation noise when the model is
    /// initialised from data (see [`LatentModel::init_from_data`]).
    pub init_noise_share: f64,
    /// Tensor precision.
    pub precision: Precision,
    /// Set when the prior drift was supplied by a [`PriorFactory`] rather than built from
    /// [`LatentConfig::prior`]; loading such a model needs the same factory.
    pub custom_prior: bool,
}

/// Builds a user-defined prior drift `b(z, t)` on latent dimension `d`, creating its
/// parameters through the given builder (under the `prior` prefix) and drawing initial
/// values from the generator. Used by [`LatentModel::with_prior`],
/// [`crate::Trainer::with_prior`] and [`crate::TabularModel::load_with_prior`].
pub type PriorFactory =
    Arc<dyn Fn(&ParamBuilder, usize, &mut dyn RngCore) -> Result<Box<dyn Drift>> + Send + Sync>;

impl Default for LatentConfig {
    fn default() -> Self {
        Self {
            latent_dim: None,
            prior: MlpConfig::default(),
            control: MlpConfig::default(),
            decoder: DecoderConfig::default(),
            sigma: 1.0,
            solver: SolverConfig {
                n_steps: 20,
                ..SolverConfig::default()
            },
            init_noise_share: 0.5,
            precision: Precision::F32,
            custom_prior: false,
        }
    }
}

impl LatentConfig {
    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        if self.latent_dim == Some(0) {
            return Err(Error::config(
                "latent_dim",
                0,
                "use at least 1 latent dimension",
            ));
        }
        if let Some(d) = self.latent_dim {
            crate::util::limits::at_most(
                "latent_dim",
                d,
                crate::util::limits::MAX_LATENT_DIM,
                "latent dimensions",
            )?;
        }
        self.prior.validate()?;
        self.control.validate()?;
        self.decoder.validate()?;
        check_positive("sigma", self.sigma)?;
        self.solver.validate()?;
        if self.solver.scheme != Scheme::EulerMaruyama {
            return Err(Error::config(
                "scheme",
                format!("{:?}", self.solver.scheme),
                "the latent model's likelihood estimates need Euler–Maruyama",
            ));
        }
        if !(self.init_noise_share > 0.0 && self.init_noise_share < 1.0) {
            return Err(Error::config(
                "init_noise_share",
                self.init_noise_share,
                "must lie in (0, 1)",
            ));
        }
        Ok(())
    }
}

impl LatentConfig {
    /// The latent dimension for `data_dim` columns.
    pub(crate) fn latent_for(&self, data_dim: usize) -> usize {
        self.latent_dim.unwrap_or(data_dim)
    }

    /// Checks that a model of `data_dim` columns is within the crate's limits.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the setting that is too large.
    pub(crate) fn validate_for(&self, data_dim: usize) -> Result<()> {
        self.validate()?;
        use crate::util::limits::{at_most, MAX_COLUMNS, MAX_LATENT_DIM};
        at_most("columns", data_dim, MAX_COLUMNS, "columns")
            .map_err(|_| Error::config(
                "columns",
                data_dim,
                format!("at most {MAX_COLUMNS} columns are supported (the full-covariance decoder grows with their square); choose columns with --columns"),
            ))?;
        at_most(
            "latent_dim",
            self.latent_for(data_dim),
            MAX_LATENT_DIM,
            "latent dimensions",
        )?;
        if !self.custom_prior {
            crate::util::limits::parameters(self.parameter_count(data_dim))?;
        }
        Ok(())
    }

    /// Number of parameters of the model with the built-in prior for `data_dim` columns
    /// (`None` if it overflows).
    pub(crate) fn parameter_count(&self, data_dim: usize) -> Option<u64> {
        let d = self.latent_for(data_dim);
        let dd = data_dim as u64;
        self.prior
            .parameter_count(d, 0)?
            .checked_add(self.control.parameter_count(d, data_dim)?)?
            .checked_add(2 * d as u64)?
            .checked_add(self.decoder.parameter_count(d, data_dim)?)?
            .checked_add(dd.checked_mul(dd)?.checked_add(dd)?)
    }

    /// Values a training step on `batch` rows keeps for backpropagation and draws as noise
    /// (about: each network's hidden outputs and their derivatives, the state, the control
    /// and the noise, per step and row; `None` if it overflows).
    pub(crate) fn step_values(&self, data_dim: usize, batch: usize) -> Option<u64> {
        let d = self.latent_for(data_dim) as u64;
        let nets = |m: &MlpConfig| (m.width as u64).checked_mul(2 * m.depth as u64);
        let per_row_step = nets(&self.prior)?
            .checked_add(nets(&self.control)?)?
            .checked_add(d.checked_mul(4)?)?;
        per_row_step
            .checked_mul(self.solver.n_steps as u64)?
            .checked_mul(batch as u64)
    }

    /// Rows of `paths` paths each that one inference chunk can hold within
    /// [`crate::limits::MAX_STEP_VALUES`] values of noise (at least 1, at most `max_rows`).
    pub(crate) fn chunk_rows(&self, data_dim: usize, paths: usize, max_rows: usize) -> usize {
        let per_row = (self.solver.n_steps as u64)
            .saturating_mul(self.latent_for(data_dim) as u64)
            .saturating_mul(paths.max(1) as u64)
            .max(1);
        let fit = (crate::util::limits::MAX_STEP_VALUES / 4 / per_row).max(1);
        (fit.min(max_rows as u64) as usize).max(1)
    }
}

#[derive(Clone)]
struct Nets {
    prior: Arc<dyn Drift>,
    control: control::ScoreControl,
    nll: observation::FullGaussian,
    diffusion: Diffusion,
}

/// Per-path quantities of a posterior simulation (no autodiff graph).
#[derive(Debug, Clone)]
pub struct PathTerms {
    /// Importance log-weight `log p(y | Z_N) + log dP/dQ` per path.
    pub log_weight: Vec<f64>,
    /// `−(control cost + NLL)` per path: the single-path ELBO.
    pub elbo: Vec<f64>,
    /// Control cost per path.
    pub control_cost: Vec<f64>,
    /// Negative log-likelihood per path and observed dimension, row-major `(paths, D)`.
    pub nll_per_dim: Vec<f64>,
}

/// The latent-diffusion model (see the module docs).
pub struct LatentModel {
    cfg: LatentConfig,
    data_dim: usize,
    latent_dim: usize,
    varmap: VarMap,
    nets: Nets,
    device: Device,
}

impl std::fmt::Debug for LatentModel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("LatentModel")
            .field("data_dim", &self.data_dim)
            .field("latent_dim", &self.latent_dim)
            .field("cfg", &self.cfg)
            .finish()
    }
}

impl LatentModel {
    /// A model for rows of dimension `data_dim`, with weights drawn from `seed`.
    ///
    /// Parameters live in [`LatentModel::varmap`] under `prior.*`, `control.*` and
    /// `decoder.*`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a bad config or `data_dim == 0`.
    pub fn new(cfg: &LatentConfig, data_dim: usize, seed: u64) -> Result<Self> {
        Self::build(cfg, data_dim, seed, None)
    }

    /// A model whose prior drift is built by `prior` (a user architecture) instead of the
    /// built-in network; everything else is as in [`LatentModel::new`].
    ///
    /// # Errors
    /// As [`LatentModel::new`], and whatever `prior` returns; [`Error::Shape`] if the drift's
    /// dimension is not the latent dimension.
    pub fn with_prior(
        cfg: &LatentConfig,
        data_dim: usize,
        seed: u64,
        prior: &PriorFactory,
    ) -> Result<Self> {
        Self::build(cfg, data_dim, seed, Some(prior))
    }

    pub(crate) fn build(
        cfg: &LatentConfig,
        data_dim: usize,
        seed: u64,
        factory: Option<&PriorFactory>,
    ) -> Result<Self> {
        let varmap = VarMap::new();
        if data_dim == 0 {
            return Err(Error::config("data_dim", 0, "rows need at least 1 column"));
        }
        cfg.validate_for(data_dim)?;
        let latent_dim = cfg.latent_dim.unwrap_or(data_dim);
        let device = Device::Cpu;
        let pb = ParamBuilder::new(&varmap, cfg.precision.dtype(), &device);
        let mut rng = generator(seed, streams::INIT);
        let prior: Arc<dyn Drift> = match factory {
            Some(f) => Arc::from(f(&pb.pp("prior"), latent_dim, &mut rng)?),
            None => Arc::new(TimeMlp::new(
                &cfg.prior,
                latent_dim,
                0,
                &pb.pp("prior"),
                &mut rng,
            )?),
        };
        if prior.dim() != latent_dim || prior.context_dim() != 0 {
            return Err(Error::shape(
                "prior drift (dimension, context dimension)",
                (latent_dim, 0),
                (prior.dim(), prior.context_dim()),
            ));
        }
        let mut cfg = cfg.clone();
        cfg.custom_prior = factory.is_some();
        let decoder = Arc::new(decoder::Decoder::new(
            &cfg.decoder,
            latent_dim,
            data_dim,
            &pb.pp("decoder"),
            &mut rng,
        )?);
        let nll = observation::FullGaussian::new(decoder.clone(), data_dim, &pb.pp("decoder"))?;
        let control = control::ScoreControl::new(
            &cfg.control,
            latent_dim,
            data_dim,
            decoder.clone(),
            nll.clone(),
            (cfg.sigma, cfg.solver.t_end, cfg.init_noise_share),
            &pb.pp("control"),
            &mut rng,
        )?;
        let diffusion = Diffusion::constant(cfg.sigma)?;
        Ok(Self {
            cfg,
            data_dim,
            latent_dim,
            varmap,
            nets: Nets {
                prior,
                control,
                nll,
                diffusion,
            },
            device,
        })
    }

    /// The configuration.
    pub fn config(&self) -> &LatentConfig {
        &self.cfg
    }

    /// Observed dimension `D`.
    pub fn data_dim(&self) -> usize {
        self.data_dim
    }

    /// Latent dimension `d`.
    pub fn latent_dim(&self) -> usize {
        self.latent_dim
    }

    /// All parameters.
    pub fn varmap(&self) -> &VarMap {
        &self.varmap
    }

    /// Tensor dtype.
    pub fn dtype(&self) -> DType {
        self.cfg.precision.dtype()
    }

    fn set_param(&self, name: &str, values: Vec<f64>, shape: &[usize]) -> Result<()> {
        let map = self
            .varmap
            .data()
            .lock()
            .map_err(|_| Error::Training("parameter map lock poisoned by a panic".into()))?;
        let var = map
            .get(name)
            .ok_or_else(|| Error::shape(format!("parameter {name}"), shape, "missing"))?;
        var.set(&Tensor::from_vec(values, shape, &self.device)?.to_dtype(var.dtype())?)?;
        Ok(())
    }

    /// Starts the model at the maximum-likelihood Gaussian `N(ȳ, Σ̂)` of `rows`
    /// (standardised, row-major): with the prior drift at zero, `Z_T ~ N(0, σ²T I)`; the
    /// decoder `W = √(1 − α) chol(Σ̂) / (σ√T)`, `b = ȳ` and noise covariance `α Σ̂` give the
    /// marginal `N(ȳ, Σ̂)` exactly (α is [`LatentConfig::init_noise_share`]). The control's
    /// score gain then makes the initial control optimal (see the control's docs), so the
    /// initial ELBO is the Gaussian log-likelihood up to discretisation error. With `d < D`
    /// the first `d` Cholesky columns are used; with `d > D` the extra columns start at zero.
    ///
    /// # Errors
    /// [`Error::Shape`] if `rows` is not a multiple of `D`; [`Error::NonFinite`] if the
    /// covariance is singular.
    pub fn init_from_data(&self, rows: &[f64]) -> Result<()> {
        let dd = self.data_dim;
        if rows.is_empty() || !rows.len().is_multiple_of(dd) {
            return Err(Error::shape(
                "standardised rows (multiple of D)",
                dd,
                rows.len(),
            ));
        }
        let n = (rows.len() / dd) as f64;
        let mut mean = vec![0.0; dd];
        for r in rows.chunks_exact(dd) {
            for (m, v) in mean.iter_mut().zip(r) {
                *m += v / n;
            }
        }
        let alpha = self.cfg.init_noise_share;
        let mut cov = vec![0.0; dd * dd];
        for r in rows.chunks_exact(dd) {
            for i in 0..dd {
                for j in 0..dd {
                    cov[i * dd + j] += (r[i] - mean[i]) * (r[j] - mean[j]) / n;
                }
            }
        }
        // A tiny ridge keeps nearly collinear columns factorisable.
        for i in 0..dd {
            cov[i * dd + i] += 1e-6;
        }
        let l = crate::util::linalg::cholesky(&cov, dd).ok_or_else(|| Error::NonFinite {
            what: "data covariance".into(),
            detail: "the training rows' covariance is not positive definite; remove collinear or duplicate columns".into(),
        })?;
        let scale = (1.0 - alpha).sqrt() / (self.cfg.sigma * self.cfg.solver.t_end.sqrt());
        let d = self.latent_dim;
        let mut w = vec![0.0; dd * d];
        for i in 0..dd {
            for j in 0..d.min(dd) {
                w[i * d + j] = l[i * dd + j] * scale;
            }
        }
        self.set_param("decoder.linear.weight", w, &[dd, d])?;
        self.set_param("decoder.linear.bias", mean, &[dd])?;
        // Noise covariance α Σ̂ = (√α L)(√α L)ᵀ, so the precision factor is (√α L)⁻¹.
        let noise_l: Vec<f64> = l.iter().map(|v| v * alpha.sqrt()).collect();
        let p = crate::util::linalg::lower_triangular_inverse(&noise_l, dd).ok_or_else(|| {
            Error::NonFinite {
                what: "data covariance".into(),
                detail:
                    "its Cholesky factor has a zero diagonal; remove constant or duplicate columns"
                        .into(),
            }
        })?;
        self.nets.nll.set_factor(&self.varmap, "decoder", &p, dd)
    }

    fn sde<'a>(&self, nets: &'a Nets) -> Sde<'a> {
        Sde::new(&nets.diffusion)
            .with_prior(nets.prior.as_ref())
            .with_control(&nets.control)
    }

    /// The free energy of standardised rows `y` `(batch, D)`, one posterior path per row
    /// with latent noise drawn from `rng` on the model's grid, keeping the autodiff graph
    /// (run it inside [`crate::run_deep`] for long grids).
    ///
    /// # Errors
    /// [`Error::Shape`] for mismatched shapes.
    pub fn free_energy(&self, y: &Tensor, rng: &mut dyn RngCore) -> Result<FreeEnergy> {
        let batch = y.dim(0)?;
        let noise = &self.cfg.solver.sample_noise(
            rng,
            batch,
            self.latent_dim,
            self.dtype(),
            &self.device,
        )?;
        self.free_energy_with(y, noise)
    }

    /// [`LatentModel::free_energy`] with row `i`'s noise from the generator keyed by
    /// `keys[i]` (training: the step and the row's index), so a minibatch split between
    /// processes draws the noise it would draw whole.
    pub(crate) fn free_energy_keyed(
        &self,
        y: &Tensor,
        seed: u64,
        keys: &[u64],
    ) -> Result<FreeEnergy> {
        let noise = &self.cfg.solver.sample_noise_keyed(
            seed,
            streams::NOISE_ROWS,
            keys,
            self.latent_dim,
            self.dtype(),
            &self.device,
        )?;
        self.free_energy_with(y, noise)
    }

    fn free_energy_with(&self, y: &Tensor, noise: &BrownianIncrements) -> Result<FreeEnergy> {
        let batch = y.dim(0)?;
        let x0 = Tensor::zeros((batch, self.latent_dim), self.dtype(), &self.device)?;
        let paths = simulate(&self.sde(&self.nets), &self.cfg.solver, &x0, noise, Some(y))?;
        FreeEnergy::new(&paths, &self.nets.nll, Some(y))
    }

    /// Posterior paths for standardised rows `y` without an autodiff graph: importance
    /// log-weights, single-path ELBO terms and per-dimension NLL.
    fn path_terms(&self, y: &Tensor, noise: &BrownianIncrements) -> Result<PathTerms> {
        run_deep(|| frozen(|| self.path_terms_frozen(y, noise)))?
    }

    fn path_terms_frozen(&self, y: &Tensor, noise: &BrownianIncrements) -> Result<PathTerms> {
        let nets = &self.nets;
        let batch = y.dim(0)?;
        let x0 = Tensor::zeros((batch, self.latent_dim), self.dtype(), &self.device)?;
        let p = simulate(&self.sde(nets), &self.cfg.solver, &x0, noise, Some(y))?;
        let nll_dim = nets.nll.nll_per_dim(&p.end, y)?;
        let nll = nll_dim.sum(1)?;
        let f64v =
            |t: &Tensor| -> Result<Vec<f64>> { Ok(t.to_dtype(DType::F64)?.to_vec1::<f64>()?) };
        Ok(PathTerms {
            log_weight: f64v(&(&p.log_weight - &nll)?)?,
            elbo: f64v(&(&p.control_cost + &nll)?.neg()?)?,
            control_cost: f64v(&p.control_cost)?,
            nll_per_dim: nll_dim
                .to_dtype(DType::F64)?
                .flatten_all()?
                .to_vec1::<f64>()?,
        })
    }

    /// Posterior terms for standardised `rows` (row-major, `D` columns), `paths` posterior
    /// paths per row with noise from `rng`: each row is repeated `paths` times, consecutively,
    /// so terms `i·paths .. (i+1)·paths` belong to row `i`. Callers stream long tables through
    /// this in chunks.
    ///
    /// # Errors
    /// [`Error::Shape`] if `rows` is not a multiple of `D`.
    pub fn posterior_terms(
        &self,
        rows: &[f64],
        paths: usize,
        rng: &mut dyn RngCore,
    ) -> Result<PathTerms> {
        let d = self.data_dim;
        if rows.is_empty() || !rows.len().is_multiple_of(d) {
            return Err(Error::shape(
                "standardised rows (multiple of D)",
                d,
                rows.len(),
            ));
        }
        let r = rows.len() / d;
        let mut rep = Vec::with_capacity(r * paths * d);
        for row in rows.chunks_exact(d) {
            for _ in 0..paths {
                rep.extend_from_slice(row);
            }
        }
        let y = Tensor::from_vec(rep, (r * paths, d), &self.device)?.to_dtype(self.dtype())?;
        let noise = self.cfg.solver.sample_noise(
            rng,
            r * paths,
            self.latent_dim,
            self.dtype(),
            &self.device,
        )?;
        self.path_terms(&y, &noise)
    }

    /// [`LatentModel::posterior_terms`] with path `p` of row `i` drawing from the generator
    /// keyed by `(row_keys[i], p)`: a row's terms do not depend on the chunk or process that
    /// evaluates it.
    pub(crate) fn posterior_terms_keyed(
        &self,
        rows: &[f64],
        paths: usize,
        seed: u64,
        row_keys: &[u64],
    ) -> Result<PathTerms> {
        let d = self.data_dim;
        if rows.len() != row_keys.len() * d || rows.is_empty() {
            return Err(Error::shape(
                "standardised rows (one key per row)",
                row_keys.len() * d,
                rows.len(),
            ));
        }
        let mut rep = Vec::with_capacity(rows.len() * paths);
        let mut keys = Vec::with_capacity(row_keys.len() * paths);
        for (row, &k) in rows.chunks_exact(d).zip(row_keys) {
            for p in 0..paths {
                rep.extend_from_slice(row);
                keys.push(key2(k, p as u64));
            }
        }
        let y = Tensor::from_vec(rep, (keys.len(), d), &self.device)?.to_dtype(self.dtype())?;
        let noise = self.cfg.solver.sample_noise_keyed(
            seed,
            streams::EVAL_ROWS,
            &keys,
            self.latent_dim,
            self.dtype(),
            &self.device,
        )?;
        self.path_terms(&y, &noise)
    }

    /// Draws `n` standardised rows from the model: the prior SDE from `Z_0 = 0`, then
    /// `y = m(Z_T) + s ε`. No autodiff graph is built. Row-major `(n, D)`.
    ///
    /// # Errors
    /// [`Error::Candle`] on tensor errors.
    pub fn generate(&self, n: usize, rng: &mut dyn RngCore) -> Result<Vec<f64>> {
        let noise =
            self.cfg
                .solver
                .sample_noise(rng, n, self.latent_dim, self.dtype(), &self.device)?;
        let dd = self.data_dim;
        let eps = Tensor::from_vec(standard_normals(rng, n * dd), (n, dd), &self.device)?
            .to_dtype(self.dtype())?;
        run_deep(|| frozen(|| self.generate_frozen(n, &noise, &eps)))?
    }

    fn generate_frozen(
        &self,
        n: usize,
        noise: &BrownianIncrements,
        eps: &Tensor,
    ) -> Result<Vec<f64>> {
        let nets = &self.nets;
        let sde = Sde::new(&nets.diffusion).with_prior(nets.prior.as_ref());
        let x0 = Tensor::zeros((n, self.latent_dim), self.dtype(), &self.device)?;
        let p = simulate(&sde, &self.cfg.solver, &x0, noise, None)?;
        let mean = nets.nll.mean(&p.end)?;
        let dd = self.data_dim;
        // y = m + P⁻¹ ε, i.e. rows e P⁻ᵀ.
        let factor = Tensor::from_vec(nets.nll.noise_factor()?, (dd, dd), &self.device)?
            .to_dtype(self.dtype())?;
        let y = (mean + eps.matmul(&factor.t()?)?)?;
        Ok(y.to_dtype(DType::F64)?.flatten_all()?.to_vec1::<f64>()?)
    }
}
