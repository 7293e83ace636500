//! The names most programs need: `use neural_sde::prelude::*;`.

pub use crate::{
    generator, simulate, AdamW, AdamWConfig, Diffusion, Drift, Error, FreeEnergy, LatentConfig,
    MlpConfig, ParamBuilder, Result, Sampler, SamplerConfig, Sde, SolverConfig, Table,
    TabularModel, TimeMlp, TrainConfig, Trainer,
};
