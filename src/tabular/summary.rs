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
    /// The member's weight in its ensemble (1 for a file of one model).
    pub weight: f64,
}

/// Reads a checkpoint's header and checks its container, without building the model. For an
/// ensemble's file, the first member's summary (see [`inspect_members`]).
///
/// # Errors
/// [`crate::error::Error::Checkpoint`] naming what is wrong with the file.
pub fn inspect_checkpoint(path: impl AsRef<Path>) -> Result<CheckpointSummary> {
    let mut all = inspect_members(path)?;
    Ok(all.swap_remove(0))
}

/// Reads a model file's header and checks its container, without building any model: one
/// summary per member of an ensemble's file (with the member's weight), or one for a
/// single model's file (weight 1).
///
/// # Errors
/// [`crate::error::Error::Checkpoint`] naming what is wrong with the file (and the member).
pub fn inspect_members(path: impl AsRef<Path>) -> Result<Vec<CheckpointSummary>> {
    use crate::tabular::ensemble_file;
    let path = path.as_ref();
    let raw = crate::nn::checkpoint::read_raw(path)?;
    if raw.format != ensemble_file::ENSEMBLE_FORMAT {
        let stored = raw.single(path, FORMAT)?;
        return Ok(vec![summary_of(stored, FORMAT, &raw.crate_version, 1.0)?]);
    }
    let header = ensemble_file::read_header(path, &raw)?;
    let total: f64 = header.weights.iter().sum();
    let mut m = 0;
    ensemble_file::read_members(path, &raw, &header, |stored| {
        m += 1;
        summary_of(
            stored,
            ensemble_file::ENSEMBLE_FORMAT,
            &raw.crate_version,
            header.weights[m - 1] / total,
        )
    })
}

fn summary_of(
    stored: crate::nn::checkpoint::Stored<'_>,
    format: &'static str,
    crate_version: &str,
    weight: f64,
) -> Result<CheckpointSummary> {
    let path = stored.path;
    let model: ModelHeader = crate::nn::checkpoint::parse_header(path, stored.header)?;
    model
        .check()
        .map_err(|reason| crate::error::Error::Checkpoint {
            path: path.to_path_buf(),
            reason,
        })?;
    let training: TrainingHeader = crate::nn::checkpoint::parse_header(path, stored.header)?;
    let parameters = crate::nn::checkpoint::tensor_sizes_under(path, stored.bytes, stored.prefix)?
        .into_iter()
        .filter(|(n, _)| {
            !crate::tabular::fitted::TRAINING_PREFIXES
                .iter()
                .any(|p| n.starts_with(p))
        })
        .map(|(_, s)| s)
        .sum();
    Ok(CheckpointSummary {
        format,
        format_version: crate::nn::checkpoint::FORMAT_VERSION,
        crate_version: crate_version.to_string(),
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
        weight,
    })
}
