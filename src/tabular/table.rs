//! The checked numeric table.

use std::path::{Path, PathBuf};

use super::schema::ColumnKind;
use crate::error::{Error, Result};

/// A table with named, typed columns, stored row-major in f64.
///
/// Every constructor checks that names are unique and non-empty and rows have one value per
/// column. Tables built from numbers ([`Table::new`], [`Table::from_csv`]) are continuous and
/// complete: every value is finite. Tables read with column types
/// ([`Table::from_csv_typed`]) may also hold categorical columns (a cell is the index of its
/// level, see [`Table::kinds`]) and missing cells (`NaN`).
///
/// # Example
/// ```
/// use neural_sde::Table;
/// let t = Table::new(vec!["a".into(), "b".into()], vec![vec![1.0, 2.0], vec![3.0, 4.5]])?;
/// assert_eq!((t.n_rows(), t.n_cols()), (2, 2));
/// assert_eq!(t.row(1), &[3.0, 4.5]);
/// # Ok::<(), neural_sde::Error>(())
/// ```
#[derive(Debug, Clone, PartialEq)]
pub struct Table {
    columns: Vec<String>,
    values: Vec<f64>,
    n_rows: usize,
    source: PathBuf,
    kinds: Vec<ColumnKind>,
    missing_markers: Vec<String>,
}

impl Table {
    /// A table from column names and rows.
    ///
    /// # Errors
    /// [`Error::Data`] for no columns, duplicate or empty names, ragged rows, no rows, or a
    /// non-finite value (naming row and column).
    pub fn new(columns: Vec<String>, rows: Vec<Vec<f64>>) -> Result<Self> {
        Self::from_parts(columns, rows, PathBuf::from("<in-memory table>"))
    }

    /// A table from row-major `values` already checked to be finite, `columns` wide.
    #[cfg_attr(not(feature = "csv"), allow(dead_code))]
    pub(crate) fn from_flat(
        columns: Vec<String>,
        values: Vec<f64>,
        source: PathBuf,
    ) -> Result<Self> {
        check_names(&columns).map_err(|reason| Error::Data {
            path: source.clone(),
            reason,
        })?;
        let d = columns.len();
        if values.is_empty() || !values.len().is_multiple_of(d) {
            return Err(Error::Data {
                path: source,
                reason: "the table has a header but no data rows; add rows".into(),
            });
        }
        Ok(Self {
            n_rows: values.len() / d,
            kinds: vec![ColumnKind::Continuous; d],
            missing_markers: Vec::new(),
            columns,
            values,
            source,
        })
    }

    /// A table of typed columns from row-major `values` (`NaN` for a missing cell, a level
    /// index for a categorical cell), already checked against `kinds`.
    pub(crate) fn from_typed(
        columns: Vec<String>,
        values: Vec<f64>,
        kinds: Vec<ColumnKind>,
        source: PathBuf,
    ) -> Result<Self> {
        let mut t = Self::from_flat(columns, values, source)?;
        if kinds.len() != t.n_cols() {
            return Err(Error::shape("column kinds", t.n_cols(), kinds.len()));
        }
        t.kinds = kinds;
        Ok(t)
    }

    pub(crate) fn from_parts(
        columns: Vec<String>,
        rows: Vec<Vec<f64>>,
        source: PathBuf,
    ) -> Result<Self> {
        let err = |reason: String| Error::Data {
            path: source.clone(),
            reason,
        };
        check_names(&columns).map_err(err)?;
        if rows.is_empty() {
            return Err(err(
                "the table has a header but no data rows; add rows".into()
            ));
        }
        let mut values = Vec::with_capacity(rows.len() * columns.len());
        for (i, row) in rows.iter().enumerate() {
            if row.len() != columns.len() {
                return Err(err(format!(
                    "row {} has {} values but there are {} columns; make every row the same length",
                    i + 1,
                    row.len(),
                    columns.len()
                )));
            }
            for (j, v) in row.iter().enumerate() {
                if !v.is_finite() {
                    return Err(err(format!(
                        "row {}, column '{}': value {v} is not finite; remove or impute it",
                        i + 1,
                        columns[j]
                    )));
                }
            }
            values.extend_from_slice(row);
        }
        Ok(Self {
            kinds: vec![ColumnKind::Continuous; columns.len()],
            missing_markers: Vec::new(),
            columns,
            values,
            n_rows: rows.len(),
            source,
        })
    }

