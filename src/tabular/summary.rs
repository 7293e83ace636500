//! What a checkpoint holds, read from its header without building the model.

use std::path::Path;

use crate::error::Result;
use crate::tabular::fitted::{ModelHeader, FORMAT};
use crate::tabular::model::LatentConfig;
use crate::tabular::scaler::Standardizer;
use crate::tabular::train::history::History;
use crate::tabular::train::{TrainConfig, TrainState, TrainingHeader};

/// What [`inspect_checkpoint`] reports about a checkpoint.
#[derive(Debug, Clone)]
pub struct CheckpointSummary {
    /// Value of the file's `format` entry.
    pub format: &'static str,
    /// Version of the file format.
    pub format_version: &'static str,
    /// Version of the crate that wrote the file.
    pub crate_version: String,
    /// Column names.
    pub columns: Vec<String>,
    /// Standardisation of the continuous columns, in column order.
    pub scaler: Standardizer,
    /// Column types.
    pub schema: crate::tabular::schema::Schema,
    /// Model configuration.
    pub model_config: LatentConfig,
    /// Training configuration, when the file holds a training state.
    pub train_config: Option<TrainConfig>,
    /// Training state, when stored.
    pub state: Option<TrainState>,
    /// Number of model parameters.
    pub parameters: usize,
    /// Training history.
    pub history: History,
}

/// Reads a checkpoint's header and checks its container, without building the model.
///
/// # Errors
/// [`crate::error::Error::Checkpoint`] naming what is wrong with the file.
pub fn inspect_checkpoint(path: impl AsRef<Path>) -> Result<CheckpointSummary> {
    let path = path.as_ref();
    let (bytes, crate_version, model): (_, _, ModelHeader) =
        crate::nn::checkpoint::read_header(path, FORMAT)?;
    model
        .check()
        .map_err(|reason| crate::error::Error::Checkpoint {
            path: path.to_path_buf(),
            reason,
        })?;
    let (_, _, training): (_, _, TrainingHeader) =
        crate::nn::checkpoint::read_header(path, FORMAT)?;
    let parameters = crate::nn::checkpoint::tensor_sizes(path, &bytes)?
        .into_iter()
        .filter(|(n, _)| {
            !crate::tabular::fitted::TRAINING_PREFIXES
                .iter()
                .any(|p| n.starts_with(p))
        })
        .map(|(_, s)| s)
        .sum();
    Ok(CheckpointSummary {
        format: FORMAT,
        format_version: crate::nn::checkpoint::FORMAT_VERSION,
        crate_version,
        schema: model
            .schema
            .unwrap_or_else(|| crate::tabular::schema::Schema::continuous(model.data_dim)),
        columns: model.columns,
        scaler: model.scaler,
        model_config: model.model_config,
        train_config: training.train_config,
        state: training.state,
        parameters,
        history: model.history,
    })
}
