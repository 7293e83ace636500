//! The standardised rows a trainer keeps, compactly, with the keys of their noise.

use candle_core::{DType, Device, Tensor};

use crate::error::Result;
use crate::tabular::scaler::Standardizer;
use crate::tabular::table::Table;

/// Standardised rows in the model's precision (f32 rows take half the memory of the table's
/// f64 values), and each row's index in the table: the key its noise is drawn from, so a row
/// gets the same noise whichever process or chunk handles it.
#[derive(Debug, Default)]
pub(crate) struct StoredRows {
    values: Values,
    table_index: Vec<u64>,
    d: usize,
}

#[derive(Debug)]
enum Values {
    F32(Vec<f32>),
    F64(Vec<f64>),
}

impl Default for Values {
    fn default() -> Self {
        Values::F64(Vec::new())
    }
}

impl StoredRows {
    /// Rows `indices` of `table`, standardised by `scaler`, kept as `dtype` (f32 or f64).
    pub(crate) fn new(
        table: &Table,
        scaler: &Standardizer,
        indices: &[usize],
        dtype: DType,
    ) -> Self {
        let d = table.n_cols();
        let mut row = Vec::with_capacity(d);
        let mut values = if dtype == DType::F32 {
            Values::F32(Vec::with_capacity(indices.len() * d))
        } else {
            Values::F64(Vec::with_capacity(indices.len() * d))
        };
        for &i in indices {
            row.clear();
            scaler.transform_row_into(table.row(i), &mut row);
            match &mut values {
                Values::F32(v) => v.extend(row.iter().map(|&x| x as f32)),
                Values::F64(v) => v.extend_from_slice(&row),
            }
        }
        Self {
            values,
            table_index: indices.iter().map(|&i| i as u64).collect(),
            d,
        }
    }

    /// Number of rows.
    pub(crate) fn len(&self) -> usize {
        self.table_index.len()
    }

    pub(crate) fn is_empty(&self) -> bool {
        self.table_index.is_empty()
    }

    /// The rows at `positions` as a `(len, D)` tensor of `dtype`, and their keys.
    pub(crate) fn gather(
        &self,
        positions: &[usize],
        dtype: DType,
        dev: &Device,
    ) -> Result<(Tensor, Vec<u64>)> {
        let d = self.d;
        let shape = (positions.len(), d);
        let t = match &self.values {
            Values::F32(v) => {
                let mut out = Vec::with_capacity(positions.len() * d);
                for &p in positions {
                    out.extend_from_slice(&v[p * d..(p + 1) * d]);
                }
                Tensor::from_vec(out, shape, dev)?
            }
            Values::F64(v) => {
                let mut out = Vec::with_capacity(positions.len() * d);
                for &p in positions {
                    out.extend_from_slice(&v[p * d..(p + 1) * d]);
                }
                Tensor::from_vec(out, shape, dev)?
            }
        };
        let keys = positions.iter().map(|&p| self.table_index[p]).collect();
        Ok((t.to_dtype(dtype)?, keys))
    }

    /// Rows `range` as f64 values (row-major) and their keys.
    pub(crate) fn slice_f64(&self, range: std::ops::Range<usize>) -> (Vec<f64>, &[u64]) {
        let d = self.d;
        let values = match &self.values {
            Values::F32(v) => v[range.start * d..range.end * d]
                .iter()
                .map(|&x| f64::from(x))
                .collect(),
            Values::F64(v) => v[range.start * d..range.end * d].to_vec(),
        };
        (values, &self.table_index[range])
    }
}
