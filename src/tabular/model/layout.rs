//! What a coded row holds: continuous cells, categorical cells and which cells are missing.

use serde::{Deserialize, Serialize};

/// The shape of the rows a [`crate::LatentModel`] reads.
///
/// A *coded row* is `[y (continuous), one-hot (categorical), mask (continuous)]`:
/// `continuous` standardised values (a missing one is 0), one block of `levels[j]` indicators
/// per categorical column (all 0 when the cell is missing), and one indicator per continuous
/// cell (1 observed, 0 missing). The decoder outputs `continuous` Gaussian means, then
/// `levels[j]` logits per categorical column. The control network reads the first
/// [`RowLayout::context_width`] values of a coded row: the mask too when
/// [`RowLayout::mask_input`] is set (the model was fitted on rows with missing cells).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(default)]
pub struct RowLayout {
    /// Continuous columns `D_c`.
    pub continuous: usize,
    /// Levels of each categorical column.
    pub levels: Vec<usize>,
    /// Whether the control network sees the continuous cells' missingness.
    pub mask_input: bool,
}

impl RowLayout {
    /// Rows of `columns` continuous cells, all observed in training.
    pub fn continuous(columns: usize) -> Self {
        Self {
            continuous: columns,
            levels: Vec::new(),
            mask_input: false,
        }
    }

    /// Columns of the table: continuous plus categorical.
    pub fn columns(&self) -> usize {
        self.continuous + self.levels.len()
    }

    /// Values of the one-hot blocks.
    pub fn one_hot_width(&self) -> usize {
        self.levels.iter().sum()
    }

    /// Decoder outputs: continuous means, then the logits of each categorical column.
    pub fn output_width(&self) -> usize {
        self.continuous + self.one_hot_width()
    }

    /// Values of a coded row (mask included).
    pub fn coded_width(&self) -> usize {
        self.output_width() + self.continuous
    }

    /// Values of a coded row the control network reads.
    pub fn context_width(&self) -> usize {
        if self.mask_input {
            self.coded_width()
        } else {
            self.output_width()
        }
    }

    /// Whether every continuous cell of the coded row `row` (of [`RowLayout::coded_width`]
    /// values) is observed: its mask values, after the decoder's outputs, are all 1.
    pub(crate) fn all_observed(&self, row: &[f64]) -> bool {
        row[self.output_width()..].iter().all(|&m| m > 0.5)
    }

    /// The layout of a model whose rows are all continuous and complete (the only layout
    /// before column types existed).
    pub fn is_plain(&self) -> bool {
        self.levels.is_empty() && !self.mask_input
    }
}
