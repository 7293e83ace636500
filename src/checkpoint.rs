//! One `.safetensors` file per model: weights, optimiser moments, best weights, and a JSON
//! header with everything else. The file is plain safetensors, readable by any reader.
//!
//! Layout: tensors `<name>` hold the model weights (the names of [`crate::LatentModel`]),
//! `optim.m.<name>` / `optim.v.<name>` the AdamW moments and `best.<name>` the best weights
//! seen. The safetensors metadata holds `format` (`neural-sde-model`), `format_version`
//! (`1`), `crate_version` and `header`: JSON with the model and training configuration, the
//! scaler, the column names, the training state (epoch, step, generator states) and the
//! history.

use std::collections::HashMap;
use std::io::Write;
use std::path::{Path, PathBuf};

use candle_core::{DType, Device, Tensor};
use serde::{Deserialize, Serialize};

use crate::data::Standardizer;
use crate::error::{Error, Result};
use crate::latent::{LatentConfig, LatentModel, PriorFactory};
use crate::optim::AdamW;
use crate::params::sorted_vars;
use crate::tabular::TabularModel;
use crate::train::{History, TrainConfig, TrainState};

/// Value of the `format` metadata entry.
pub const FORMAT: &str = "neural-sde-model";
/// Value of the `format_version` metadata entry written by this version.
pub const FORMAT_VERSION: &str = "1";

/// Writes `bytes` to `path` atomically: a temporary file in the same folder, flushed to
/// disk, then renamed over `path`. A crash or kill during the write leaves any previous file
/// intact.
///
/// # Errors
/// [`crate::Error::Io`] if the folder is not writable.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "output".into());
    let tmp = dir.join(format!(".{name}.tmp-{}", std::process::id()));
    let result = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    Ok(result?)
}

#[derive(Serialize, Deserialize)]
struct Header {
    model_config: LatentConfig,
    data_dim: usize,
    columns: Vec<String>,
    scaler: Standardizer,
    history: History,
    train_config: Option<TrainConfig>,
    state: Option<TrainState>,
    optimizer_steps: Option<u64>,
}

/// The training parts of a checkpoint.
pub(crate) struct TrainingParts<'a> {
    pub config: &'a TrainConfig,
    pub state: &'a TrainState,
    pub optimizer: &'a AdamW,
    pub best: &'a [(String, Tensor)],
}

/// What [`read`] returns.
pub(crate) struct Checkpoint {
    pub model: TabularModel,
    pub train_config: Option<TrainConfig>,
    pub state: Option<TrainState>,
    pub optimizer: Option<HashMap<String, Tensor>>,
    pub optimizer_steps: u64,
    pub best: Option<Vec<(String, Tensor)>>,
}

pub(crate) fn write(
    path: &Path,
    model: &TabularModel,
    training: Option<TrainingParts<'_>>,
) -> Result<()> {
    let mut tensors: Vec<(String, Tensor)> = sorted_vars(model.model.varmap())?
        .into_iter()
        .map(|(n, v)| (n, v.as_tensor().clone()))
        .collect();
    if let Some(t) = &training {
        for (n, m) in t.optimizer.state_tensors() {
            tensors.push((format!("optim.{n}"), m));
        }
        for (n, b) in t.best {
            tensors.push((format!("best.{n}"), b.clone()));
        }
    }
    let header = Header {
        model_config: model.model.config().clone(),
        data_dim: model.model.data_dim(),
        columns: model.columns.clone(),
        scaler: model.scaler.clone(),
        history: model.history.clone(),
        train_config: training.as_ref().map(|t| t.config.clone()),
        state: training.as_ref().map(|t| t.state.clone()),
        optimizer_steps: training.as_ref().map(|t| t.optimizer.steps()),
    };
    let mut meta = HashMap::new();
    meta.insert("format".to_string(), FORMAT.to_string());
    meta.insert("format_version".to_string(), FORMAT_VERSION.to_string());
    meta.insert(
        "crate_version".to_string(),
        env!("CARGO_PKG_VERSION").to_string(),
    );
    meta.insert("header".to_string(), serde_json::to_string(&header)?);
    let bytes =
        safetensors::tensor::serialize(tensors, Some(meta)).map_err(|e| Error::Checkpoint {
            path: path.to_path_buf(),
            reason: format!("cannot serialise: {e}"),
        })?;
    write_atomic(path, &bytes)
}

