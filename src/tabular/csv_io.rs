//! Reading numeric CSV files with a header.

use std::path::Path;

use super::schema::{ColumnKind, ColumnRules, Schema};
use super::survey::{is_missing, non_finite_message, number_cell, ColumnSurvey, NumberCell};
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

impl Table {
    /// Reads a CSV file whose columns may be categorical and whose cells may be missing,
    /// choosing each column's type by `rules` (see [`ColumnRules`]); keeps the named
    /// `columns` (all when `None`). The file is read twice: once to learn the types, once
    /// for the values.
    ///
    /// # Errors
    /// As [`Table::from_csv`]; and, naming the column and what to do: a column with no
    /// observed cell, a categorical column with one level or more than
    /// [`ColumnRules::max_levels`], a declared column that does not exist, a text cell in a
    /// column declared continuous, a `NaN` or infinite literal (see
    /// [`ColumnRules::missing_markers`]).
    ///
    /// # Example
    /// ```
    /// # let dir = std::env::temp_dir().join(format!("nsde-typed-doc-{}", std::process::id()));
    /// # std::fs::create_dir_all(&dir)?;
    /// let path = dir.join("t.csv");
    /// std::fs::write(&path, "height,colour,count\n1.5,red,1\n2.25,,2\nNA,blue,1\n")?;
    /// let t = neural_sde::Table::from_csv_typed(&path, None, Default::default(), &Default::default())?;
    /// assert_eq!(t.kinds()[1].levels().unwrap(), ["blue", "red"]);
    /// assert!(t.kinds()[2].is_categorical()); // integers with few values
    /// assert!(t.row(1)[1].is_nan() && t.row(2)[0].is_nan()); // missing cells
    /// # std::fs::remove_dir_all(&dir)?;
    /// # Ok::<(), Box<dyn std::error::Error>>(())
    /// ```
    pub fn from_csv_typed(
        path: impl AsRef<Path>,
        columns: Option<&[String]>,
        header: HeaderLine,
        rules: &ColumnRules,
    ) -> Result<Self> {
        Self::from_csv_typed_reporting(path, columns, header, rules, &mut |_, _| {})
    }

    /// As [`Table::from_csv_typed`], calling `progress(bytes_read, file_bytes)` during the
    /// second pass.
    ///
    /// # Errors
    /// As [`Table::from_csv_typed`].
    pub fn from_csv_typed_reporting(
        path: impl AsRef<Path>,
        columns: Option<&[String]>,
        header: HeaderLine,
        rules: &ColumnRules,
        progress: &mut dyn FnMut(u64, u64),
    ) -> Result<Self> {
        let path = path.as_ref();
        rules.validate()?;
        let mut survey = CsvRows::open(path, columns, header)?;
        let names = survey.columns();
        for declared in rules.categorical.iter().chain(&rules.continuous) {
            if !names.contains(declared) {
                return Err(survey.error(format!(
                    "column '{}' is declared --categorical or --continuous but is not among the columns read ({}); check its name",
                    clip(declared),
                    clip(&names.join(", "))
                )));
            }
        }
        let kinds = survey.survey(rules)?;
        let schema = Schema {
            kinds,
            missing_markers: rules.missing_markers.clone(),
        };
        let mut rows = CsvRows::open(path, columns, header)?.typed(&schema);
        let mut t = read_rows(&mut rows, progress, schema.kinds)?;
        t.set_missing_markers(schema.missing_markers);
        Ok(t)
    }

