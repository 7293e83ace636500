//! Reading numeric CSV files with a header.

use std::path::Path;

use super::table::{check_names, column_indices, Table};
use crate::error::{Error, Result};
use crate::util::text::clip;

/// Whether a CSV file's first line names the columns.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum HeaderLine {
    /// It does, unless every name on it is a number: then the file is refused, since a
    /// numbers-only first line is usually a row of data (say which with the other choices).
    #[default]
    Auto,
    /// It does, even when the names are numbers.
    Present,
    /// It does not: the first line is data, and the columns are named `c1, c2, …`.
    Absent,
}

impl Table {
    /// Reads a CSV file with a header line; keeps the named `columns` (all when `None`).
    /// A first line of numbers only is refused (see [`HeaderLine::Auto`]).
    ///
    /// # Errors
    /// [`Error::Data`] naming the file, and the line and column where relevant: missing or
    /// unreadable file, empty file, header only, a numbers-only first line, ragged rows,
    /// non-numeric cells, NaN or infinite values, duplicate column names, unknown selected
    /// columns.
    pub fn from_csv(path: impl AsRef<Path>, columns: Option<&[String]>) -> Result<Self> {
        read(path.as_ref(), columns, HeaderLine::Auto)
    }

    /// As [`Table::from_csv`], saying whether the first line names the columns.
    ///
    /// # Errors
    /// As [`Table::from_csv`].
    pub fn from_csv_with_header(
        path: impl AsRef<Path>,
        columns: Option<&[String]>,
        header: HeaderLine,
    ) -> Result<Self> {
        read(path.as_ref(), columns, header)
    }
}

fn read(path: &Path, select: Option<&[String]>, header_line: HeaderLine) -> Result<Table> {
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
        .has_headers(header_line != HeaderLine::Absent)
        .flexible(true)
        .trim(csv::Trim::All)
        .from_reader(bytes.as_slice());
    let first: Vec<String> = reader
        .headers()
        .map_err(|e| {
            err(format!(
                "cannot read the header line: {}",
                clip(&e.to_string())
            ))
        })?
        .iter()
        .map(str::to_string)
        .collect();
    let header: Vec<String> = match header_line {
        HeaderLine::Absent => (1..=first.len()).map(|j| format!("c{j}")).collect(),
        _ => first,
    };
    if header_line == HeaderLine::Auto
        && header
            .iter()
            .all(|c| !c.is_empty() && c.parse::<f64>().is_ok())
    {
        return Err(err(format!(
            "the first line ({}) holds only numbers: is it a row of data? Say --no-header if so (columns are then named c1, c2, …), or --header if these numbers are the column names",
            clip(&header.join(","))
        )));
    }
    check_names(&header).map_err(|r| err(format!("header: {r}")))?;
    // Without a header line the first record is data: line numbers start at 1.
    let first_line = if header_line == HeaderLine::Absent {
        1
    } else {
        2
    };
    let keep: Vec<usize> = match select {
        Some(names) => column_indices(&header, names).map_err(err)?,
        None => (0..header.len()).collect(),
    };
    let mut rows = Vec::new();
    for (i, rec) in reader.records().enumerate() {
        let line = i + first_line;
        let rec = rec.map_err(|e| err(format!("line {line}: {}", clip(&e.to_string()))))?;
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
                    "line {line}, column '{}': cannot read '{}' as a number; every selected cell must be numeric",
                    clip(&header[j]),
                    clip(cell)
                ))
            })?;
            if !v.is_finite() {
                return Err(err(format!(
                    "line {line}, column '{}': value '{}' is not finite; remove or impute it",
                    clip(&header[j]),
                    clip(cell)
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