    /// Writes the table as CSV with a header, atomically (temporary file, then rename):
    /// categorical cells as their labels, missing cells empty.
    ///
    /// # Errors
    /// [`Error::Io`] if the file cannot be written.
    pub fn write_csv(&self, path: impl AsRef<Path>) -> Result<()> {
        let mut f = crate::util::fs::AtomicFile::create(path.as_ref())?;
        write_csv_header(&mut f, &self.columns)?;
        write_typed_rows(&mut f, &self.values, &self.kinds)?;
        f.commit()
    }

    /// Each column's type, in order.
    pub fn kinds(&self) -> &[ColumnKind] {
        &self.kinds
    }

    /// The extra texts that marked missing cells when the table was read (besides the empty
    /// cell and `NA`); a model fitted to the table keeps them for the files it reads later.
    pub fn missing_markers(&self) -> &[String] {
        &self.missing_markers
    }

    #[cfg_attr(not(feature = "csv"), allow(dead_code))]
    pub(crate) fn set_missing_markers(&mut self, markers: Vec<String>) {
        self.missing_markers = markers;
    }

    /// Whether every column is continuous and every cell observed.
    pub fn is_numeric(&self) -> bool {
        self.kinds.iter().all(|k| !k.is_categorical()) && !self.has_missing()
    }

    /// A copy with the cells `(row, column)` marked missing (`NaN`): masking cells to test
    /// imputation, say.
    ///
    /// # Errors
    /// [`Error::Data`] for a cell outside the table.
    pub fn with_missing(&self, cells: &[(usize, usize)]) -> Result<Table> {
        let mut t = self.clone();
        let d = self.n_cols();
        for &(i, j) in cells {
            if i >= self.n_rows || j >= d {
                return Err(Error::Data {
                    path: self.source.clone(),
                    reason: format!(
                        "cell ({i}, {j}) is outside the table ({} rows, {d} columns)",
                        self.n_rows
                    ),
                });
            }
            t.values[i * d + j] = f64::NAN;
        }
        Ok(t)
    }

    /// Whether some cell is missing.
    pub fn has_missing(&self) -> bool {
        self.values.iter().any(|v| v.is_nan())
    }

    /// Column names.
    pub fn columns(&self) -> &[String] {
        &self.columns
    }

    /// Number of rows.
    pub fn n_rows(&self) -> usize {
        self.n_rows
    }

    /// Number of columns.
    pub fn n_cols(&self) -> usize {
        self.columns.len()
    }

    /// Row `i`.
    ///
    /// # Panics
    /// If `i >= n_rows()`.
    pub fn row(&self, i: usize) -> &[f64] {
        let d = self.n_cols();
        &self.values[i * d..(i + 1) * d]
    }

    /// All values, row-major.
    pub fn values(&self) -> &[f64] {
        &self.values
    }

    /// Column `j` as a vector.
    pub fn column(&self, j: usize) -> Vec<f64> {
        (0..self.n_rows).map(|i| self.row(i)[j]).collect()
    }

    /// The file the table came from (or a placeholder).
    pub fn source(&self) -> &Path {
        &self.source
    }

    /// The rows with the given indices, in that order.
    ///
    /// # Errors
    /// [`Error::Data`] for an out-of-range index or an empty selection.
    pub fn take_rows(&self, indices: &[usize]) -> Result<Table> {
        let mut values = Vec::with_capacity(indices.len() * self.n_cols());
        for &i in indices {
            if i >= self.n_rows {
                return Err(Error::Data {
                    path: self.source.clone(),
                    reason: format!(
                        "row index {i} is out of range (the table has {} rows)",
                        self.n_rows
                    ),
                });
            }
            values.extend_from_slice(self.row(i));
        }
        Self::from_typed(
            self.columns.clone(),
            values,
            self.kinds.clone(),
            self.source.clone(),
        )
    }

    /// The named columns, in the given order.
    ///
    /// # Errors
    /// [`Error::Data`] naming an unknown column and listing the available ones.
    pub fn select(&self, names: &[String]) -> Result<Table> {
        let idx = column_indices(&self.columns, names).map_err(|reason| Error::Data {
            path: self.source.clone(),
            reason,
        })?;
        let mut values = Vec::with_capacity(self.n_rows * idx.len());
        for i in 0..self.n_rows {
            values.extend(idx.iter().map(|&j| self.row(i)[j]));
        }
        let kinds = idx.iter().map(|&j| self.kinds[j].clone()).collect();
        Self::from_typed(names.to_vec(), values, kinds, self.source.clone())
    }
}

