//! The checkpoint file format: one plain `.safetensors` file holding named tensors and, in
//! its metadata, one entry `neural-sde` whose value is a JSON object with `format` (what
//! kind of object the file holds), `format_version`, `crate_version` and `header` (the
//! object's own JSON). Models and trainers decide which tensors and which header fields they
//! store; this module only writes, reads and checks the container.
//!
//! One metadata entry keeps the file's bytes deterministic (safetensors writes its metadata
//! map in hash order); the same training run gives the same file apart from the header's
//! `timing` field. Files of format version 1 (four metadata entries) are still read.

use std::collections::HashMap;
use std::path::Path;

use candle_core::{DType, Device, Tensor};
use serde::de::DeserializeOwned;
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

/// Value of `format_version` written by this version.
pub(crate) const FORMAT_VERSION: &str = "2";

/// The metadata entry that holds the container's JSON.
const ENTRY: &str = "neural-sde";

fn bad(path: &Path, reason: String) -> Error {
    Error::Checkpoint {
        path: path.to_path_buf(),
        reason,
    }
}

/// The container's JSON (the `neural-sde` metadata entry).
#[derive(Serialize, Deserialize)]
struct Container<H> {
    format: String,
    format_version: String,
    crate_version: String,
    header: H,
}

/// Writes `tensors` and `header` atomically to `path` as a file of kind `format`, after
/// checking that it could be read back: every tensor value is finite and `parses_back`
/// (which parses the header text as its readers do) succeeds. Nothing is written when a
/// check fails.
///
/// # Errors
/// [`Error::NonFinite`] naming a tensor with a NaN or infinite value; [`Error::Checkpoint`]
/// if the header would not parse back or the tensors cannot be serialised; [`Error::Io`] if
/// the file cannot be written.
pub(crate) fn write(
    path: &Path,
    format: &str,
    tensors: Vec<(String, Tensor)>,
    header: &impl Serialize,
    parses_back: impl Fn(&str) -> serde_json::Result<()>,
) -> Result<()> {
    for (name, t) in &tensors {
        let bad_values = t
            .flatten_all()?
            .to_dtype(DType::F64)?
            .to_vec1::<f64>()?
            .iter()
            .filter(|v| !v.is_finite())
            .count();
        if bad_values > 0 {
            return Err(Error::NonFinite {
                what: format!("tensor {name}"),
                detail: format!(
                    "{bad_values} values are NaN or infinite; {} was not written (lower the learning rate, or resume from an earlier checkpoint)",
                    path.display()
                ),
            });
        }
    }
    let text = serde_json::to_string(header)?;
    parses_back(&text).map_err(|e| {
        bad(
            path,
            format!("not written: its header would not parse back ({e}); this is a bug, please report it"),
        )
    })?;
    let container = Container {
        format: format.to_string(),
        format_version: FORMAT_VERSION.to_string(),
        crate_version: env!("CARGO_PKG_VERSION").to_string(),
        header: serde_json::value::RawValue::from_string(text)?,
    };
    let meta = HashMap::from([(ENTRY.to_string(), serde_json::to_string(&container)?)]);
    let bytes = safetensors::tensor::serialize(tensors, Some(meta))
        .map_err(|e| bad(path, format!("cannot serialise: {e}")))?;
    crate::util::fs::write_atomic(path, &bytes)
}

/// A file's container: its bytes (for [`read_tensors`]), the crate version that wrote it, the
/// kind of object it holds and that object's header JSON, unparsed.
pub(crate) struct RawFile {
    pub bytes: Vec<u8>,
    pub crate_version: String,
    pub format: String,
    pub header: Box<serde_json::value::RawValue>,
}

impl RawFile {
    /// The whole file as one object of kind `format`: its header, and its tensors under no
    /// prefix.
    ///
    /// # Errors
    /// [`Error::Checkpoint`] when the file holds another kind of object.
    pub(crate) fn single<'a>(&'a self, path: &'a Path, format: &str) -> Result<Stored<'a>> {
        expect_format(path, &self.format, format)?;
        Ok(Stored {
            path,
            bytes: &self.bytes,
            header: self.header.get(),
            prefix: "",
        })
    }
}

/// Reads the whole file and checks the container and its format version, leaving the
/// kind of object (`format`) to the caller.
///
/// # Errors
/// [`Error::Checkpoint`] naming what is wrong with the file.
pub(crate) fn read_raw(path: &Path) -> Result<RawFile> {
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
    let container: Container<Box<serde_json::value::RawValue>> = match meta.get(ENTRY) {
        Some(text) => serde_json::from_str(text)
            .map_err(|e| bad(path, format!("the header is not valid ({e})")))?,
        None if !meta.contains_key("format") => {
            return Err(bad(
                path,
                "its metadata has no neural-sde entry: this file was not written by neural-sde"
                    .into(),
            ))
        }
        // Format version 1: the same fields as separate metadata entries.
        None => Container {
            format: meta.get("format").cloned().unwrap_or_default(),
            format_version: meta.get("format_version").cloned().unwrap_or_default(),
            crate_version: meta
                .get("crate_version")
                .cloned()
                .unwrap_or_else(|| "unknown".into()),
            header: serde_json::value::RawValue::from_string(
                meta.get("header")
                    .ok_or_else(|| bad(path, "the metadata has no `header` entry".into()))?
                    .clone(),
            )
            .map_err(|e| bad(path, format!("the header is not valid ({e})")))?,
        },
    };
    if !["1", FORMAT_VERSION].contains(&container.format_version.as_str()) {
        return Err(bad(
            path,
            format!(
                "format version {:?} is not supported (this build reads versions 1 and {FORMAT_VERSION}); use a matching neural-sde version",
                crate::util::text::clip(&container.format_version)
            ),
        ));
    }
    Ok(RawFile {
        bytes,
        crate_version: container.crate_version,
        format: container.format,
        header: container.header,
    })
}

