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
pub(crate) mod init;
mod layout;
mod marginal;
mod mixture_start;
mod noise_mixture;
mod observation;

pub use decoder::{Decoder, DecoderConfig, DecoderKind};
pub use layout::RowLayout;

use std::sync::Arc;

use candle_core::{DType, Device, Module, Tensor};
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
    /// Components of the continuous cells' observation noise, a full-covariance Gaussian
    /// mixture `y_c = m(z) + ε`, `ε ~ Σ_k π_k N(δ_k, Σ_k)` (`Some(1)`: one Gaussian).
    /// [`crate::Trainer`] starts from the mixture EM fits to the training rows, whose
    /// marginal the untrained model then equals exactly. `None` lets the trainer choose the
    /// count, 1 to 10 (the larger of the counts chosen by BIC on the training rows and by
    /// the likelihood of the validation rows), for tables of up to 64 continuous columns with
    /// no categorical column and no missing cell (one Gaussian otherwise), and offers the fit
    /// from one Gaussian to compare with ([`crate::Trainer::gaussian_start`]); a model built
    /// directly with `None` has one component.
    pub noise_components: Option<usize>,
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
            noise_components: None,
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
        if let Some(m) = self.noise_components {
            if m == 0 {
                return Err(Error::config(
                    "noise_components",
                    0,
                    "use at least 1 component (1 is a single Gaussian)",
                ));
            }
            crate::util::limits::at_most(
                "noise_components",
                m,
                crate::util::limits::MAX_NOISE_COMPONENTS,
                "noise components",
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
    /// The latent dimension for rows of `layout` (by default one per column).
    pub(crate) fn latent_for(&self, layout: &RowLayout) -> usize {
        self.latent_dim.unwrap_or(layout.columns())
    }

    /// Checks that a model of rows of `layout` is within the crate's limits.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the setting that is too large.
    pub(crate) fn validate_for(&self, layout: &RowLayout) -> Result<()> {
        self.validate()?;
        let data_dim = layout.columns();
        use crate::util::limits::{at_most, MAX_COLUMNS, MAX_LATENT_DIM};
        at_most(
            "one-hot values",
            layout.one_hot_width(),
            4 * MAX_COLUMNS,
            "levels in all",
        )?;
        at_most("columns", data_dim, MAX_COLUMNS, "columns")
            .map_err(|_| Error::config(
                "columns",
                data_dim,
                format!("at most {MAX_COLUMNS} columns are supported (the full-covariance decoder grows with their square); choose columns with --columns"),
            ))?;
        if layout.continuous == 0 {
            return Err(Error::config(
                "columns",
                data_dim,
                "every column is categorical, and the model needs at least one continuous column (a table of categorical columns only is not supported yet); declare a numeric column --continuous if it is one",
            ));
        }
        at_most(
            "latent_dim",
            self.latent_for(layout),
            MAX_LATENT_DIM,
            "latent dimensions",
        )?;
        if !self.custom_prior {
            crate::util::limits::parameters(self.parameter_count(layout))?;
        }
        Ok(())
    }

    /// Number of parameters of the model with the built-in prior for rows of `layout`
    /// (`None` if it overflows).
    pub(crate) fn parameter_count(&self, layout: &RowLayout) -> Option<u64> {
        let d = self.latent_for(layout);
        let dd = layout.continuous as u64;
        self.prior
            .parameter_count(d, 0)?
            .checked_add(self.control.parameter_count(d, layout.context_width())?)?
            .checked_add(2 * d as u64)?
            .checked_add(self.decoder.parameter_count(d, layout.output_width())?)?
            .checked_add(dd.checked_mul(dd)?.checked_add(dd)?)?
            .checked_add(match self.components() {
                1 => 0,
                m => noise_mixture::NoiseMixture::parameter_count(m, layout.continuous)?,
            })
    }

    /// Components of the observation noise (`None` counts as one).
    pub(crate) fn components(&self) -> usize {
        self.noise_components.unwrap_or(1)
    }

    /// Values a training step on `batch` rows keeps for backpropagation and draws as noise
    /// (about: each network's hidden outputs and their derivatives, the state, the control
    /// and the noise, per step and row; `None` if it overflows).
    pub(crate) fn step_values(&self, layout: &RowLayout, batch: usize) -> Option<u64> {
        let d = self.latent_for(layout) as u64;
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
    pub(crate) fn chunk_rows(&self, layout: &RowLayout, paths: usize, max_rows: usize) -> usize {
        let per_row = (self.solver.n_steps as u64)
            .saturating_mul(self.latent_for(layout) as u64)
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
    nll: observation::Observation,
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
    /// The decoder's outputs at each path's end `Z_T` (Gaussian means of the continuous
    /// cells, then each categorical column's logits; see [`RowLayout`]), row-major.
    pub outputs: Vec<f64>,
}

/// The latent-diffusion model (see the module docs).
pub struct LatentModel {
    cfg: LatentConfig,
    layout: Arc<RowLayout>,
    latent_dim: usize,
    varmap: VarMap,
    nets: Nets,
    device: Device,
}

impl std::fmt::Debug for LatentModel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("LatentModel")
            .field("layout", &self.layout)
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
        Self::build(cfg, &RowLayout::continuous(data_dim), seed, None)
    }

    /// A model for coded rows of `layout` (categorical columns, missing cells), with weights
    /// drawn from `seed`.
    ///
    /// # Errors
    /// As [`LatentModel::new`].
    pub fn with_layout(cfg: &LatentConfig, layout: &RowLayout, seed: u64) -> Result<Self> {
        Self::build(cfg, layout, seed, None)
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
        Self::build(cfg, &RowLayout::continuous(data_dim), seed, Some(prior))
    }

    pub(crate) fn build(
        cfg: &LatentConfig,
        layout: &RowLayout,
        seed: u64,
        factory: Option<&PriorFactory>,
    ) -> Result<Self> {
        let varmap = VarMap::new();
        if layout.columns() == 0 {
            return Err(Error::config("data_dim", 0, "rows need at least 1 column"));
        }
        cfg.validate_for(layout)?;
        let latent_dim = cfg.latent_for(layout);
        let data_dim = layout.continuous;
        let layout = Arc::new(layout.clone());
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
            layout.output_width(),
            &pb.pp("decoder"),
            &mut rng,
        )?);
        let gaussian = observation::FullGaussian::new(
            decoder.clone(),
            data_dim,
            layout.output_width(),
            &pb.pp("decoder"),
        )?;
        let control = control::ScoreControl::new(
            &cfg.control,
            latent_dim,
            layout.clone(),
            gaussian.clone(),
            (cfg.sigma, cfg.solver.t_end, cfg.init_noise_share),
            &pb.pp("control"),
            &mut rng,
        )?;
        let diffusion = Diffusion::constant(cfg.sigma)?;
        let mixture = match cfg.components() {
            1 => None,
            m => Some(noise_mixture::NoiseMixture::new(
                m,
                data_dim,
                &pb.pp("decoder"),
            )?),
        };
        let nll = observation::Observation::new(gaussian, mixture, (*layout).clone());
        Ok(Self {
            cfg,
            layout,
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

    /// Columns `D` of the table (continuous and categorical).
    pub fn data_dim(&self) -> usize {
        self.layout.columns()
    }

    /// The shape of the rows the model reads.
    pub fn layout(&self) -> &RowLayout {
        &self.layout
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
    /// (standardised, row-major, every cell observed; for a model with categorical columns,
    /// the first [`RowLayout::output_width`] values of each coded row): with the prior drift at
    /// zero, `Z_T ~ N(0, σ²T I)`; the decoder `W = √(1 − α) chol(Σ̂) / (σ√T)`, `b = ȳ` and
    /// noise covariance `α Σ̂` give the marginal `N(ȳ, Σ̂)` exactly (α is
    /// [`LatentConfig::init_noise_share`]). The control's score gain then makes the initial
    /// control optimal (see the control's docs), so the initial ELBO is the Gaussian
    /// log-likelihood up to discretisation error. With `d < D` the first `d` Cholesky columns
    /// are used; with `d > D` the extra columns start at zero. Categorical logits start at the
    /// columns' log-frequencies, independent of `Z_T`.
    ///
    /// # Errors
    /// [`Error::Shape`] if `rows` is not a multiple of the row width; [`Error::NonFinite`]
    /// if the covariance is singular.
    pub fn init_from_data(&self, rows: &[f64]) -> Result<()> {
        let w = self.layout.output_width();
        if rows.is_empty() || !rows.len().is_multiple_of(w) {
            return Err(Error::shape(
                "standardised rows (multiple of D)",
                w,
                rows.len(),
            ));
        }
        self.init_from_coded(&self.with_full_mask(rows))
    }

    /// Complete rows of `output_width` values with their mask of ones appended.
    fn with_full_mask(&self, rows: &[f64]) -> Vec<f64> {
        let w = self.layout.output_width();
        let dc = self.layout.continuous;
        let mut out = Vec::with_capacity(rows.len() / w * (w + dc));
        for r in rows.chunks_exact(w) {
            out.extend_from_slice(r);
            out.extend(std::iter::repeat_n(1.0, dc));
        }
        out
    }

    /// [`LatentModel::init_from_data`] from whole coded rows (see [`RowLayout`]), which may
    /// have missing cells: the Gaussian is then fitted by EM.
    ///
    /// # Errors
    /// As [`LatentModel::init_from_data`].
    pub fn init_from_coded(&self, rows: &[f64]) -> Result<()> {
        let layout = &*self.layout;
        let cw = layout.coded_width();
        if rows.is_empty() || !rows.len().is_multiple_of(cw) {
            return Err(Error::shape(
                "coded rows (multiple of the coded width)",
                cw,
                rows.len(),
            ));
        }
        let dd = layout.continuous;
        let (mean, mut cov) = init::gaussian_moments(rows, layout);
        let alpha = self.cfg.init_noise_share;
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
        let outs = layout.output_width();
        let mut w = vec![0.0; outs * d];
        for i in 0..dd {
            for j in 0..d.min(dd) {
                w[i * d + j] = l[i * dd + j] * scale;
            }
        }
        let mut bias = mean;
        bias.extend(init::log_frequencies(rows, layout));
        self.set_param("decoder.linear.weight", w, &[outs, d])?;
        self.set_param("decoder.linear.bias", bias, &[outs])?;
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
        self.nets
            .nll
            .gaussian
            .set_factor(&self.varmap, "decoder", &p, dd)
    }

    /// Starts the model at the Gaussian mixture `Σ_k weights[k] N(means[k], covariances[k])`
    /// of the continuous cells (standardised units; `M × D_c` means, `M × D_c × D_c`
    /// covariances), whose component count must be the model's
    /// [`LatentConfig::noise_components`]: the untrained model's marginal is then that mixture
    /// exactly (the construction is in `mixture_start.rs`). The control's score term
    /// uses the noise's overall covariance. Categorical logits start at the log-frequencies of
    /// the coded `rows`, as in [`LatentModel::init_from_coded`].
    ///
    /// # Errors
    /// [`Error::Shape`] for a component count or sizes that do not match the model;
    /// [`Error::NonFinite`] if a covariance is not positive definite.
    pub(crate) fn init_from_mixture(
        &self,
        rows: &[f64],
        weights: &[f64],
        means: &[f64],
        covariances: &[f64],
    ) -> Result<()> {
        let layout = &*self.layout;
        let dc = layout.continuous;
        let m = weights.len();
        let mix = self
            .nets
            .nll
            .mixture
            .as_ref()
            .ok_or_else(|| Error::shape("noise components (a mixture start)", m, 1))?;
        if m != self.cfg.components() || means.len() != m * dc || covariances.len() != m * dc * dc {
            return Err(Error::shape(
                "mixture (components, means, covariances)",
                (
                    self.cfg.components(),
                    self.cfg.components() * dc,
                    self.cfg.components() * dc * dc,
                ),
                (m, means.len(), covariances.len()),
            ));
        }
        let sigma2_t = self.cfg.sigma * self.cfg.sigma * self.cfg.solver.t_end;
        let not_pd = || {
            Error::NonFinite {
            what: "mixture start".into(),
            detail: "a component's covariance is not positive definite; raise the mixture's regularisation".into(),
        }
        };
        let d = self.latent_dim;
        let start = mixture_start::mixture_start(
            weights,
            means,
            covariances,
            (dc, d),
            sigma2_t,
            self.cfg.init_noise_share,
        )
        .ok_or_else(not_pd)?;
        let outs = layout.output_width();
        let mut w = start.weight.clone();
        w.resize(outs * d, 0.0);
        let mut bias = start.bias.clone();
        bias.extend(init::log_frequencies(rows, layout));
        self.set_param("decoder.linear.weight", w, &[outs, d])?;
        self.set_param("decoder.linear.bias", bias, &[outs])?;
        let l = crate::util::linalg::cholesky(&start.pooled, dc).ok_or_else(not_pd)?;
        let p = crate::util::linalg::lower_triangular_inverse(&l, dc).ok_or_else(not_pd)?;
        self.nets
            .nll
            .gaussian
            .set_factor(&self.varmap, "decoder", &p, dc)?;
        mix.set(
            &self.varmap,
            "decoder",
            weights,
            &start.offsets,
            &start.covariances,
        )
    }

    /// Simulates posterior paths for rows `y` (`output_width` values per row when every
    /// continuous cell is observed, whole coded rows otherwise) and returns them with the row
    /// tensor the observation density reads.
    fn posterior_paths(
        &self,
        nets: &Nets,
        y: &Tensor,
        noise: &BrownianIncrements,
    ) -> Result<crate::sde::solver::Paths> {
        let batch = y.dim(0)?;
        let l = &*self.layout;
        let x0 = Tensor::zeros((batch, self.latent_dim), self.dtype(), &self.device)?;
        if y.dim(1)? == l.output_width() {
            let context = if l.mask_input {
                let ones = Tensor::ones((batch, l.continuous), self.dtype(), &self.device)?;
                Tensor::cat(&[y, &ones], 1)?
            } else {
                y.clone()
            };
            return simulate(
                &self.sde(nets),
                &self.cfg.solver,
                &x0,
                noise,
                Some(&context),
            );
        }
        let masked = nets.control.masked(y)?;
        let sde = Sde::new(&nets.diffusion)
            .with_prior(nets.prior.as_ref())
            .with_control(&masked);
        simulate(&sde, &self.cfg.solver, &x0, noise, Some(y))
    }

    /// Coded rows (whole, mask included) as the tensor [`LatentModel::posterior_paths`]
    /// reads: only the first `output_width` values when every continuous cell is observed.
    pub(crate) fn coded_tensor(&self, rows: &[f64], n: usize) -> Result<Tensor> {
        let l = &*self.layout;
        let cw = l.coded_width();
        let ow = l.output_width();
        let complete = rows.chunks_exact(cw).all(|r| l.all_observed(r));
        let t = if complete {
            let mut v = Vec::with_capacity(n * ow);
            for r in rows.chunks_exact(cw) {
                v.extend_from_slice(&r[..ow]);
            }
            Tensor::from_vec(v, (n, ow), &self.device)?
        } else {
            Tensor::from_vec(rows.to_vec(), (n, cw), &self.device)?
        };
        Ok(t.to_dtype(self.dtype())?)
    }

    fn sde<'a>(&self, nets: &'a Nets) -> Sde<'a> {
        Sde::new(&nets.diffusion)
            .with_prior(nets.prior.as_ref())
            .with_control(&nets.control)
    }

    /// The free energy of standardised rows `y` `(batch, D)` (every cell observed; for a
    /// model with categorical columns, the first [`RowLayout::output_width`] values of each
    /// coded row), one posterior path per row with latent noise drawn from `rng` on the
    /// model's grid, keeping the autodiff graph (run it inside [`crate::run_deep`] for long
    /// grids).
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
    /// processes draws the noise it would draw whole. `y` is as
    /// [`LatentModel::coded_tensor`] makes it.
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
        let paths = self.posterior_paths(&self.nets, y, noise)?;
        FreeEnergy::new(&paths, &self.nets.nll, Some(y))
    }

    /// Posterior paths for rows `y` without an autodiff graph: importance log-weights,
    /// single-path ELBO terms and the decoder's outputs at the paths' ends.
    fn path_terms(&self, y: &Tensor, noise: &BrownianIncrements) -> Result<PathTerms> {
        run_deep(|| frozen(|| self.path_terms_frozen(y, noise)))?
    }

    fn path_terms_frozen(&self, y: &Tensor, noise: &BrownianIncrements) -> Result<PathTerms> {
        let nets = &self.nets;
        let p = self.posterior_paths(nets, y, noise)?;
        let out = nets.nll.gaussian.decoder.forward(&p.end)?;
        let nll = nets.nll.cost_from_outputs(&out, y)?;
        let f64v =
            |t: &Tensor| -> Result<Vec<f64>> { Ok(t.to_dtype(DType::F64)?.to_vec1::<f64>()?) };
        Ok(PathTerms {
            log_weight: f64v(&(&p.log_weight - &nll)?)?,
            elbo: f64v(&(&p.control_cost + &nll)?.neg()?)?,
            control_cost: f64v(&p.control_cost)?,
            outputs: out.to_dtype(DType::F64)?.flatten_all()?.to_vec1::<f64>()?,
        })
    }

    /// Posterior terms for standardised `rows` (row-major, `D` columns, every cell observed;
    /// for a model with categorical columns, the first [`RowLayout::output_width`] values of
    /// each coded row), `paths` posterior paths per row with noise from `rng`: each row is
    /// repeated `paths` times, consecutively, so terms `i·paths .. (i+1)·paths` belong to row
    /// `i`. Callers stream long tables through this in chunks.
    ///
    /// # Errors
    /// [`Error::Shape`] if `rows` is not a multiple of `D`.
    pub fn posterior_terms(
        &self,
        rows: &[f64],
        paths: usize,
        rng: &mut dyn RngCore,
    ) -> Result<PathTerms> {
        let d = self.layout.output_width();
        if rows.is_empty() || !rows.len().is_multiple_of(d) {
            return Err(Error::shape(
                "standardised rows (multiple of D)",
                d,
                rows.len(),
            ));
        }
        self.posterior_terms_coded(&self.with_full_mask(rows), paths, rng)
    }

    /// [`LatentModel::posterior_terms`] for whole coded rows (see [`RowLayout`]), which may
    /// have missing cells: the likelihood terms are then those of the observed cells.
    ///
    /// # Errors
    /// [`Error::Shape`] if `rows` is not a multiple of the coded width.
    pub fn posterior_terms_coded(
        &self,
        rows: &[f64],
        paths: usize,
        rng: &mut dyn RngCore,
    ) -> Result<PathTerms> {
        let cw = self.layout.coded_width();
        if rows.is_empty() || !rows.len().is_multiple_of(cw) {
            return Err(Error::shape(
                "coded rows (multiple of the coded width)",
                cw,
                rows.len(),
            ));
        }
        let r = rows.len() / cw;
        let mut rep = Vec::with_capacity(r * paths * cw);
        for row in rows.chunks_exact(cw) {
            for _ in 0..paths {
                rep.extend_from_slice(row);
            }
        }
        let y = self.coded_tensor(&rep, r * paths)?;
        let noise = self.cfg.solver.sample_noise(
            rng,
            r * paths,
            self.latent_dim,
            self.dtype(),
            &self.device,
        )?;
        self.path_terms(&y, &noise)
    }

    /// [`LatentModel::posterior_terms_coded`] with path `p` of row `i` drawing from the
    /// generator keyed by `(row_keys[i], p)`: a row's terms do not depend on the chunk or
    /// process that evaluates it.
    pub(crate) fn posterior_terms_keyed(
        &self,
        rows: &[f64],
        paths: usize,
        seed: u64,
        row_keys: &[u64],
    ) -> Result<PathTerms> {
        self.posterior_terms_stream(rows, paths, seed, streams::EVAL_ROWS, row_keys)
    }

    /// [`LatentModel::posterior_terms_keyed`] on generator stream `stream`.
    pub(crate) fn posterior_terms_stream(
        &self,
        rows: &[f64],
        paths: usize,
        seed: u64,
        stream: u64,
        row_keys: &[u64],
    ) -> Result<PathTerms> {
        let cw = self.layout.coded_width();
        if rows.len() != row_keys.len() * cw || rows.is_empty() {
            return Err(Error::shape(
                "coded rows (one key per row)",
                row_keys.len() * cw,
                rows.len(),
            ));
        }
        let mut rep = Vec::with_capacity(rows.len() * paths);
        let mut keys = Vec::with_capacity(row_keys.len() * paths);
        for (row, &k) in rows.chunks_exact(cw).zip(row_keys) {
            for p in 0..paths {
                rep.extend_from_slice(row);
                keys.push(key2(k, p as u64));
            }
        }
        let y = self.coded_tensor(&rep, keys.len())?;
        let noise = self.cfg.solver.sample_noise_keyed(
            seed,
            stream,
            &keys,
            self.latent_dim,
            self.dtype(),
            &self.device,
        )?;
        self.path_terms(&y, &noise)
    }

    /// Draws `n` rows from the model: the prior SDE from `Z_0 = 0`, then the continuous
    /// cells `y = m(Z_T) + s ε` (standardised) and each categorical cell from its softmax
    /// (as the index of its level). No autodiff graph is built. Row-major `(n, D)`:
    /// continuous cells first, then categorical ones (see [`RowLayout`]).
    ///
    /// # Errors
    /// [`Error::Candle`] on tensor errors.
    pub fn generate(&self, n: usize, rng: &mut dyn RngCore) -> Result<Vec<f64>> {
        let noise =
            self.cfg
                .solver
                .sample_noise(rng, n, self.latent_dim, self.dtype(), &self.device)?;
        let dd = self.layout.continuous;
        let eps = Tensor::from_vec(standard_normals(rng, n * dd), (n, dd), &self.device)?
            .to_dtype(self.dtype())?;
        let (mut y, logits) = run_deep(|| frozen(|| self.generate_frozen(n, &noise, &eps)))??;
        if let Some(mix) = self.noise_mixture()? {
            // With a noise mixture `generate_frozen` returned the means: add each row's
            // component, drawn from the weights, and its noise `δ_k + P_k⁻¹ ε`.
            let eps = eps.to_dtype(DType::F64)?.flatten_all()?.to_vec1::<f64>()?;
            let weights: Vec<f64> = mix.log_weights.iter().map(|l| l.exp()).collect();
            let dd2 = dd * dd;
            for i in 0..n {
                let k = pick(&weights, crate::util::rng::uniform(rng));
                let f = &mix.factors[k * dd2..(k + 1) * dd2];
                for a in 0..dd {
                    let noise: f64 = (0..=a).map(|b| f[a * dd + b] * eps[i * dd + b]).sum();
                    y[i * dd + a] += mix.offsets[k * dd + a] + noise;
                }
            }
        }
        if self.layout.levels.is_empty() {
            return Ok(y);
        }
        let ow = self.layout.output_width();
        let mut out = Vec::with_capacity(n * self.layout.columns());
        for i in 0..n {
            out.extend_from_slice(&y[i * dd..(i + 1) * dd]);
            let mut at = dd;
            for &k in &self.layout.levels {
                let level = draw_level(&logits[i * ow + at..i * ow + at + k], rng);
                out.push(level as f64);
                at += k;
            }
        }
        Ok(out)
    }

    fn generate_frozen(
        &self,
        n: usize,
        noise: &BrownianIncrements,
        eps: &Tensor,
    ) -> Result<(Vec<f64>, Vec<f64>)> {
        let nets = &self.nets;
        let sde = Sde::new(&nets.diffusion).with_prior(nets.prior.as_ref());
        let x0 = Tensor::zeros((n, self.latent_dim), self.dtype(), &self.device)?;
        let p = simulate(&sde, &self.cfg.solver, &x0, noise, None)?;
        let out = nets.nll.gaussian.decoder.forward(&p.end)?;
        let mean = if self.layout.levels.is_empty() {
            out.clone()
        } else {
            out.narrow(1, 0, self.layout.continuous)?
        };
        let dd = self.layout.continuous;
        let f = |t: Tensor| -> Result<Vec<f64>> {
            Ok(t.to_dtype(DType::F64)?.flatten_all()?.to_vec1::<f64>()?)
        };
        if nets.nll.mixture.is_some() {
            // The caller adds the mixture's noise.
            let logits = if self.layout.levels.is_empty() {
                Vec::new()
            } else {
                f(out)?
            };
            return Ok((f(mean)?, logits));
        }
        // y = m + P⁻¹ ε, i.e. rows e P⁻ᵀ.
        let factor = Tensor::from_vec(nets.nll.gaussian.noise_factor()?, (dd, dd), &self.device)?
            .to_dtype(self.dtype())?;
        let y = (mean + eps.matmul(&factor.t()?)?)?;
        let logits = if self.layout.levels.is_empty() {
            Vec::new()
        } else {
            f(out)?
        };
        Ok((f(y)?, logits))
    }

    /// The continuous cells' noise mixture in f64 (`None` for a single Gaussian).
    pub(crate) fn noise_mixture(&self) -> Result<Option<noise_mixture::MixtureValues>> {
        self.nets
            .nll
            .mixture
            .as_ref()
            .map(|m| m.values())
            .transpose()
    }

    /// The noise covariance's factor `P⁻¹` of the continuous cells (f64, row-major), so
    /// `y − m(z) ~ N(0, P⁻¹P⁻ᵀ)`.
    pub(crate) fn noise_factor(&self) -> Result<Vec<f64>> {
        self.nets.nll.gaussian.noise_factor()
    }
}

/// A level drawn from the softmax of `logits` with one uniform draw from `rng`.
pub(crate) fn draw_level(logits: &[f64], rng: &mut dyn RngCore) -> usize {
    pick(&softmax(logits), crate::util::rng::uniform(rng))
}

/// The index that a uniform draw `u` in `[0, 1)` selects from probabilities `p` (inverse
/// transform of the cumulative sums; the last index when rounding leaves `u` above them).
pub(crate) fn pick(p: &[f64], u: f64) -> usize {
    let mut acc = 0.0;
    for (i, x) in p.iter().enumerate() {
        acc += x;
        if u < acc {
            return i;
        }
    }
    p.len().saturating_sub(1)
}

/// `softmax(logits)`, computed stably.
pub(crate) fn softmax(logits: &[f64]) -> Vec<f64> {
    let max = logits.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let e: Vec<f64> = logits.iter().map(|l| (l - max).exp()).collect();
    let s: f64 = e.iter().sum();
    e.into_iter().map(|v| v / s).collect()
}