    /// Reads a CSV file with the columns and types of `schema` (a fitted model's, say):
    /// categorical cells must be known levels; missing cells are allowed.
    ///
    /// # Errors
    /// As [`Table::from_csv`]; a level not in the schema, naming the line, column and value.
    pub fn from_csv_schema(
        path: impl AsRef<Path>,
        columns: &[String],
        header: HeaderLine,
        schema: &Schema,
    ) -> Result<Self> {
        let mut rows = CsvRows::open(path.as_ref(), Some(columns), header)?.typed(schema);
        let mut t = read_rows(&mut rows, &mut |_, _| {}, schema.kinds.clone())?;
        t.set_missing_markers(schema.missing_markers.clone());
        Ok(t)
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
    let mut rows = CsvRows::open(path, select, header_line)?;
    let kinds = vec![ColumnKind::Continuous; rows.width()];
    read_rows(&mut rows, progress, kinds)
}

fn read_rows(
    rows: &mut CsvRows,
    progress: &mut dyn FnMut(u64, u64),
    kinds: Vec<ColumnKind>,
) -> Result<Table> {
    let mut values: Vec<f64> = Vec::new();
    let mut n = 0usize;
    loop {
        let got = rows.next_rows(PROGRESS_EVERY, &mut values)?;
        if got == 0 {
            break;
        }
        n += got;
        let (at, total) = (rows.position(), rows.total);
        progress(at, total);
        if n == PROGRESS_EVERY && at > 0 && total > at {
            // Reserve for the whole file at this rate, so the vector does not grow by
            // doubling (which would briefly hold up to three times the values).
            let rows_expected = (total as f64 / (at as f64 / n as f64) * 1.02) as usize;
            let want = rows_expected.saturating_mul(rows.width());
            values.reserve(want.saturating_sub(values.len()));
        }
    }
    progress(rows.total, rows.total);
    if values.is_empty() {
        return Err(
            rows.error("the file has a header but no data rows; add rows of numbers".into())
        );
    }
    if values.capacity() > values.len() + values.len() / 8 {
        // Give back a large over-estimate (a small one is not worth a copy of the values).
        values.shrink_to_fit();
    }
    let names = rows.columns();
    Table::from_typed(names, values, kinds, rows.path.clone())
}

/// A CSV file read a batch of rows at a time, straight into flat vectors of values (no copy
/// of the text, no vector per row): [`Table::from_csv`] and streamed evaluation use it.
pub(crate) struct CsvRows {
    path: std::path::PathBuf,
    reader: csv::Reader<std::io::BufReader<std::fs::File>>,
    header: Vec<String>,
    keep: Vec<usize>,
    first_line: usize,
    records: usize,
    rec: csv::ByteRecord,
    total: u64,
    /// The kept columns' kinds and the missing-cell markers, for a typed read (`None`: every
    /// cell must be a finite number).
    typed: Option<(Vec<ColumnKind>, Vec<String>)>,
}

impl CsvRows {
    /// Opens `path` and reads its header; keeps the `select`ed columns (all when `None`).
    ///
    /// # Errors
    /// As [`Table::from_csv`] for the file and its header.
    pub(crate) fn open(
        path: &Path,
        select: Option<&[String]>,
        header_line: HeaderLine,
    ) -> Result<Self> {
        let err = |reason: String| Error::Data {
            path: path.to_path_buf(),
            reason,
        };
        let file = crate::util::fs::open_file(path).map_err(err)?;
        let total = file.metadata().map(|m| m.len()).unwrap_or(0);
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
        let keep: Vec<usize> = match select {
            Some(names) => column_indices(&header, names).map_err(err)?,
            None => (0..header.len()).collect(),
        };
        Ok(Self {
            path: path.to_path_buf(),
            reader,
            header,
            keep,
            // Without a header line the first record is data: line numbers start at 1.
            first_line: if header_line == HeaderLine::Absent {
                1
            } else {
                2
            },
            records: 0,
            rec: csv::ByteRecord::new(),
            total,
            typed: None,
        })
    }

    /// Reads cells by `schema` (kinds of the kept columns, in order): missing cells become
    /// `NaN`, categorical cells their level's index.
    pub(crate) fn typed(mut self, schema: &Schema) -> Self {
        self.typed = Some((schema.kinds.clone(), schema.missing_markers.clone()));
        self
    }

    /// First pass of a typed read: each kept column's type under `rules`.
    fn survey(&mut self, rules: &ColumnRules) -> Result<Vec<ColumnKind>> {
        let mut cols: Vec<ColumnSurvey> = (0..self.keep.len())
            .map(|_| ColumnSurvey::default())
            .collect();
        while let Some(line) = self.next_record()? {
            for (c, &j) in self.keep.iter().enumerate() {
                let text = self.cell_text(j, line)?;
                if is_missing(&rules.missing_markers, text) {
                    continue;
                }
                if let Err(why) = cols[c].add(text, line, rules.max_levels) {
                    return Err(self.error(format!(
                        "line {line}, column '{}': {why}",
                        clip(&self.header[j])
                    )));
                }
            }
        }
        let names = self.columns();
        cols.iter()
            .zip(&names)
            .map(|(c, n)| c.kind(n, rules).map_err(|r| self.error(r)))
            .collect()
    }

