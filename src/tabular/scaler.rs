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
    /// Fits means and standard deviations on `table`.
    ///
    /// # Errors
    /// [`Error::Data`] naming a constant column, which cannot be standardised.
    pub fn fit(table: &Table) -> Result<Self> {
        let (n, d) = (table.n_rows() as f64, table.n_cols());
        let mut mean = vec![0.0; d];
        for i in 0..table.n_rows() {
            for (m, v) in mean.iter_mut().zip(table.row(i)) {
                *m += v / n;
            }
        }
        let mut var = vec![0.0; d];
        for i in 0..table.n_rows() {
            for j in 0..d {
                var[j] += (table.row(i)[j] - mean[j]).powi(2) / n;
            }
        }
        let scale: Vec<f64> = var.iter().map(|v| v.sqrt()).collect();
        for j in 0..d {
            if scale[j].is_nan() || scale[j] <= 1e-12 * mean[j].abs().max(1e-300) {
                return Err(Error::Data {
                    path: table.source().to_path_buf(),
                    reason: format!(
                        "column '{}' is constant (every value is {}) and cannot be standardised; leave it out of the selected columns",
                        table.columns()[j],
                        mean[j]
                    ),
                });
            }
        }
        Ok(Self { mean, scale })
    }

    /// Standardised values of `table`, row-major.
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
