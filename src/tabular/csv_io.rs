//! Reading numeric CSV files with a header.

use std::path::Path;

use super::table::{check_names, column_indices, Table};
use crate::error::{Error, Result};

impl Table {
    /// Reads a CSV file with a header line; keeps the named `columns` (all when `None`).
    ///
    /// # Errors
    /// [`Error::Data`] naming the file, and the line and column where relevant: missing or
    /// unreadable file, empty file, header only, ragged rows, non-numeric cells, NaN or
    /// infinite values, duplicate column names, unknown selected columns.
    pub fn from_csv(path: impl AsRef<Path>, columns: Option<&[String]>) -> Result<Self> {
        read(path.as_ref(), columns)
    }
}

fn read(path: &Path, select: Option<&[String]>) -> Result<Table> {
    let err = |reason: String| Error::Data {
        path: path.to_path_buf(),
        reason,
    };
    let bytes = crate::util::fs::read_file(path).map_err(err)?;
    if bytes.iter().all(|b| b.is_ascii_whitespace()) {
        return Err(err(
            "the file is empty; expected a header line naming the columns, then rows of numbers"
                .into(),
        ));
    }
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(bytes.as_slice());
    let header: Vec<String> = reader
        .headers()
        .map_err(|e| err(format!("cannot read the header line: {e}")))?
        .iter()
        .map(str::to_string)
        .collect();
    check_names(&header).map_err(|r| err(format!("header: {r}")))?;
    let keep: Vec<usize> = match select {
        Some(names) => column_indices(&header, names).map_err(err)?,
        None => (0..header.len()).collect(),
    };
    let mut rows = Vec::new();
    for (i, rec) in reader.records().enumerate() {
        let line = i + 2;
        let rec = rec.map_err(|e| err(format!("line {line}: {e}")))?;
        if rec.len() == 1 && rec.get(0) == Some("") {
            continue; // blank line
        }
        if rec.len() != header.len() {
            return Err(err(format!(
                "line {line} has {} fields but the header has {} columns; make every row the same length",
                rec.len(),
                header.len()
            )));
        }
        let mut row = Vec::with_capacity(keep.len());
        for &j in &keep {
            let cell = rec.get(j).unwrap_or("");
            let v: f64 = cell.parse().map_err(|_| {
                err(format!(
                    "line {line}, column '{}': cannot read '{cell}' as a number; every selected cell must be numeric",
                    header[j]
                ))
            })?;
            if !v.is_finite() {
                return Err(err(format!(
                    "line {line}, column '{}': value '{cell}' is not finite; remove or impute it",
                    header[j]
                )));
            }
            row.push(v);
        }
        rows.push(row);
    }
    if rows.is_empty() {
        return Err(err(
            "the file has a header but no data rows; add rows of numbers".into(),
        ));
    }
    let names = keep.iter().map(|&j| header[j].clone()).collect();
    Table::from_parts(names, rows, path.to_path_buf())
}
