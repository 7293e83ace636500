//! The tabular application: tables (CSV, standardisation, seeded splits, the demo table),
//! the latent-diffusion model, its trainer, the fitted model and its checkpoint contents, and
//! the classical baseline it is measured against (Gaussian mixtures); column types and
//! missing cells, and imputation.

pub(crate) mod coding;
pub(crate) mod compare;
#[cfg(feature = "csv")]
pub(crate) mod csv_io;
pub(crate) mod demo;
pub(crate) mod ensemble;
pub(crate) mod ensemble_file;
pub(crate) mod ensemble_impute;
pub(crate) mod ensemble_trainer;
pub(crate) mod evaluation;
pub(crate) mod fitted;
pub(crate) mod impute;
pub(crate) mod mixture;
pub(crate) mod model;
pub(crate) mod scaler;
pub(crate) mod schema;
pub(crate) mod split;
pub(crate) mod stacking;
pub(crate) mod summary;
#[cfg(feature = "csv")]
pub(crate) mod survey;
pub(crate) mod table;
pub(crate) mod train;
