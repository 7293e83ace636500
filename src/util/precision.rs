//! Floating-point precision of the tensors a model uses.

use candle_core::DType;
use serde::{Deserialize, Serialize};

/// Floating-point precision of tensors.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Precision {
    /// 32-bit floats (fast).
    #[default]
    F32,
    /// 64-bit floats (for tight numerical checks).
    F64,
}

impl Precision {
    /// The candle dtype.
    pub fn dtype(self) -> DType {
        match self {
            Precision::F32 => DType::F32,
            Precision::F64 => DType::F64,
        }
    }
}
