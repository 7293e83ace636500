//! The crate's one error type.

use std::path::PathBuf;

/// Result alias used by every fallible library entry point.
pub type Result<T> = std::result::Result<T, Error>;

/// Everything that can go wrong in `neural-sde`.
///
/// User-implemented extension traits ([`crate::Drift`], [`crate::TerminalCost`],
/// [`crate::LogDensity`]) return `candle_core::Result`; such errors arrive here as
/// [`Error::Candle`]. Every other variant names the offending value and says what to do.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A configuration value is out of range.
    #[error("invalid {field} = {value}: {reason}")]
    InvalidConfig {
        /// Name of the configuration field.
        field: &'static str,
        /// The rejected value, formatted.
        value: String,
        /// What is wrong and what to use instead.
        reason: String,
    },
    /// Two tensors (or a tensor and a configuration) disagree on shape.
    #[error("shape mismatch for {what}: expected {expected}, got {got}")]
    Shape {
        /// What was being checked.
        what: String,
        /// The shape that was required.
        expected: String,
        /// The shape that was supplied.
        got: String,
    },
    /// A NaN or infinity appeared where a finite number is required.
    #[error("non-finite value in {what}: {detail}")]
    NonFinite {
        /// Which quantity became non-finite.
        what: String,
        /// Where and what to do about it.
        detail: String,
    },
    /// A data file could not be used.
    #[error("{path}: {reason}")]
    Data {
        /// The file involved.
        path: PathBuf,
        /// What is wrong (row, column, value) and what to do.
        reason: String,
    },
    /// A checkpoint file could not be written or read.
    #[error("checkpoint {path}: {reason}")]
    Checkpoint {
        /// The file involved.
        path: PathBuf,
        /// What is wrong and what to do.
        reason: String,
    },
    /// A plot could not be drawn.
    #[error("cannot draw the plot: {0}")]
    Plot(String),
    /// Processes training together disagree, or a reduction between them failed.
    #[error("process group: {0}")]
    Collective(String),
    /// Training stopped because it could not make progress.
    #[error("training failed: {0}")]
    Training(String),
    /// An error from the tensor library (including user extension traits).
    #[error(transparent)]
    Candle(#[from] candle_core::Error),
    /// An input/output error.
    #[error(transparent)]
    Io(#[from] std::io::Error),
    /// A JSON (de)serialisation error.
    #[error(transparent)]
    Json(#[from] serde_json::Error),
}

impl Error {
    /// Shorthand for [`Error::InvalidConfig`].
    pub(crate) fn config(
        field: &'static str,
        value: impl ToString,
        reason: impl Into<String>,
    ) -> Self {
        Error::InvalidConfig {
            field,
            value: value.to_string(),
            reason: reason.into(),
        }
    }

    /// Shorthand for [`Error::Shape`].
    pub(crate) fn shape(
        what: impl Into<String>,
        expected: impl std::fmt::Debug,
        got: impl std::fmt::Debug,
    ) -> Self {
        Error::Shape {
            what: what.into(),
            expected: format!("{expected:?}"),
            got: format!("{got:?}"),
        }
    }
}

/// Rejects a non-finite or non-positive value with an [`Error::InvalidConfig`].
pub(crate) fn check_positive(field: &'static str, value: f64) -> Result<()> {
    if value.is_finite() && value > 0.0 {
        Ok(())
    } else {
        Err(Error::config(field, value, "must be a finite number > 0"))
    }
}
