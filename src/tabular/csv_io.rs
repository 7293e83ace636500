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
        read(path.as_ref(), columns, HeaderLine::Auto, &mut |_, _| {})
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
        read(path.as_ref(), columns, header, &mut |_, _| {})
    }

    /// As [`Table::from_csv_with_header`], calling `progress(bytes_read, file_bytes)` every
    /// 65,536 rows and at the end (a progress bar for big files, say). The file is parsed
    /// as a stream into one flat vector: memory holds the values, not the text.
    ///
    /// # Errors
    /// As [`Table::from_csv`].
    pub fn from_csv_reporting(
        path: impl AsRef<Path>,
        columns: Option<&[String]>,
        header: HeaderLine,
        progress: &mut dyn FnMut(u64, u64),
    ) -> Result<Self> {
        read(path.as_ref(), columns, header, progress)
    }
}

/// Rows read between two calls of the progress callback.
const PROGRESS_EVERY: usize = 65_536;

fn read(
    path: &Path,
    select: Option<&[String]>,
    header_line: HeaderLine,
    progress: &mut dyn FnMut(u64, u64),
) -> Result<Table> {
    let err = |reason: String| Error::Data {
        path: path.to_path_buf(),
        reason,
    };
    let file = crate::util::fs::open_file(path).map_err(err)?;
    let total = file.metadata().map(|m| m.len()).unwrap_or(0);
    // Streamed: the file is parsed in pieces straight into one flat vector of values, so
    // memory holds the values (8 bytes each) and not the text or a vector per row.
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(header_line != HeaderLine::Absent)
        .flexible(true)
        .trim(csv::Trim::All)
        .buffer_capacity(1 << 20)
        .from_reader(std::io::BufReader::with_capacity(1 << 20, file));
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
    if first.iter().all(String::is_empty) && reader.is_done() {
        return Err(err(
            "the file is empty; expected a header line naming the columns, then rows of numbers"
                .into(),
        ));
    }
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
    let mut values: Vec<f64> = Vec::new();
    let mut rec = csv::ByteRecord::new();
    let mut i = 0usize;
    loop {
        let more = reader
            .read_byte_record(&mut rec)
            .map_err(|e| err(format!("line {}: {}", i + first_line, clip(&e.to_string()))))?;
        if !more {
            break;
        }
        let line = i + first_line;
        i += 1;
        if rec.len() == 1 && rec.get(0).is_some_and(<[u8]>::is_empty) {
            continue; // blank line
        }
        if rec.len() != header.len() {
            return Err(err(format!(
                "line {line} has {} fields but the header has {} columns; make every row the same length",
                rec.len(),
                header.len()
            )));
        }
        for &j in &keep {
            let cell = rec.get(j).unwrap_or(b"");
            values.push(parse_cell(cell).map_err(|why| {
                err(format!("line {line}, column '{}': {why}", clip(&header[j]),))
            })?);
        }
        if i.is_multiple_of(PROGRESS_EVERY) {
            let at = reader.position().byte();
            progress(at, total);
            if i == PROGRESS_EVERY && at > 0 && total > at {
                // Reserve for the whole file at this rate, so the vector does not grow by
                // doubling (which would briefly hold up to three times the values).
                let per_row = at as f64 / i as f64;
                let rows = (total as f64 / per_row * 1.02) as usize;
                values.reserve(rows.saturating_mul(keep.len()).saturating_sub(values.len()));
            }
        }
    }
    progress(total, total);
    if values.is_empty() {
        return Err(err(
            "the file has a header but no data rows; add rows of numbers".into(),
        ));
    }
    if values.capacity() > values.len() + values.len() / 8 {
        // Give back a large over-estimate (a small one is not worth a copy of the values).
        values.shrink_to_fit();
    }
    let names = keep.iter().map(|&j| header[j].clone()).collect();
    Table::from_flat(names, values, path.to_path_buf())
}

/// One cell as a finite number, or why not.
fn parse_cell(cell: &[u8]) -> std::result::Result<f64, String> {
    let text = std::str::from_utf8(cell).map_err(|_| {
        format!(
            "cannot read '{}' as a number (not UTF-8 text); every selected cell must be numeric",
            clip(&String::from_utf8_lossy(cell))
        )
    })?;
    let v: f64 = text.parse().map_err(|_| {
        format!(
            "cannot read '{}' as a number; every selected cell must be numeric",
            clip(text)
        )
    })?;
    if v.is_finite() {
        Ok(v)
    } else {
        Err(format!(
            "value '{}' is not finite; remove or impute it",
            clip(text)
        ))
    }
}