fn quote(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

use crate::util::text::clip;

pub(crate) fn check_names(columns: &[String]) -> std::result::Result<(), String> {
    if columns.is_empty() {
        return Err("no columns; the first line must name the columns".into());
    }
    for (j, c) in columns.iter().enumerate() {
        if c.trim().is_empty() {
            return Err(format!(
                "column {} has an empty name; name every column in the header",
                j + 1
            ));
        }
        if let Some(k) = columns[..j].iter().position(|o| o == c) {
            return Err(format!(
                "column name '{}' appears twice (columns {} and {}); rename one",
                clip(c),
                k + 1,
                j + 1
            ));
        }
    }
    Ok(())
}

pub(crate) fn column_indices(
    columns: &[String],
    names: &[String],
) -> std::result::Result<Vec<usize>, String> {
    if names.is_empty() {
        return Err("no columns selected; name at least one".into());
    }
    check_names(names)?;
    names
        .iter()
        .map(|n| {
            columns.iter().position(|c| c == n).ok_or_else(|| {
                format!(
                    "unknown column '{}'; the columns are: {}",
                    clip(n),
                    clip(&columns.join(", "))
                )
            })
        })
        .collect()
}

/// Writes the CSV header line of `columns`.
pub(crate) fn write_csv_header(out: &mut impl std::io::Write, columns: &[String]) -> Result<()> {
    let line = columns
        .iter()
        .map(|c| quote(c))
        .collect::<Vec<_>>()
        .join(",");
    writeln!(out, "{line}")?;
    Ok(())
}

/// Writes row-major `values` with `cols` columns as CSV lines (shortest round-trip decimal
/// form of each number).
pub(crate) fn write_csv_rows(
    out: &mut impl std::io::Write,
    values: &[f64],
    cols: usize,
) -> Result<()> {
    for row in values.chunks_exact(cols.max(1)) {
        let mut first = true;
        for v in row {
            if !first {
                out.write_all(b",")?;
            }
            write!(out, "{v}")?;
            first = false;
        }
        out.write_all(b"\n")?;
    }
    Ok(())
}

/// Writes row-major `values` of columns `kinds` as CSV lines: numbers in their shortest
/// round-trip form, categorical cells as their labels (quoted where needed), missing cells
/// empty.
pub(crate) fn write_typed_rows(
    out: &mut impl std::io::Write,
    values: &[f64],
    kinds: &[ColumnKind],
) -> Result<()> {
    if kinds.iter().all(|k| !k.is_categorical()) && !values.iter().any(|v| v.is_nan()) {
        return write_csv_rows(out, values, kinds.len());
    }
    for row in values.chunks_exact(kinds.len().max(1)) {
        let line = row
            .iter()
            .zip(kinds)
            .map(|(v, k)| quote(&k.cell_text(*v)))
            .collect::<Vec<_>>()
            .join(",");
        writeln!(out, "{line}")?;
    }
    Ok(())
}

/// Writes completed copies of one table (multiple imputation) as one CSV file, atomically,
/// with a first column `draw` numbering the copies from 1.
///
/// # Errors
/// [`Error::Data`] if the tables' columns differ; [`Error::Io`] if the file cannot be written.
pub fn write_draws_csv(tables: &[Table], path: impl AsRef<Path>) -> Result<()> {
    let Some(first) = tables.first() else {
        return Err(Error::config("draws", 0, "write at least one table"));
    };
    if tables.iter().any(|t| t.columns != first.columns) {
        return Err(Error::Data {
            path: path.as_ref().to_path_buf(),
            reason: "the completed tables have different columns".into(),
        });
    }
    let mut f = crate::util::fs::AtomicFile::create(path.as_ref())?;
    let mut columns = vec!["draw".to_string()];
    columns.extend(first.columns.iter().cloned());
    write_csv_header(&mut f, &columns)?;
    let mut kinds = vec![ColumnKind::Continuous];
    kinds.extend(first.kinds.iter().cloned());
    let d = first.n_cols();
    for (k, t) in tables.iter().enumerate() {
        let mut values = Vec::with_capacity(t.n_rows * (d + 1));
        for i in 0..t.n_rows {
            values.push((k + 1) as f64);
            values.extend_from_slice(t.row(i));
        }
        write_typed_rows(&mut f, &values, &kinds)?;
    }
    f.commit()
}
