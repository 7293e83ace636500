//! The file of an ensemble: one `.safetensors` container (see [`crate::nn::checkpoint`]) of
//! kind [`ENSEMBLE_FORMAT`] whose header is `{"weights": [...], "members": [...]}`, each
//! member's entry the header a single model's file would have, and whose tensors are the
//! members' tensors named `member{i}.` + the name they have in a single model's file. A
//! member is read exactly as a single model is, from its part of the file.

use std::path::Path;

use candle_core::Tensor;
use serde::{Deserialize, Serialize};
use serde_json::value::RawValue;

use crate::error::{Error, Result};
use crate::nn::checkpoint::{RawFile, Stored};

/// The `format` of an ensemble's file.
pub(crate) const ENSEMBLE_FORMAT: &str = "neural-sde-ensemble";

/// Most members an ensemble is trained with (`EnsembleTrainer::new`, `fit --members`).
pub const MAX_MEMBERS: usize = 16;

/// Most models a file may hold (each model is built when the file is read): each member may
/// keep two fits (`EnsembleTrainer::compare_starts`).
pub const MAX_MODELS: usize = 2 * MAX_MEMBERS;

/// The header of an ensemble's file.
#[derive(Serialize, Deserialize)]
pub(crate) struct EnsembleHeader {
    /// Each member's weight (positive; only their ratios matter).
    pub weights: Vec<f64>,
    /// Each member's own header.
    pub members: Vec<Box<RawValue>>,
}

/// The prefix of member `i`'s tensor names.
pub(crate) fn member_prefix(i: usize) -> String {
    format!("member{i}.")
}

fn bad(path: &Path, reason: String) -> Error {
    Error::Checkpoint {
        path: path.to_path_buf(),
        reason,
    }
}

/// Refuses an ensemble's file where a single model is read, saying what reads it.
///
/// # Errors
/// [`Error::Checkpoint`] for a file of kind [`ENSEMBLE_FORMAT`].
pub(crate) fn refuse_ensemble(path: &Path, raw: &RawFile) -> Result<()> {
    if raw.format == ENSEMBLE_FORMAT {
        return Err(bad(
            path,
            "it holds an ensemble of fitted models, not one model; read it with `Ensemble::load` (to continue training it, `EnsembleTrainer::resume`)".into(),
        ));
    }
    Ok(())
}

/// Parses and checks an ensemble's header: 1 to [`MAX_MODELS`] members, one finite positive
/// weight each, and no tensor outside the members' prefixes.
///
/// # Errors
/// [`Error::Checkpoint`] naming what is wrong.
pub(crate) fn read_header(path: &Path, raw: &RawFile) -> Result<EnsembleHeader> {
    let header: EnsembleHeader = crate::nn::checkpoint::parse_header(path, raw.header.get())?;
    let n = header.members.len();
    if n == 0 || n > MAX_MODELS {
        return Err(bad(
            path,
            format!("the ensemble has {n} members; a file holds 1 to {MAX_MODELS}"),
        ));
    }
    if header.weights.len() != n {
        return Err(bad(
            path,
            format!(
                "the header is inconsistent: {} weights for {n} members",
                header.weights.len()
            ),
        ));
    }
    if let Some(w) = header
        .weights
        .iter()
        .find(|w| !(w.is_finite() && **w > 0.0))
    {
        return Err(bad(
            path,
            format!("member weight {w} is not finite and positive"),
        ));
    }
    let prefixes: Vec<String> = (0..n).map(member_prefix).collect();
    for (name, _) in crate::nn::checkpoint::tensor_sizes(path, &raw.bytes)? {
        if !prefixes.iter().any(|p| name.starts_with(p.as_str())) {
            return Err(bad(
                path,
                format!(
                    "unexpected tensor {}: it belongs to none of the {n} members",
                    crate::util::text::clip(&name)
                ),
            ));
        }
    }
    Ok(header)
}

/// Reads each member of an ensemble's file with `read` (given the member's part of the
/// file); an error names the member.
///
/// # Errors
/// As `read`, the reason prefixed with the member.
pub(crate) fn read_members<T>(
    path: &Path,
    raw: &RawFile,
    header: &EnsembleHeader,
    mut read: impl FnMut(Stored<'_>) -> Result<T>,
) -> Result<Vec<T>> {
    let mut out = Vec::with_capacity(header.members.len());
    for (i, member) in header.members.iter().enumerate() {
        let prefix = member_prefix(i);
        let stored = Stored {
            path,
            bytes: &raw.bytes,
            header: member.get(),
            prefix: &prefix,
        };
        out.push(read(stored).map_err(|e| match e {
            Error::Checkpoint { path, reason } => Error::Checkpoint {
                path,
                reason: format!("member {} of {}: {reason}", i + 1, header.members.len()),
            },
            other => other,
        })?);
    }
    Ok(out)
}

/// One member's part of an ensemble's file: its tensors (named as in a single model's file)
/// and its header.
pub(crate) struct MemberParts {
    pub tensors: Vec<(String, Tensor)>,
    pub header: Box<RawValue>,
}

/// Writes an ensemble's file atomically (see [`crate::nn::checkpoint::write`]), after
/// checking that each member's header parses back with `member_parses`.
///
/// # Errors
/// [`Error::InvalidConfig`] for more than [`MAX_MODELS`] members (a file that could not be
/// read back); as [`crate::nn::checkpoint::write`].
pub(crate) fn write(
    path: &Path,
    members: Vec<MemberParts>,
    weights: &[f64],
    member_parses: impl Fn(&str) -> serde_json::Result<()>,
) -> Result<()> {
    crate::util::limits::at_most("members", members.len(), MAX_MODELS, "models in one file")?;
    let mut tensors = Vec::new();
    let mut headers = Vec::with_capacity(members.len());
    for (i, m) in members.into_iter().enumerate() {
        let prefix = member_prefix(i);
        tensors.extend(
            m.tensors
                .into_iter()
                .map(|(n, t)| (format!("{prefix}{n}"), t)),
        );
        headers.push(m.header);
    }
    let header = EnsembleHeader {
        weights: weights.to_vec(),
        members: headers,
    };
    crate::nn::checkpoint::write(path, ENSEMBLE_FORMAT, tensors, &header, |text| {
        let h: EnsembleHeader = serde_json::from_str(text)?;
        h.members.iter().try_for_each(|m| member_parses(m.get()))
    })
}