/// One object stored in a file: the file's path and bytes, the object's header JSON and the
/// prefix of its tensors' names (empty for a file that holds one object; `member{i}.` for
/// the members of an ensemble).
#[derive(Clone, Copy)]
pub(crate) struct Stored<'a> {
    pub path: &'a Path,
    pub bytes: &'a [u8],
    pub header: &'a str,
    pub prefix: &'a str,
}

/// Refuses a file whose `format` is not `format`.
///
/// # Errors
/// [`Error::Checkpoint`] saying both kinds.
pub(crate) fn expect_format(path: &Path, found: &str, format: &str) -> Result<()> {
    if found != format {
        return Err(bad(
            path,
            format!(
                "format is {:?}, expected \"{format}\": this file was not written by neural-sde as that kind of object",
                crate::util::text::clip(found)
            ),
        ));
    }
    Ok(())
}

/// Parses a header's JSON text as `H`.
///
/// # Errors
/// [`Error::Checkpoint`] naming the parse error.
pub(crate) fn parse_header<H: DeserializeOwned>(path: &Path, text: &str) -> Result<H> {
    serde_json::from_str(text).map_err(|e| bad(path, format!("the header is not valid ({e})")))
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
    let raw = read_raw(path)?;
    expect_format(path, &raw.format, format)?;
    let header = parse_header(path, raw.header.get())?;
    Ok((raw.bytes, raw.crate_version, header))
}

/// Number of values in each tensor of `bytes`, by name (no tensor is decoded).
///
/// # Errors
/// [`Error::Checkpoint`] for an invalid container.
pub(crate) fn tensor_sizes(path: &Path, bytes: &[u8]) -> Result<Vec<(String, usize)>> {
    tensor_sizes_under(path, bytes, "")
}

/// As [`tensor_sizes`] for the tensors whose names start with `prefix`, named without it.
///
/// # Errors
/// [`Error::Checkpoint`] for an invalid container.
pub(crate) fn tensor_sizes_under(
    path: &Path,
    bytes: &[u8],
    prefix: &str,
) -> Result<Vec<(String, usize)>> {
    let st = safetensors::SafeTensors::deserialize(bytes).map_err(|e| {
        bad(
            path,
            format!("not a valid safetensors file, or truncated ({e})"),
        )
    })?;
    Ok(st
        .tensors()
        .iter()
        .filter_map(|(n, v)| {
            n.strip_prefix(prefix)
                .map(|n| (n.to_string(), v.shape().iter().product()))
        })
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
    read_tensors_under(path, bytes, dtype, "")
}

/// As [`read_tensors`] for the tensors whose names start with `prefix`, named without it.
///
/// # Errors
/// As [`read_tensors`].
pub(crate) fn read_tensors_under(
    path: &Path,
    bytes: &[u8],
    dtype: DType,
    prefix: &str,
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
        let Some(name) = name.strip_prefix(prefix).map(str::to_string) else {
            continue;
        };
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

/// A `parses_back` check for [`write`]: the header parses as `H`.
pub(crate) fn parses_as<H: DeserializeOwned>(text: &str) -> serde_json::Result<()> {
    serde_json::from_str::<H>(text).map(|_| ())
}

/// Refuses to build a model whose configuration implies `implied` parameters (`None`: more
/// than 2^64) when the file's weights (tensors not named with one of `state_prefixes`) are
/// far fewer: a hostile header must not make a reader allocate much more than the file's
/// size. A few times the file is allowed, so that a missing or mis-shaped tensor is named by
/// the shape checks made after building.
///
/// # Errors
/// [`Error::Checkpoint`] saying both counts.
pub(crate) fn check_implied_size(
    path: &Path,
    bytes: &[u8],
    implied: Option<u64>,
    state_prefixes: &[&str],
) -> Result<()> {
    check_implied_size_under(path, bytes, implied, state_prefixes, "")
}

/// As [`check_implied_size`] for the tensors whose names start with `prefix`.
///
/// # Errors
/// As [`check_implied_size`].
pub(crate) fn check_implied_size_under(
    path: &Path,
    bytes: &[u8],
    implied: Option<u64>,
    state_prefixes: &[&str],
    prefix: &str,
) -> Result<()> {
    let held: u64 = tensor_sizes_under(path, bytes, prefix)?
        .into_iter()
        .filter(|(n, _)| !state_prefixes.iter().any(|p| n.starts_with(p)))
        .map(|(_, s)| s as u64)
        .sum();
    if implied.is_none_or(|n| n > 4 * held + 1_000_000) {
        return Err(bad(
            path,
            format!(
                "the stored configuration implies {} parameters but the file holds {held}; the header does not match the weights",
                implied.map_or("more than 2^64".to_string(), |n| n.to_string())
            ),
        ));
    }
    Ok(())
}