/// What [`inspect`] reports about a checkpoint, without building the model.
#[derive(Debug, Clone)]
pub struct Summary {
    /// Version of the crate that wrote the file.
    pub crate_version: String,
    /// Column names.
    pub columns: Vec<String>,
    /// Standardisation.
    pub scaler: Standardizer,
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

/// Reads a checkpoint's header and checks its tensors (as loading does).
///
/// # Errors
/// [`Error::Checkpoint`] naming what is wrong with the file.
pub fn inspect(path: &Path) -> Result<Summary> {
    let (bytes, header) = read_header(path)?;
    let st = safetensors::SafeTensors::deserialize(&bytes).map_err(|e| Error::Checkpoint {
        path: path.to_path_buf(),
        reason: format!("not a valid safetensors file, or truncated ({e})"),
    })?;
    let crate_version = safetensors::SafeTensors::read_metadata(&bytes)
        .ok()
        .and_then(|(_, m)| {
            m.metadata()
                .as_ref()
                .and_then(|m| m.get("crate_version").cloned())
        })
        .unwrap_or_else(|| "unknown".into());
    let parameters = st
        .tensors()
        .iter()
        .filter(|(n, _)| !n.starts_with("optim.") && !n.starts_with("best."))
        .map(|(_, v)| v.shape().iter().product::<usize>())
        .sum();
    Ok(Summary {
        crate_version,
        columns: header.columns,
        scaler: header.scaler,
        model_config: header.model_config,
        train_config: header.train_config,
        state: header.state,
        parameters,
        history: header.history,
    })
}

/// Reads the file and checks its format and header.
fn read_header(path: &Path) -> Result<(Vec<u8>, Header)> {
    let bad = |reason: String| Error::Checkpoint {
        path: path.to_path_buf(),
        reason,
    };
    let bytes = crate::error::read_file(path).map_err(bad)?;
    // Validates the whole layout, so a truncated file is caught here.
    safetensors::SafeTensors::deserialize(&bytes)
        .map_err(|e| bad(format!("not a valid safetensors file, or truncated ({e}); use a file written by `neural-sde fit`")))?;
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes)
        .map_err(|e| bad(format!("unreadable header ({e})")))?;
    let meta = md.metadata().as_ref().ok_or_else(|| {
        bad("no metadata: this safetensors file was not written by neural-sde".into())
    })?;
    match meta.get("format").map(String::as_str) {
        Some(FORMAT) => {}
        other => {
            return Err(bad(format!(
            "format is {other:?}, expected \"{FORMAT}\": this file was not written by neural-sde"
        )))
        }
    }
    match meta.get("format_version").map(String::as_str) {
        Some(FORMAT_VERSION) => {}
        other => {
            return Err(bad(format!(
                "format version {other:?} is not supported (this build reads version {FORMAT_VERSION}); use a matching neural-sde version"
            )))
        }
    }
    let header: Header = serde_json::from_str(
        meta.get("header")
            .ok_or_else(|| bad("the metadata has no `header` entry".into()))?,
    )
    .map_err(|e| bad(format!("the header is not valid ({e})")))?;
    if header.columns.len() != header.data_dim
        || header.scaler.mean.len() != header.data_dim
        || header.scaler.scale.len() != header.data_dim
    {
        return Err(bad(format!(
            "the header is inconsistent: {} columns, {} scaler entries, data dimension {}",
            header.columns.len(),
            header.scaler.mean.len(),
            header.data_dim
        )));
    }
    Ok((bytes, header))
}

