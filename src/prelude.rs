//! The names most programs need: `use neural_sde::prelude::*;`.
//!
//! # Example
//! ```
//! use std::sync::Arc;
//! use neural_sde::prelude::*;
//! use neural_sde::GaussianMixture;
//!
//! // Train a control that samples a two-component mixture, then estimate its log Z (= 0).
//! let target = Arc::new(GaussianMixture::new(vec![vec![1.0, 0.0], vec![-1.0, 0.0]], 0.8)?);
//! let cfg = SamplerConfig {
//!     batch_size: 64,
//!     iterations: 30,
//!     solver: SolverConfig { n_steps: 10, ..Default::default() },
//!     optimizer: OptimizerConfig::constant(1e-2),
//!     ..Default::default()
//! };
//! let mut sampler = Sampler::new(target, cfg)?;
//! println!("{}", sampler.fit()?);
//! let est = sampler.estimate(EstimateOptions::new(1024, 1))?;
//! assert!((est.log_z).abs() < 4.0 * est.log_z_se + 0.05, "{est}");
//! # Ok::<(), Error>(())
//! ```

pub use crate::{
    generator, simulate, Diffusion, Drift, Error, EstimateOptions, EvalOptions, FreeEnergy,
    LatentConfig, MlpConfig, OptimizerConfig, ParamBuilder, Result, Sampler, SamplerConfig, Sde,
    SolverConfig, Table, TabularModel, TimeMlp, TrainConfig, Trainer,
};
