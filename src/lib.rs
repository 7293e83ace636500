//! # neural-sde
//!
//! Train neural stochastic differential equation models on CPU.
//!
//! A latent path `dZ = b(Z, t) dt + σ dW` on `[0, T]`, whose drift `b` is a neural network,
//! is simulated with a differentiable fixed-grid solver ([`simulate`]); adding a control `u`
//! to the drift gives a controlled process whose KL divergence from the uncontrolled one is
//! the control cost `E[½ ∫ |u|²/σ² dt]` (Girsanov's theorem). Minimising control cost plus a
//! terminal cost `g(X_T)` ([`FreeEnergy`]) gives the free energy `−log E[exp(−g)]`:
//! variational inference when `g = −log p(y | ·)`, sampling of an unnormalised density π
//! when `g = −log(dπ/dγ)` ([`Sampler`]).
//!
//! ## Quick start: a learned control trained with a candle-nn optimiser
//!
//! Parameters are ordinary candle `Var`s in a `VarMap`, so candle-nn's optimisers work as
//! they are. (The crate's own [`AdamW`] does the same update and can save its moments, which
//! checkpoints need.)
//!
//! ```
//! use candle_core::{DType, Device, Tensor};
//! use candle_nn::{Optimizer, ParamsAdamW, VarMap};
//! use neural_sde::*;
//!
//! // Terminal cost g(x) = −log N(y; x, I) with y = (1, 1); control = a small MLP.
//! let dev = Device::Cpu;
//! let vm = VarMap::new();
//! let pb = ParamBuilder::new(&vm, DType::F32, &dev).pp("control");
//! let control = TimeMlp::new(&MlpConfig::default(), 2, 0, &pb, &mut generator(0, 1))?;
//! let terminal = GaussianNll::fixed(&[1.0, 1.0], DType::F32, &dev)?;
//! let y = Tensor::ones((128, 2), DType::F32, &dev)?;
//! let sigma = Diffusion::constant(1.0)?;
//! let cfg = SolverConfig { n_steps: 20, ..Default::default() };
//! let params = ParamsAdamW { lr: 1e-2, weight_decay: 0.0, ..Default::default() };
//! let mut opt = candle_nn::AdamW::new(vm.all_vars(), params)?;
//! let mut rng = generator(0, 2);
//! let mut losses = Vec::new();
//! for _ in 0..60 {
//!     let noise = cfg.sample_noise(&mut rng, 128, 2, DType::F32, &dev)?;
//!     let x0 = Tensor::zeros((128, 2), DType::F32, &dev)?;
//!     let sde = Sde::new(&sigma).with_control(&control);
//!     let paths = simulate(&sde, &cfg, &x0, &noise, None)?;
//!     let fe = FreeEnergy::new(&paths, &terminal, Some(&y))?;
//!     losses.push(fe.values()?.loss);
//!     opt.backward_step(&fe.loss)?;
//! }
//! // The free energy is −log p(y) = log(4π) + |y|²/4 = 3.03 for y ~ N(0, 2I); training
//! // moves the objective from E[−log N(y; W_1, I)] = 3.84 toward it.
//! let early: f64 = losses[..10].iter().sum::<f64>() / 10.0;
//! let late: f64 = losses[50..].iter().sum::<f64>() / 10.0;
//! assert!(late < early);
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```
//!
//! ## Fitting a table
//!
//! [`Trainer`] fits the latent-diffusion model of [`LatentModel`] to a [`Table`];
//! [`TabularModel`] evaluates (ELBO and importance-weighted log-likelihood in the data's
//! units), generates rows and is saved as one safetensors file. See the [`Trainer`] example.
//! Tables may have categorical columns and missing cells ([`Table::from_csv_typed`],
//! [`ColumnRules`], [`RowLayout`]); [`TabularModel::impute`] fills missing cells and
//! [`TabularModel::generate_given`] draws rows under conditions; [`compare_samples`] measures
//! generated rows against data. [`Ensemble`] combines several fitted models of one table
//! (fits of different seeds, say) as the mixture of their densities, and evaluates,
//! generates, imputes and saves like one model; [`EnsembleTrainer`] trains its members in
//! turn and resumes them exactly (the `fit` command's default is two to four members, by
//! the table's size).
//!
//! ## Speed: the fused kernel
//!
//! When every drift is a built-in network ([`TimeMlp`], or the tabular model's control), σ is
//! fixed and the scheme is Euler–Maruyama, [`simulate`] runs the whole path as one operation
//! with a hand-written backward pass instead of recording autodiff nodes per layer and step
//! (see [`Kernel`]); values and gradients agree with the generic path
//! up to rounding. Custom drifts go through candle's generic autodiff.
//!
//! ## Threads and stack
//!
//! Set `RAYON_NUM_THREADS`: when it is unset, candle re-reads the CPU count on every matrix
//! product. The fused kernel runs blocks of 128 paths in parallel on that pool (results do
//! not depend on the thread count); candle's own matrix products are fastest on one thread at
//! the usual small sizes. Library entry points that build whole-path
//! autodiff graphs run them on a thread with a large stack ([`run_deep`]), since candle's
//! backward pass and graph drop are recursive; do the same when you call
//! `backward()` yourself on paths of thousands of steps.

#![deny(missing_docs)]
#![deny(missing_debug_implementations)]
#![deny(unsafe_code)]

pub mod collective;
mod error;
mod nn;
#[cfg(feature = "plot")]
pub mod plot;
pub mod prelude;
mod sampler;
mod sde;
mod tabular;
mod util;

pub use collective::{Collective, SingleProcess};
pub use error::{Error, Result};
pub use nn::ops::{self, Activation};
pub use nn::optim::{AdamW, AdamWConfig, StepStats};
pub use nn::params::{frozen, is_frozen, sorted_vars, Param, ParamBuilder};
pub use nn::recovery::RecoveryState;
pub use nn::schedule::OptimizerConfig;
pub use nn::termination::Termination;
pub use sampler::ratio::LogDensityRatio;
pub use sampler::target::{FnDensity, GaussianDensity, GaussianMixture, LogDensity};
pub use sampler::{
    estimate_log_z, EstimateOptions, FollmerDrift, LogZEstimate, Sampler, SamplerConfig,
    SamplerObserver, SamplerRecord, SamplerReport, SamplerState,
};
pub use sde::diffusion::Diffusion;
pub use sde::drift::{Drift, FnDrift, MlpConfig, ModuleDrift, TimeMlp};
pub use sde::noise::BrownianIncrements;
pub use sde::objective::{FreeEnergy, FreeEnergyValues};
pub use sde::solver::{simulate, Kernel, Paths, Scheme, Sde, SolverConfig};
pub use sde::terminal::{BernoulliNll, GaussianNll, TerminalCost};
pub use tabular::compare::{compare_samples, ColumnComparison, CompareOptions, SampleComparison};
#[cfg(feature = "csv")]
pub use tabular::csv_io::HeaderLine;
pub use tabular::demo::{builtin_demo, demo_table, DEMO_COLUMNS, DEMO_ROWS, DEMO_SEED};
pub use tabular::ensemble::Ensemble;
pub use tabular::ensemble_file::{MAX_MEMBERS, MAX_MODELS};
pub use tabular::ensemble_trainer::{EnsembleTrainer, StartComparison};
pub use tabular::evaluation::{EvalOptions, Evaluation};
pub use tabular::fitted::TabularModel;
pub use tabular::impute::{CellEstimate, Imputation, ImputeOptions};
pub use tabular::mixture::{Covariance, MixtureModel, MixtureOptions};
pub use tabular::model::{
    Decoder, DecoderConfig, DecoderKind, LatentConfig, LatentModel, PathTerms, PriorFactory,
    RowLayout,
};
pub use tabular::scaler::Standardizer;
pub use tabular::schema::{ColumnKind, ColumnRules, Schema};
pub use tabular::stacking::stacking_weight;
pub use tabular::summary::{inspect_checkpoint, inspect_members, CheckpointSummary};
pub use tabular::table::{write_draws_csv, Table};
pub use tabular::train::{
    EpochRecord, History, Observer, StepInfo, TrainConfig, TrainReport, TrainState, Trainer,
    VALIDATION_LOGLIK_PATHS,
};
pub use util::fs::writable_destination;
pub use util::limits;
pub use util::precision::Precision;
pub use util::rng::{generator, standard_normals, Generator};
pub use util::stack::{run_deep, DEEP_STACK_BYTES};
pub use util::threads::set_threads;

/// The README's code blocks, compiled and run as doctests.
#[cfg(doctest)]
#[doc = include_str!("../README.md")]
struct ReadmeDoctests;
