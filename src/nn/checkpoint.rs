//! The checkpoint file format: one plain `.safetensors` file holding named tensors and, in
//! its metadata, `format` (what kind of object the file holds), `format_version`,
//! `crate_version` and `header` (JSON). Models and trainers decide which tensors and which
//! header fields they store; this module only writes, reads and checks the container.

use std::collections::HashMap;
use std::path::Path;

use candle_core::{DType, Device, Tensor};
use serde::de::DeserializeOwned;
use serde::Serialize;

use crate::error::{Error, Result};

/// Value of the `format_version` metadata entry written by this version.
pub(crate) const FORMAT_VERSION: &str = "1";

fn bad(path: &Path, reason: String) -> Error {
    Error::Checkpoint {
        path: path.to_path_buf(),
        reason,
    }
}

/// Writes `tensors` and `header` atomically to `path` as a file of kind `format`.
///
/// # Errors
/// [`Error::Checkpoint`] if the tensors cannot be serialised; [`Error::Io`] if the file
/// cannot be written.
pub(crate) fn write(
    path: &Path,
    format: &str,
    tensors: Vec<(String, Tensor)>,
    header: &impl Serialize,
) -> Result<()> {
    let mut meta = HashMap::new();
    meta.insert("format".to_string(), format.to_string());
    meta.insert("format_version".to_string(), FORMAT_VERSION.to_string());
    meta.insert(
        "crate_version".to_string(),
        env!("CARGO_PKG_VERSION").to_string(),
    );
    meta.insert("header".to_string(), serde_json::to_string(header)?);
    let bytes = safetensors::tensor::serialize(tensors, Some(meta))
        .map_err(|e| bad(path, format!("cannot serialise: {e}")))?;
    crate::util::fs::write_atomic(path, &bytes)
}

/// Reads the whole file, checks the container and its `format`, and parses the header as
/// `H`. Returns the raw bytes (for [`read_tensors`]), the crate version that wrote the file
/// and the header.
///
/// # Errors
/// [`Error::Checkpoint`] naming what is wrong with the file.
pub(crate) fn read_header<H: DeserializeOwned>(
    path: &Path,
    format: &str,
) -> Result<(Vec<u8>, String, H)> {
    let bytes = crate::util::fs::read_file(path).map_err(|r| bad(path, r))?;
    // Validates the whole layout, so a truncated file is caught here.
    safetensors::SafeTensors::deserialize(&bytes).map_err(|e| {
        bad(
            path,
            format!("not a valid safetensors file, or truncated ({e}); use a file written by `neural-sde fit`"),
        )
    })?;
    let (_, md) = safetensors::SafeTensors::read_metadata(&bytes)
        .map_err(|e| bad(path, format!("unreadable header ({e})")))?;
    let meta = md.metadata().as_ref().ok_or_else(|| {
        bad(
            path,
            "no metadata: this safetensors file was not written by neural-sde".into(),
        )
    })?;
    match meta.get("format").map(String::as_str) {
        Some(f) if f == format => {}
        other => {
            return Err(bad(
                path,
                format!(
                "format is {other:?}, expected \"{format}\": this file was not written by neural-sde"
            ),
            ))
        }
    }
    match meta.get("format_version").map(String::as_str) {
        Some(FORMAT_VERSION) => {}
        other => {
            return Err(bad(path, format!(
                "format version {other:?} is not supported (this build reads version {FORMAT_VERSION}); use a matching neural-sde version"
            )))
        }
    }
    let crate_version = meta
        .get("crate_version")
        .cloned()
        .unwrap_or_else(|| "unknown".into());
    let header: H = serde_json::from_str(
        meta.get("header")
            .ok_or_else(|| bad(path, "the metadata has no `header` entry".into()))?,
    )
    .map_err(|e| bad(path, format!("the header is not valid ({e})")))?;
    Ok((bytes, crate_version, header))
}

/// Number of values in each tensor of `bytes`, by name (no tensor is decoded).
///
/// # Errors
/// [`Error::Checkpoint`] for an invalid container.
pub(crate) fn tensor_sizes(path: &Path, bytes: &[u8]) -> Result<Vec<(String, usize)>> {
    let st = safetensors::SafeTensors::deserialize(bytes).map_err(|e| {
        bad(
            path,
            format!("not a valid safetensors file, or truncated ({e})"),
        )
    })?;
    Ok(st
        .tensors()
        .iter()
        .map(|(n, v)| (n.clone(), v.shape().iter().product()))
        .collect())
}

/// Decodes every tensor of `bytes`, all of which must have dtype `dtype`.
///
/// # Errors
/// [`Error::Checkpoint`] naming a tensor of another dtype or one that cannot be read.
pub(crate) fn read_tensors(
    path: &Path,
    bytes: &[u8],
    dtype: DType,
) -> Result<HashMap<String, Tensor>> {
    let st = safetensors::SafeTensors::deserialize(bytes).map_err(|e| {
        bad(
            path,
            format!("not a valid safetensors file, or truncated ({e})"),
        )
    })?;
    let st_dtype = match dtype {
        DType::F64 => safetensors::Dtype::F64,
        _ => safetensors::Dtype::F32,
    };
    let dev = Device::Cpu;
    let mut tensors = HashMap::new();
    for (name, view) in st.tensors() {
        if view.dtype() != st_dtype {
            return Err(bad(
                path,
                format!(
                    "tensor {name} has dtype {:?}, expected {st_dtype:?}",
                    view.dtype()
                ),
            ));
        }
        let t = candle_core::safetensors::Load::load(&view, &dev)
            .map_err(|e| bad(path, format!("tensor {name} cannot be read ({e})")))?;
        tensors.insert(name, t);
    }
    Ok(tensors)
}

/// Copies the tensors named like `varmap`'s variables out of `file` into them, after
/// checking each shape.
///
/// # Errors
/// [`Error::Checkpoint`] naming a missing or mis-shaped tensor.
pub(crate) fn load_vars(
    path: &Path,
    varmap: &candle_nn::VarMap,
    file: &HashMap<String, Tensor>,
) -> Result<()> {
    for (name, var) in crate::nn::params::sorted_vars(varmap)? {
        let t = file
            .get(&name)
            .ok_or_else(|| bad(path, format!("tensor {name} is missing")))?;
        if t.dims() != var.dims() {
            return Err(bad(
                path,
                format!(
                    "tensor {name} has shape {:?}, expected {:?}",
                    t.dims(),
                    var.dims()
                ),
            ));
        }
        var.set(t)?;
    }
    Ok(())
}
