//! Column types: continuous or categorical (with its levels in a fixed order), and how
//! missing cells are written.
//!
//! In a [`crate::Table`] a missing cell is `NaN` (the literal text `NaN` in a file is refused,
//! so a `NaN` value always means "not observed"), and a categorical cell holds the index of
//! its level.

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::util::text::clip;

/// The type of one column.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum ColumnKind {
    /// Real numbers, modelled by a density.
    #[default]
    Continuous,
    /// One of a fixed list of labels, modelled by probabilities; cells hold the index of
    /// their level.
    Categorical {
        /// The labels, in the order of their indices.
        levels: Vec<String>,
    },
}

impl ColumnKind {
    /// The levels of a categorical column.
    pub fn levels(&self) -> Option<&[String]> {
        match self {
            ColumnKind::Continuous => None,
            ColumnKind::Categorical { levels } => Some(levels),
        }
    }

    /// Whether the column is categorical.
    pub fn is_categorical(&self) -> bool {
        matches!(self, ColumnKind::Categorical { .. })
    }

    /// The index of `text` among the levels: the same label, or else (when both are
    /// numbers) the same number, so `3.0` in a file matches level `3`.
    pub fn level_of(&self, text: &str) -> Option<usize> {
        let levels = self.levels()?;
        if let Some(i) = levels.iter().position(|l| l == text) {
            return Some(i);
        }
        let v: f64 = text.parse().ok()?;
        levels.iter().position(|l| l.parse::<f64>() == Ok(v))
    }

    /// The text of cell value `v` (a number, a level index, or `NaN` for missing: empty).
    pub(crate) fn cell_text(&self, v: f64) -> String {
        if v.is_nan() {
            return String::new();
        }
        match self {
            ColumnKind::Continuous => format!("{v}"),
            ColumnKind::Categorical { levels } => levels
                .get(v as usize)
                .cloned()
                .unwrap_or_else(|| format!("{v}")),
        }
    }
}

/// How column types are chosen and missing cells recognised when a table is read
/// ([`crate::Table::from_csv_typed`]).
///
/// Guess: a column with any cell that is not a number is categorical; a numeric column whose
/// values are all integers with at most [`ColumnRules::max_integer_levels`] distinct values is
/// categorical (a density on a few integer values is meaningless and unbounded); every other
/// numeric column is continuous. The two lists override the guess.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct ColumnRules {
    /// Columns to treat as categorical whatever they hold.
    pub categorical: Vec<String>,
    /// Columns to treat as continuous (every cell must then be a number or missing).
    pub continuous: Vec<String>,
    /// Cell texts that mean "missing", besides the empty cell and `NA`.
    pub missing_markers: Vec<String>,
    /// Most levels a categorical column may have.
    pub max_levels: usize,
    /// Most distinct values of an integer column that is guessed categorical.
    pub max_integer_levels: usize,
}

impl Default for ColumnRules {
    fn default() -> Self {
        Self {
            categorical: Vec::new(),
            continuous: Vec::new(),
            missing_markers: Vec::new(),
            max_levels: 200,
            max_integer_levels: 20,
        }
    }
}

impl ColumnRules {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a column named in both lists, fewer than 2 levels
    /// allowed, or a missing marker that is a number.
    pub fn validate(&self) -> Result<()> {
        if let Some(c) = self
            .categorical
            .iter()
            .find(|c| self.continuous.contains(c))
        {
            return Err(Error::config(
                "columns",
                clip(c),
                "is declared both categorical and continuous; name it in one list only",
            ));
        }
        if self.max_levels < 2 {
            return Err(Error::config(
                "max_levels",
                self.max_levels,
                "a categorical column needs at least 2 levels",
            ));
        }
        if let Some(m) = self
            .missing_markers
            .iter()
            .find(|m| m.trim().parse::<f64>().is_ok_and(f64::is_finite))
        {
            return Err(Error::config(
                "missing_marker",
                clip(m),
                "a number cannot mark missing cells (it would hide real values); use a text marker",
            ));
        }
        Ok(())
    }
}

/// The types a model was fitted with: each column's kind, the missing-cell markers, and
/// whether the model's control sees which cells are missing.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(default)]
pub struct Schema {
    /// One kind per column, in the model's column order.
    pub kinds: Vec<ColumnKind>,
    /// Extra missing-cell markers (besides the empty cell and `NA`).
    pub missing_markers: Vec<String>,
}

impl Schema {
    /// All columns continuous.
    pub fn continuous(columns: usize) -> Self {
        Self {
            kinds: vec![ColumnKind::Continuous; columns],
            missing_markers: Vec::new(),
        }
    }

    /// Whether every column is continuous.
    pub fn all_continuous(&self) -> bool {
        self.kinds.iter().all(|k| !k.is_categorical())
    }

    /// Checks a stored schema (a checkpoint header is untrusted input).
    pub(crate) fn check(
        &self,
        columns: usize,
        max_levels: usize,
    ) -> std::result::Result<(), String> {
        if self.kinds.len() != columns {
            return Err(format!(
                "the schema has {} column kinds for {columns} columns",
                self.kinds.len()
            ));
        }
        for k in &self.kinds {
            if let Some(l) = k.levels() {
                if l.len() < 2 || l.len() > max_levels {
                    return Err(format!(
                        "a categorical column has {} levels (2 to {max_levels} allowed)",
                        l.len()
                    ));
                }
            }
        }
        if self.missing_markers.len() > 64 {
            return Err("more than 64 missing-cell markers".into());
        }
        Ok(())
    }
}