pub(crate) fn read(path: &Path, factory: Option<&PriorFactory>) -> Result<Checkpoint> {
    let bad = |reason: String| Error::Checkpoint {
        path: path.to_path_buf(),
        reason,
    };
    let (bytes, header) = read_header(path)?;
    let st = safetensors::SafeTensors::deserialize(&bytes)
        .map_err(|e| bad(format!("not a valid safetensors file, or truncated ({e})")))?;
    match (header.model_config.custom_prior, factory.is_some()) {
        (true, false) => {
            return Err(bad(
                "this model uses a custom prior drift; load it from Rust with `TabularModel::load_with_prior` and the same builder".into(),
            ))
        }
        (false, true) => {
            return Err(bad("this model uses the built-in prior drift; load it with `TabularModel::load`".into()))
        }
        _ => {}
    }
    let dev = Device::Cpu;
    let want_dtype = header.model_config.precision.dtype();
    let st_dtype = match want_dtype {
        DType::F64 => safetensors::Dtype::F64,
        _ => safetensors::Dtype::F32,
    };
    let mut file: HashMap<String, Tensor> = HashMap::new();
    for (name, view) in st.tensors() {
        if view.dtype() != st_dtype {
            return Err(bad(format!(
                "tensor {name} has dtype {:?}, expected {st_dtype:?}",
                view.dtype()
            )));
        }
        let t = candle_core::safetensors::Load::load(&view, &dev)
            .map_err(|e| bad(format!("tensor {name} cannot be read ({e})")))?;
        file.insert(name, t);
    }
    // Rebuild the model, then copy every weight in after checking its shape.
    let model = LatentModel::build(&header.model_config, header.data_dim, 0, factory)
        .map_err(|e| bad(format!("the stored configuration is invalid ({e})")))?;
    let vars = sorted_vars(model.varmap())?;
    for (name, var) in &vars {
        let t = file
            .get(name)
            .ok_or_else(|| bad(format!("tensor {name} is missing")))?;
        if t.dims() != var.dims() {
            return Err(bad(format!(
                "tensor {name} has shape {:?}, expected {:?}",
                t.dims(),
                var.dims()
            )));
        }
        var.set(t)?;
    }
    for name in file.keys() {
        let base = name
            .strip_prefix("optim.m.")
            .or_else(|| name.strip_prefix("optim.v."))
            .or_else(|| name.strip_prefix("best."))
            .unwrap_or(name);
        if !vars.iter().any(|(n, _)| n == base) {
            return Err(bad(format!(
                "unexpected tensor {name}: it does not belong to this model"
            )));
        }
    }
    let mut optimizer = HashMap::new();
    let mut best = Vec::new();
    for (name, var) in &vars {
        for p in ["m", "v"] {
            if let Some(t) = file.get(&format!("optim.{p}.{name}")) {
                optimizer.insert(format!("{p}.{name}"), t.clone());
            }
        }
        if let Some(t) = file.get(&format!("best.{name}")) {
            if t.dims() != var.dims() {
                return Err(bad(format!(
                    "tensor best.{name} has shape {:?}, expected {:?}",
                    t.dims(),
                    var.dims()
                )));
            }
            best.push((name.clone(), t.clone()));
        }
    }
    let has_training = header.state.is_some();
    if has_training && (optimizer.len() != 2 * vars.len() || best.len() != vars.len()) {
        return Err(bad(
            "the training state is incomplete (optimiser moments or best weights missing)".into(),
        ));
    }
    Ok(Checkpoint {
        model: TabularModel {
            model,
            scaler: header.scaler,
            columns: header.columns,
            history: header.history,
        },
        train_config: header.train_config,
        state: header.state,
        optimizer: has_training.then_some(optimizer),
        optimizer_steps: header.optimizer_steps.unwrap_or(0),
        best: has_training.then_some(best),
    })
}