    /// Reads the next record that is not a blank line and checks its width; returns its line
    /// number, or `None` at the end of the file.
    fn next_record(&mut self) -> Result<Option<usize>> {
        loop {
            let line = self.records + self.first_line;
            let more = self
                .reader
                .read_byte_record(&mut self.rec)
                .map_err(|e| self.error(format!("line {line}: {}", clip(&e.to_string()))))?;
            if !more {
                return Ok(None);
            }
            self.records += 1;
            if self.rec.len() == 1 && self.rec.get(0).is_some_and(<[u8]>::is_empty) {
                continue; // blank line
            }
            self.check_width(line)?;
            return Ok(Some(line));
        }
    }

    fn check_width(&self, line: usize) -> Result<()> {
        if self.rec.len() != self.header.len() {
            return Err(self.error(format!(
                "line {line} has {} fields but the header has {} columns; make every row the same length",
                self.rec.len(),
                self.header.len()
            )));
        }
        Ok(())
    }

    /// Cell `j` of the current record as text.
    fn cell_text(&self, j: usize, line: usize) -> Result<&str> {
        let cell = self.rec.get(j).unwrap_or(b"");
        std::str::from_utf8(cell).map_err(|_| {
            self.error(format!(
                "line {line}, column '{}': cell '{}' is not UTF-8 text",
                clip(&self.header[j]),
                clip(&String::from_utf8_lossy(cell))
            ))
        })
    }

    /// Cell `j` (kept column `c`) of a typed read as a value.
    fn typed_cell(&self, c: usize, j: usize, line: usize) -> Result<f64> {
        let Some((kinds, markers)) = &self.typed else {
            return Err(self.error("internal: not a typed read".into()));
        };
        let text = self.cell_text(j, line)?;
        if is_missing(markers, text) {
            return Ok(f64::NAN);
        }
        let at = |why: String| {
            self.error(format!(
                "line {line}, column '{}': {why}",
                clip(&self.header[j])
            ))
        };
        match &kinds[c] {
            ColumnKind::Continuous => match number_cell(text) {
                NumberCell::Value(v) => Ok(v),
                NumberCell::NonFinite => Err(at(non_finite_message(text))),
                NumberCell::Text => Err(at(format!(
                    "cannot read '{}' as a number in a continuous column; fix the cell or mark it missing (empty, NA, or --missing-marker)",
                    clip(text)
                ))),
            },
            kind @ ColumnKind::Categorical { levels } => match kind.level_of(text) {
                Some(i) => Ok(i as f64),
                None => Err(at(format!(
                    "level '{}' was not seen in training (the levels are: {}); fix the cell or mark it missing",
                    clip(text),
                    clip(&levels.join(", "))
                ))),
            },
        }
    }

    /// The kept columns' names.
    pub(crate) fn columns(&self) -> Vec<String> {
        self.keep.iter().map(|&j| self.header[j].clone()).collect()
    }

    /// Values per row.
    pub(crate) fn width(&self) -> usize {
        self.keep.len()
    }

    /// Bytes read so far.
    fn position(&self) -> u64 {
        self.reader.position().byte()
    }

    /// An error about this file.
    pub(crate) fn error(&self, reason: String) -> Error {
        Error::Data {
            path: self.path.clone(),
            reason,
        }
    }

    /// Appends up to `max_rows` rows to `values` (row-major); returns how many (0 at the end
    /// of the file). Blank lines are skipped.
    ///
    /// # Errors
    /// [`Error::Data`] naming the line and column of a ragged row or a cell that is not a
    /// finite number.
    pub(crate) fn next_rows(&mut self, max_rows: usize, values: &mut Vec<f64>) -> Result<usize> {
        let mut got = 0;
        while got < max_rows {
            let Some(line) = self.next_record()? else {
                break;
            };
            if self.typed.is_some() {
                for (c, &j) in self.keep.iter().enumerate() {
                    values.push(self.typed_cell(c, j, line)?);
                }
                got += 1;
                continue;
            }
            let rec = &self.rec;
            for &j in &self.keep {
                let cell = rec.get(j).unwrap_or(b"");
                match parse_cell(cell) {
                    Ok(v) => values.push(v),
                    Err(why) => {
                        return Err(self.error(format!(
                            "line {line}, column '{}': {why}",
                            clip(&self.header[j]),
                        )))
                    }
                }
            }
            got += 1;
        }
        Ok(got)
    }
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
