//! The coded rows a trainer keeps, compactly, with the keys of their noise.

use candle_core::{DType, Device, Tensor};

use crate::error::Result;
use crate::tabular::coding::RowCoder;
use crate::tabular::scaler::Standardizer;
use crate::tabular::table::Table;

/// Coded rows (see [`crate::RowLayout`]) in the model's precision (f32 rows take half the
/// memory of the table's f64 values), and each row's index in the table: the key its noise is
/// drawn from, so a row gets the same noise whichever process or chunk handles it. When no
/// continuous cell is missing, the rows are kept without their mask (all ones).
#[derive(Debug, Default)]
pub(crate) struct StoredRows {
    values: Values,
    table_index: Vec<u64>,
    /// Values kept per row.
    d: usize,
    /// Continuous cells per row (the mask's width).
    dc: usize,
    /// Whether the rows are kept with their mask.
    masked: bool,
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
    /// Rows `indices` of `table`, coded by `coder` and `scaler`, kept as `dtype` (f32 or f64).
    pub(crate) fn new(
        table: &Table,
        coder: &RowCoder,
        scaler: &Standardizer,
        indices: &[usize],
        dtype: DType,
    ) -> Self {
        let layout = coder.layout();
        let masked = indices
            .iter()
            .any(|&i| coder.continuous().iter().any(|&j| table.row(i)[j].is_nan()));
        let d = if masked {
            layout.coded_width()
        } else {
            layout.output_width()
        };
        let mut row = Vec::with_capacity(layout.coded_width());
        let mut values = if dtype == DType::F32 {
            Values::F32(Vec::with_capacity(indices.len() * d))
        } else {
            Values::F64(Vec::with_capacity(indices.len() * d))
        };
        for &i in indices {
            row.clear();
            coder.encode_into(table.row(i), scaler, &mut row);
            row.truncate(d);
            match &mut values {
                Values::F32(v) => v.extend(row.iter().map(|&x| x as f32)),
                Values::F64(v) => v.extend_from_slice(&row),
            }
        }
        Self {
            values,
            table_index: indices.iter().map(|&i| i as u64).collect(),
            d,
            dc: layout.continuous,
            masked,
        }
    }

    /// Number of rows.
    pub(crate) fn len(&self) -> usize {
        self.table_index.len()
    }

    pub(crate) fn is_empty(&self) -> bool {
        self.table_index.is_empty()
    }

    /// The rows at `positions` as a tensor of `dtype` (without the mask when each of them has
    /// every continuous cell: see [`crate::LatentModel`]'s coded rows), and their keys.
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
        let t = t.to_dtype(dtype)?;
        if self.masked {
            let ow = d - self.dc;
            let mask = t
                .narrow(1, ow, self.dc)?
                .to_dtype(DType::F64)?
                .flatten_all()?;
            if mask.to_vec1::<f64>()?.iter().all(|&m| m > 0.5) {
                return Ok((t.narrow(1, 0, ow)?.contiguous()?, keys));
            }
        }
        Ok((t, keys))
    }

    /// Rows `range` as whole coded rows of f64 values (mask included, row-major) and their
    /// keys.
    pub(crate) fn slice_f64(&self, range: std::ops::Range<usize>) -> (Vec<f64>, &[u64]) {
        let d = self.d;
        let values: Vec<f64> = match &self.values {
            Values::F32(v) => v[range.start * d..range.end * d]
                .iter()
                .map(|&x| f64::from(x))
                .collect(),
            Values::F64(v) => v[range.start * d..range.end * d].to_vec(),
        };
        if self.masked {
            return (values, &self.table_index[range]);
        }
        let mut out = Vec::with_capacity(values.len() / d.max(1) * (d + self.dc));
        for r in values.chunks_exact(d.max(1)) {
            out.extend_from_slice(r);
            out.extend(std::iter::repeat_n(1.0, self.dc));
        }
        (out, &self.table_index[range])
    }
}
