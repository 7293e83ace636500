//! Per-column standardisation, stored with the model.

use serde::{Deserialize, Serialize};

use super::table::Table;
use crate::error::{Error, Result};

/// Maps each column to zero mean and unit variance: `z = (y − mean) / scale`.
///
/// Log-densities in standardised units convert to the data's units by adding the Jacobian
/// `−Σ_j log scale_j` ([`Standardizer::log_jacobian`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Standardizer {
    /// Column means.
    pub mean: Vec<f64>,
    /// Column standard deviations (population, ddof = 0).
    pub scale: Vec<f64>,
}

impl Standardizer {
    /// Fits means and standard deviations of the continuous columns of `table` (their
    /// observed cells). Columns of huge values (whose squares
    /// overflow) are measured in units of their largest magnitude, so every fitted mean and
    /// scale is finite.
    ///
    /// # Errors
    /// [`Error::Data`] naming a column that is constant, or varies by less than 10⁻¹² of its
    /// size, which cannot be standardised.
    pub fn fit(table: &Table) -> Result<Self> {
        let all: Vec<usize> = (0..table.n_rows()).collect();
        Self::fit_rows(table, &all)
    }

    /// [`Standardizer::fit`] on the rows `rows` of `table`, without copying them.
    ///
    /// # Errors
    /// As [`Standardizer::fit`].
    pub(crate) fn fit_rows(table: &Table, rows: &[usize]) -> Result<Self> {
        let cont: Vec<usize> = (0..table.n_cols())
            .filter(|&j| !table.kinds()[j].is_categorical())
            .collect();
        let mut mean = vec![0.0; cont.len()];
        let mut scale = vec![0.0; cont.len()];
        for (c, &j) in cont.iter().enumerate() {
            let col: Vec<f64> = rows
                .iter()
                .map(|&i| table.row(i)[j])
                .filter(|v| !v.is_nan())
                .collect();
            let (mut m, mut s) = mean_sd(&col, 1.0);
            if !(m.is_finite() && s.is_finite()) {
                let big = col.iter().fold(0.0f64, |a, v| a.max(v.abs()));
                let (ms, ss) = mean_sd(&col, big);
                (m, s) = (ms * big, ss * big);
            }
            let name = crate::util::text::clip(&table.columns()[j]);
            let refuse = |reason: String| Error::Data {
                path: table.source().to_path_buf(),
                reason,
            };
            if col.is_empty() {
                return Err(refuse(format!(
                    "column '{name}' has no observed cell in the training rows; leave it out of the selected columns"
                )));
            }
            if s == 0.0 {
                return Err(refuse(format!(
                    "column '{name}' is constant (every value is {m}) and cannot be standardised; leave it out of the selected columns"
                )));
            }
            if !(s.is_finite() && m.is_finite()) || s <= 1e-12 * m.abs() {
                return Err(refuse(format!(
                    "column '{name}' varies by less than 1e-12 relative to its size (mean {m:e}, standard deviation {s:e}) and cannot be standardised; leave it out or subtract a constant first"
                )));
            }
            mean[c] = m;
            scale[c] = s;
        }
        Ok(Self { mean, scale })
    }

    /// Standardised values of `table`, row-major.
    ///
    /// (Values are finite: [`Standardizer::fit`] keeps every mean and scale finite.)
    pub fn transform(&self, table: &Table) -> Vec<f64> {
        let d = self.mean.len();
        table
            .values()
            .iter()
            .enumerate()
            .map(|(k, v)| (v - self.mean[k % d]) / self.scale[k % d])
            .collect()
    }

    /// Back to the data's units, row-major.
    pub fn inverse(&self, z: &[f64]) -> Vec<f64> {
        let d = self.mean.len();
        z.iter()
            .enumerate()
            .map(|(k, v)| v * self.scale[k % d] + self.mean[k % d])
            .collect()
    }

    /// `−Σ_j log scale_j`: add to a standardised log-density to get the data's units.
    pub fn log_jacobian(&self) -> f64 {
        -self.scale.iter().map(|s| s.ln()).sum::<f64>()
    }
}

/// Mean and population standard deviation of `v / unit` (two passes, as the fit always did).
fn mean_sd(v: &[f64], unit: f64) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().map(|x| x / unit / n).sum::<f64>();
    let var = v.iter().map(|x| (x / unit - mean).powi(2) / n).sum::<f64>();
    (mean, var.sqrt())
}
