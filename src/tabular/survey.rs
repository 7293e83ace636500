//! The first pass of a typed CSV read: what each column holds, and so its type (see
//! [`crate::ColumnRules`]); and how one cell is read as a number.

use super::schema::{ColumnKind, ColumnRules};
use crate::util::text::clip;

/// Whether `text` is empty, `NA`, or one of `markers`.
pub(crate) fn is_missing(markers: &[String], text: &str) -> bool {
    text.is_empty() || text == "NA" || markers.iter().any(|m| m == text)
}

/// A cell read as a number, or why it is not one.
pub(crate) enum NumberCell {
    /// A finite number.
    Value(f64),
    /// Text that is not a number.
    Text,
    /// `NaN` or an infinity, which usually mean a broken export.
    NonFinite,
}

pub(crate) fn number_cell(text: &str) -> NumberCell {
    match text.parse::<f64>() {
        Ok(v) if v.is_finite() => NumberCell::Value(v),
        Ok(_) => NumberCell::NonFinite,
        Err(_) => NumberCell::Text,
    }
}

/// The message for a `NaN` or infinite literal.
pub(crate) fn non_finite_message(text: &str) -> String {
    format!(
        "value '{}' is not finite (a broken export?); if it marks missing cells, say --missing-marker {} (library: ColumnRules::missing_markers)",
        clip(text),
        clip(text)
    )
}

/// Most characters of a categorical level's label.
pub(crate) const MAX_LABEL: usize = 200;

/// What the first pass over a file learns about one column.
#[derive(Debug, Default)]
pub(crate) struct ColumnSurvey {
    observed: usize,
    /// First non-numeric cell and its line.
    text: Option<(String, usize)>,
    all_integer: bool,
    /// Distinct cell texts (at most `max_levels + 1` kept).
    texts: Vec<String>,
    /// Distinct numbers (at most `max_levels + 1` kept).
    numbers: Vec<f64>,
    started: bool,
}

impl ColumnSurvey {
    /// Takes one observed (non-missing) cell from `line`.
    pub(crate) fn add(
        &mut self,
        text: &str,
        line: usize,
        cap: usize,
    ) -> std::result::Result<(), String> {
        if !self.started {
            self.started = true;
            self.all_integer = true;
        }
        self.observed += 1;
        match number_cell(text) {
            NumberCell::Value(v) => {
                if v.fract() != 0.0 {
                    self.all_integer = false;
                }
                if self.numbers.len() <= cap && !self.numbers.contains(&v) {
                    self.numbers.push(v);
                }
            }
            NumberCell::NonFinite => return Err(non_finite_message(text)),
            NumberCell::Text => {
                let n = text.chars().count();
                if n > MAX_LABEL {
                    return Err(format!(
                        "the cell '{}' is too long for a level of a categorical column (at most {MAX_LABEL} characters); fix the cell, or leave the column out",
                        clip(text)
                    ));
                }
                if self.text.is_none() {
                    self.text = Some((text.to_string(), line));
                }
            }
        }
        if self.texts.len() <= cap && !self.texts.iter().any(|t| t == text) {
            self.texts.push(text.to_string());
        }
        Ok(())
    }

    /// The column's type under `rules`, or why the column is refused.
    pub(crate) fn kind(
        &self,
        name: &str,
        rules: &ColumnRules,
    ) -> std::result::Result<ColumnKind, String> {
        let name = clip(name);
        if self.observed == 0 {
            return Err(format!(
                "column '{name}' has no observed cell (every cell is missing); leave it out of the selected columns"
            ));
        }
        let declared_cat = rules.categorical.iter().any(|c| clip(c) == name);
        let declared_cont = rules.continuous.iter().any(|c| clip(c) == name);
        let max = rules.max_levels;
        let categorical = |levels: Vec<String>| {
            if levels.len() > max {
                Err(format!(
                    "column '{name}' has more than {max} distinct values for a categorical column; if it is numeric, say --continuous {name}, otherwise leave it out"
                ))
            } else if levels.len() < 2 {
                Err(format!(
                    "column '{name}' is categorical with one level ('{}') only; it carries no information: leave it out",
                    clip(levels.first().map_or("", String::as_str))
                ))
            } else {
                Ok(ColumnKind::Categorical { levels })
            }
        };
        if let Some((text, line)) = &self.text {
            if declared_cont {
                return Err(format!(
                    "column '{name}' is declared continuous but line {line} holds '{}', which is not a number; fix the cell, mark it missing (--missing-marker), or declare the column categorical",
                    clip(text)
                ));
            }
            let mut levels = self.texts.clone();
            sort_levels(&mut levels);
            return categorical(levels);
        }
        let guessed = self.all_integer && self.numbers.len() <= rules.max_integer_levels;
        if declared_cat || (guessed && !declared_cont) {
            let mut nums = self.numbers.clone();
            nums.sort_by(f64::total_cmp);
            return categorical(nums.iter().map(|v| format!("{v}")).collect());
        }
        Ok(ColumnKind::Continuous)
    }
}

/// Orders levels: by value when every label is a number, else by text.
fn sort_levels(levels: &mut [String]) {
    if levels.iter().all(|l| l.parse::<f64>().is_ok()) {
        levels.sort_by(|a, b| {
            let (x, y) = (
                a.parse::<f64>().unwrap_or(0.0),
                b.parse::<f64>().unwrap_or(0.0),
            );
            x.total_cmp(&y)
        });
    } else {
        levels.sort();
    }
}
