//! Table rows to the model's coded rows and back (see [`crate::RowLayout`]).

use super::model::RowLayout;
use super::scaler::Standardizer;
use super::schema::ColumnKind;

/// Maps a typed table row (data units, `NaN` for missing, level indices) to a coded row and
/// model outputs back to table rows.
#[derive(Debug, Clone)]
pub(crate) struct RowCoder {
    continuous: Vec<usize>,
    categorical: Vec<usize>,
    layout: RowLayout,
}

impl RowCoder {
    /// The coder of rows of columns `kinds`; `mask_input`: the control sees missingness.
    pub(crate) fn new(kinds: &[ColumnKind], mask_input: bool) -> Self {
        let continuous: Vec<usize> = (0..kinds.len())
            .filter(|&j| !kinds[j].is_categorical())
            .collect();
        let categorical: Vec<usize> = (0..kinds.len())
            .filter(|&j| kinds[j].is_categorical())
            .collect();
        let levels = categorical
            .iter()
            .map(|&j| kinds[j].levels().map_or(0, <[String]>::len))
            .collect();
        Self {
            layout: RowLayout {
                continuous: continuous.len(),
                levels,
                mask_input,
            },
            continuous,
            categorical,
        }
    }

    pub(crate) fn layout(&self) -> &RowLayout {
        &self.layout
    }

    /// Table column indices of the continuous columns, in the model's order.
    pub(crate) fn continuous(&self) -> &[usize] {
        &self.continuous
    }

    /// Table column indices of the categorical columns, in the model's order.
    pub(crate) fn categorical(&self) -> &[usize] {
        &self.categorical
    }

    /// Appends the coded row of table row `row`; returns its observed cells and the
    /// standardisation's log-Jacobian over its observed continuous cells.
    pub(crate) fn encode_into(
        &self,
        row: &[f64],
        scaler: &Standardizer,
        out: &mut Vec<f64>,
    ) -> (usize, f64) {
        let mut observed = 0;
        let mut jac = 0.0;
        for (c, &j) in self.continuous.iter().enumerate() {
            let v = row[j];
            if v.is_nan() {
                out.push(0.0);
            } else {
                out.push((v - scaler.mean[c]) / scaler.scale[c]);
                observed += 1;
                jac -= scaler.scale[c].ln();
            }
        }
        for (&j, &k) in self.categorical.iter().zip(&self.layout.levels) {
            let v = row[j];
            let at = out.len();
            out.extend(std::iter::repeat_n(0.0, k));
            if !v.is_nan() && (v as usize) < k {
                out[at + v as usize] = 1.0;
                observed += 1;
            }
        }
        for &j in &self.continuous {
            out.push(if row[j].is_nan() { 0.0 } else { 1.0 });
        }
        (observed, jac)
    }

    /// Appends the table row (data units, table column order) of a generated row `g`
    /// (standardised continuous cells, then level indices: [`crate::LatentModel::generate`]).
    pub(crate) fn decode_into(&self, g: &[f64], scaler: &Standardizer, out: &mut Vec<f64>) {
        let at = out.len();
        out.extend(std::iter::repeat_n(
            0.0,
            self.continuous.len() + self.categorical.len(),
        ));
        for (c, &j) in self.continuous.iter().enumerate() {
            out[at + j] = g[c] * scaler.scale[c] + scaler.mean[c];
        }
        let dc = self.continuous.len();
        for (c, &j) in self.categorical.iter().enumerate() {
            out[at + j] = g[dc + c];
        }
    }
}
