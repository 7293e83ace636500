//! A fitted latent-diffusion model of a table: evaluation and generation in the data's units.

use std::path::Path;

use std::collections::HashMap;

use candle_core::Tensor;
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::nn::params::sorted_vars;
use crate::tabular::coding::RowCoder;
use crate::tabular::evaluation::{EvalOptions, EvalSums, Evaluation};
use crate::tabular::model::{LatentConfig, LatentModel, PriorFactory, RowLayout};
use crate::tabular::scaler::Standardizer;
use crate::tabular::schema::Schema;
use crate::tabular::table::Table;
use crate::tabular::train::history::{History, Timing};
use crate::util::rng::{generator, streams};

/// A latent-diffusion model of a table, with its standardisation and column names.
///
/// Produced by [`crate::Trainer`]; saved and loaded as one `.safetensors` file.
#[derive(Debug)]
pub struct TabularModel {
    pub(crate) model: LatentModel,
    pub(crate) scaler: Standardizer,
    pub(crate) columns: Vec<String>,
    pub(crate) history: History,
    pub(crate) schema: Schema,
    pub(crate) coder: RowCoder,
}

/// Name prefixes of the training state a checkpoint holds beside the model's weights:
/// optimiser moments, best weights, the weights training had reached and the running
/// average of the weights.
pub(crate) const TRAINING_PREFIXES: [&str; 4] = ["optim.", "best.", "last.", "average."];

impl TabularModel {
    /// The latent model (standardised units).
    pub fn latent(&self) -> &LatentModel {
        &self.model
    }

    /// The standardisation fitted on the training rows.
    pub fn scaler(&self) -> &Standardizer {
        &self.scaler
    }

    /// Column names, in order.
    pub fn columns(&self) -> &[String] {
        &self.columns
    }

    /// Each column's type and the missing-cell markers the model was fitted with.
    pub fn schema(&self) -> &Schema {
        &self.schema
    }

    /// Whether `other` models the same columns, in the same order and of the same types
    /// (what [`crate::Ensemble`] requires of its members).
    pub fn same_columns_as(&self, other: &TabularModel) -> bool {
        self.columns == other.columns && self.schema.kinds == other.schema.kinds
    }

    /// Training history (empty for a model that was never trained).
    pub fn history(&self) -> &History {
        &self.history
    }

    /// Saves the model alone (no training state), atomically.
    ///
    /// # Errors
    /// [`Error::Io`] or [`Error::Checkpoint`] if it cannot be written.
    pub fn save(&self, path: impl AsRef<Path>) -> Result<()> {
        crate::nn::checkpoint::write(
            path.as_ref(),
            FORMAT,
            self.tensors()?,
            &self.header(),
            crate::nn::checkpoint::parses_as::<ModelHeader>,
        )
    }

    /// Loads a model saved by [`crate::Trainer::save`] or [`TabularModel::save`].
    ///
    /// # Errors
    /// [`Error::Checkpoint`] naming what is wrong with the file.
    pub fn load(path: impl AsRef<Path>) -> Result<Self> {
        Ok(Self::read(path.as_ref(), None)?.0)
    }

    /// Loads a model whose prior drift was built by `prior` (see
    /// [`crate::Trainer::with_prior`]); pass the same builder.
    ///
    /// # Errors
    /// [`Error::Checkpoint`] naming what is wrong with the file.
    pub fn load_with_prior(
        path: impl AsRef<Path>,
        prior: &crate::tabular::model::PriorFactory,
    ) -> Result<Self> {
        Ok(Self::read(path.as_ref(), Some(prior))?.0)
    }

    /// The table's columns in the model's order, checked against the model's column types.
    pub(crate) fn matching(&self, table: &Table) -> Result<Table> {
        let t = if table.columns() == self.columns.as_slice() {
            table.clone()
        } else {
            self.select_columns(table)?
        };
        if t.kinds() != self.schema.kinds.as_slice() {
            return Err(Error::Data {
                path: table.source().to_path_buf(),
                reason: "the table's column types differ from the model's (a categorical column read as numbers, say); read it with the model's schema (Table::from_csv_schema)".into(),
            });
        }
        Ok(t)
    }

    fn select_columns(&self, table: &Table) -> Result<Table> {
        table.select(&self.columns).map_err(|_| Error::Data {
            path: table.source().to_path_buf(),
            reason: format!(
                "the model was trained on columns [{}] but the table has [{}]; pass a table with those columns",
                self.columns.join(", "),
                table.columns().join(", ")
            ),
        })
    }

    /// ELBO and importance-weighted log-likelihood from `options.paths` posterior paths per
    /// row, computed in chunks; the figures of each row are kept in the result.
    ///
    /// # Errors
    /// [`Error::Data`] if the table lacks the model's columns; [`Error::InvalidConfig`] for
    /// 0 paths.
    pub fn evaluate(&self, table: &Table, options: EvalOptions) -> Result<Evaluation> {
        let figures = self.row_figures(table, options)?;
        let mut sums = EvalSums::default();
        for &(e, l, cells) in &figures {
            sums.add(e, l, cells);
        }
        let per_row = figures.iter().map(|&(e, l, _)| (e, l)).unzip();
        sums.finish(self.columns.len(), options.paths, Some(per_row))
    }

    /// Each row's ELBO, importance-weighted log-likelihood (data units) and observed cells,
    /// as [`TabularModel::evaluate`] computes them.
    pub(crate) fn row_figures(
        &self,
        table: &Table,
        options: EvalOptions,
    ) -> Result<Vec<(f64, f64, usize)>> {
        let paths = check_paths(options.paths)?;
        let table = self.matching(table)?;
        let d = self.columns.len();
        let mut rng = generator(options.seed, streams::EVAL);
        let chunk_rows = self.eval_chunk_rows(paths);
        let mut out = Vec::with_capacity(table.n_rows());
        for (c, rows) in table.values().chunks(chunk_rows * d).enumerate() {
            let at = (table.source(), c * chunk_rows);
            self.eval_chunk(rows, at, paths, &mut rng, |e, l, cells| {
                out.push((e, l, cells))
            })?;
        }
        Ok(out)
    }

    /// As [`TabularModel::evaluate`] on the rows of a CSV file, read a chunk at a time: memory
    /// does not grow with the number of rows (the result keeps no per-row figures). With the
    /// same options it gives the figures [`TabularModel::evaluate`] gives on the loaded table.
    ///
    /// # Errors
    /// As [`Table::from_csv`] for the file; as [`TabularModel::evaluate`].
    #[cfg(feature = "csv")]
    pub fn evaluate_csv(
        &self,
        path: impl AsRef<Path>,
        header: crate::tabular::csv_io::HeaderLine,
        options: EvalOptions,
    ) -> Result<Evaluation> {
        let paths = check_paths(options.paths)?;
        let mut reader =
            crate::tabular::csv_io::CsvRows::open(path.as_ref(), Some(&self.columns), header)?
                .typed(&self.schema);
        let d = self.columns.len();
        let mut rng = generator(options.seed, streams::EVAL);
        let chunk_rows = self.eval_chunk_rows(paths);
        let mut sums = EvalSums::default();
        let mut raw = Vec::new();
        let mut done = 0;
        loop {
            raw.clear();
            let got = reader.next_rows(chunk_rows, &mut raw)?;
            if got == 0 {
                break;
            }
            let at = (path.as_ref(), done);
            self.eval_chunk(&raw, at, paths, &mut rng, |e, l, cells| {
                sums.add(e, l, cells)
            })?;
            done += got;
        }
        if sums.is_empty() {
            return Err(
                reader.error("the file has a header but no data rows; add rows of numbers".into())
            );
        }
        sums.finish(d, paths, None)
    }

    /// Rows evaluated together.
    fn eval_chunk_rows(&self, paths: usize) -> usize {
        self.model
            .config()
            .chunk_rows(self.coder.layout(), paths, (8192 / paths).max(1))
            .max(1)
    }

    /// Evaluates table rows `raw` (data units, the model's columns; the first is data row
    /// `first + 1` of `source`), calling `each(elbo, loglik, observed cells)` per row (data
    /// units). A row with no observed cell is refused.
    fn eval_chunk(
        &self,
        raw: &[f64],
        (source, first): (&Path, usize),
        paths: usize,
        rng: &mut crate::util::rng::Generator,
        mut each: impl FnMut(f64, f64, usize),
    ) -> Result<()> {
        let d = self.columns.len();
        let r = raw.len() / d;
        let mut z = Vec::with_capacity(r * self.coder.layout().coded_width());
        let mut rows = Vec::with_capacity(r);
        for (i, row) in raw.chunks_exact(d).enumerate() {
            let (cells, jac) = self.coder.encode_into(row, &self.scaler, &mut z);
            if cells == 0 {
                return Err(Error::Data {
                    path: source.to_path_buf(),
                    reason: format!(
                        "data row {} has no observed cell, so it has no likelihood; leave such rows out",
                        first + i + 1
                    ),
                });
            }
            rows.push((cells, jac));
        }
        let terms = self.model.posterior_terms_coded(&z, paths, rng)?;
        for (i, &(cells, jac)) in rows.iter().enumerate() {
            let lw = &terms.log_weight[i * paths..(i + 1) * paths];
            let el = &terms.elbo[i * paths..(i + 1) * paths];
            let max = lw.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            let lse = max + lw.iter().map(|l| (l - max).exp()).sum::<f64>().ln();
            each(
                el.iter().sum::<f64>() / paths as f64 + jac,
                lse - (paths as f64).ln() + jac,
                cells,
            );
        }
        Ok(())
    }

    /// Generates `rows` new rows in the data's units (seeded, in batches, no autodiff graph).
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for `rows == 0` or more than 100 × [`Self::KEPT_ROWS`]
    /// (use [`TabularModel::generate_csv`] for more).
    pub fn generate(&self, rows: usize, seed: u64) -> Result<Table> {
        check_memory_rows(rows)?;
        let mut out = Vec::with_capacity(rows * self.columns.len());
        for y in self.generated_batches(rows, seed) {
            out.extend(y?);
        }
        self.table_of(out)
    }

    /// Generates `rows` new rows like [`TabularModel::generate`] (the same rows for the same
    /// seed) and streams them to a CSV file at `path` (atomically), so memory does not grow
    /// with `rows`. Returns the first rows, at most [`TabularModel::KEPT_ROWS`] (for plots).
    ///
    /// # Errors
    /// As [`TabularModel::generate`]; [`Error::Io`] or [`Error::Data`] if the file cannot
    /// be written (nothing is left at `path` then).
    pub fn generate_csv(&self, path: impl AsRef<Path>, rows: usize, seed: u64) -> Result<Table> {
        check_streamed_rows(rows)?;
        self.stream_csv(path.as_ref(), |sink| {
            for y in self.generated_batches(rows, seed) {
                sink(&y?)?;
            }
            Ok(())
        })
    }

    /// Writes the rows `produce` hands to its sink, batch by batch (data units, row-major,
    /// this model's columns), to a CSV file at `path` atomically, and returns the first of
    /// them, at most [`TabularModel::KEPT_ROWS`]. Nothing is left at `path` on an error.
    pub(crate) fn stream_csv(
        &self,
        path: &Path,
        produce: impl FnOnce(&mut dyn FnMut(&[f64]) -> Result<()>) -> Result<()>,
    ) -> Result<Table> {
        let mut file = crate::util::fs::AtomicFile::create(path)?;
        crate::tabular::table::write_csv_header(&mut file, &self.columns)?;
        let d = self.columns.len();
        let mut kept = Vec::new();
        produce(&mut |y: &[f64]| {
            crate::tabular::table::write_typed_rows(&mut file, y, &self.schema.kinds)?;
            let room = (Self::KEPT_ROWS * d).saturating_sub(kept.len());
            kept.extend(y.iter().take(room));
            Ok(())
        })?;
        file.commit()?;
        self.table_of(kept)
    }

    /// A table of the model's columns and types from row-major values.
    pub(crate) fn table_of(&self, values: Vec<f64>) -> Result<Table> {
        Table::from_typed(
            self.columns.clone(),
            values,
            self.schema.kinds.clone(),
            std::path::PathBuf::from("<generated>"),
        )
    }

    /// `rows` generated rows in the data's units, row-major, in batches whose noise fits in
    /// memory (the same batches for the same seed, whatever the caller does with them).
    fn generated_batches(
        &self,
        rows: usize,
        seed: u64,
    ) -> impl Iterator<Item = Result<Vec<f64>>> + '_ {
        let mut rng = generator(seed, streams::EVAL);
        let chunk = self.model.config().chunk_rows(self.coder.layout(), 1, 4096);
        let mut left = rows;
        std::iter::from_fn(move || {
            if left == 0 {
                return None;
            }
            let n = left.min(chunk);
            left -= n;
            Some(self.model.generate(n, &mut rng).map(|g| {
                let w = self.coder.layout().columns();
                let mut out = Vec::with_capacity(g.len());
                for row in g.chunks_exact(w) {
                    self.coder.decode_into(row, &self.scaler, &mut out);
                }
                out
            }))
        })
    }

    /// Rows [`TabularModel::generate_csv`] returns at most.
    pub const KEPT_ROWS: usize = 10_000;
}

/// Value of the `format` entry of a tabular model's checkpoint.
pub(crate) const FORMAT: &str = "neural-sde-model";

/// The model's part of a checkpoint header (the trainer adds its own fields beside these).
#[derive(Serialize, Deserialize)]
pub(crate) struct ModelHeader {
    pub model_config: LatentConfig,
    pub data_dim: usize,
    pub columns: Vec<String>,
    pub scaler: Standardizer,
    pub history: History,
    /// Every wall-clock time of the file (the rest of the header is deterministic).
    #[serde(default)]
    pub timing: Timing,
    /// Column types (absent: every column continuous).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub schema: Option<Schema>,
    /// Whether the control sees which continuous cells are missing.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub mask_input: bool,
}

impl TabularModel {
    /// The model's header fields.
    pub(crate) fn header(&self) -> ModelHeader {
        let (history, timing) = self.history.split_timing();
        ModelHeader {
            model_config: self.model.config().clone(),
            data_dim: self.model.data_dim(),
            columns: self.columns.clone(),
            scaler: self.scaler.clone(),
            history,
            timing,
            schema: (!self.schema.all_continuous() || !self.schema.missing_markers.is_empty())
                .then(|| self.schema.clone()),
            mask_input: self.coder.layout().mask_input,
        }
    }

    /// The model's weights, by name.
    pub(crate) fn tensors(&self) -> Result<Vec<(String, Tensor)>> {
        Ok(sorted_vars(self.model.varmap())?
            .into_iter()
            .map(|(n, v)| (n, v.as_tensor().clone()))
            .collect())
    }

    /// Reads a checkpoint: the model with its weights, and every tensor of the file (the
    /// trainer takes its own from them). Every tensor must belong to the model, as a weight,
    /// an optimiser moment (`optim.m.`, `optim.v.`), a best weight (`best.`), the weights
    /// training had reached when they differ from the model's (`last.`) or the running
    /// average of the weights (`average.`; see [`TRAINING_PREFIXES`]). Also returns the
    /// header's timing, whose training seconds the trainer keeps.
    pub(crate) fn read(
        path: &Path,
        factory: Option<&PriorFactory>,
    ) -> Result<(Self, HashMap<String, Tensor>, Timing)> {
        let raw = crate::nn::checkpoint::read_raw(path)?;
        crate::tabular::ensemble_file::refuse_ensemble(path, &raw)?;
        Self::read_stored(raw.single(path, FORMAT)?, factory)
    }

    /// As [`TabularModel::read`] for one object of a file (see
    /// [`crate::nn::checkpoint::Stored`]).
    pub(crate) fn read_stored(
        stored: crate::nn::checkpoint::Stored<'_>,
        factory: Option<&PriorFactory>,
    ) -> Result<(Self, HashMap<String, Tensor>, Timing)> {
        let (path, bytes) = (stored.path, stored.bytes);
        let bad = |reason: String| Error::Checkpoint {
            path: path.to_path_buf(),
            reason,
        };
        let header: ModelHeader = crate::nn::checkpoint::parse_header(path, stored.header)?;
        header.check().map_err(bad)?;
        match (header.model_config.custom_prior, factory.is_some()) {
            (true, false) => {
                return Err(bad(
                    "this model uses a custom prior drift; load it from Rust with `TabularModel::load_with_prior` and the same builder".into(),
                ))
            }
            (false, true) => {
                return Err(bad("this model uses the built-in prior drift; load it with `TabularModel::load`".into()))
            }
            _ => {}
        }
        let schema = header
            .schema
            .clone()
            .unwrap_or_else(|| Schema::continuous(header.data_dim));
        let coder = RowCoder::new(&schema.kinds, header.mask_input);
        let layout: &RowLayout = coder.layout();
        if header.scaler.mean.len() != layout.continuous {
            return Err(bad(format!(
                "the header is inconsistent: {} scaler entries for {} continuous columns",
                header.scaler.mean.len(),
                layout.continuous
            )));
        }
        header
            .model_config
            .validate_for(layout)
            .map_err(|e| bad(format!("the stored configuration is invalid ({e})")))?;
        if !header.model_config.custom_prior {
            crate::nn::checkpoint::check_implied_size_under(
                path,
                bytes,
                header.model_config.parameter_count(layout),
                &TRAINING_PREFIXES,
                stored.prefix,
            )?;
        }
        let file = crate::nn::checkpoint::read_tensors_under(
            path,
            bytes,
            header.model_config.precision.dtype(),
            stored.prefix,
        )?;
        // Rebuild the model, then copy every weight in after checking its shape.
        let model = LatentModel::build(&header.model_config, layout, 0, factory)
            .map_err(|e| bad(format!("the stored configuration is invalid ({e})")))?;
        crate::nn::checkpoint::load_vars(path, model.varmap(), &file)?;
        let vars = sorted_vars(model.varmap())?;
        for name in file.keys() {
            let base = ["optim.m.", "optim.v.", "best.", "last.", "average."]
                .iter()
                .find_map(|p| name.strip_prefix(p))
                .unwrap_or(name);
            if !vars.iter().any(|(n, _)| n == base) {
                return Err(bad(format!(
                    "unexpected tensor {name}: it does not belong to this model"
                )));
            }
        }
        let mut history = header.history;
        history.merge_timing(&header.timing);
        let model = TabularModel {
            model,
            scaler: header.scaler,
            columns: header.columns,
            history,
            schema,
            coder,
        };
        Ok((model, file, header.timing))
    }
}

impl ModelHeader {
    /// Checks that the header's parts agree with each other.
    pub(crate) fn check(&self) -> std::result::Result<(), String> {
        if let Some(s) = &self.schema {
            s.check(
                self.data_dim,
                crate::tabular::schema::ColumnRules::default().max_levels,
            )?;
        }
        let continuous = self.schema.as_ref().map_or(self.data_dim, |s| {
            s.kinds.iter().filter(|k| !k.is_categorical()).count()
        });
        if self.columns.len() != self.data_dim
            || self.scaler.mean.len() != continuous
            || self.scaler.scale.len() != continuous
        {
            return Err(format!(
                "the header is inconsistent: {} columns, {} scaler entries, data dimension {}",
                self.columns.len(),
                self.scaler.mean.len(),
                self.data_dim
            ));
        }
        let scaler_ok = self.scaler.mean.iter().all(|m| m.is_finite())
            && self.scaler.scale.iter().all(|s| s.is_finite() && *s > 0.0);
        if !scaler_ok {
            return Err(
                "the scaler holds a non-finite mean or a scale that is not finite and positive"
                    .into(),
            );
        }
        Ok(())
    }
}

/// Rows generated in memory at most by one call (more are streamed to a file).
const MEMORY_ROWS: usize = TabularModel::KEPT_ROWS * 100;

/// Checks a number of rows to generate in memory: at least 1, at most [`MEMORY_ROWS`].
pub(crate) fn check_memory_rows(rows: usize) -> Result<()> {
    if rows == 0 {
        return Err(Error::config("rows", 0, "generate at least 1 row"));
    }
    if rows > MEMORY_ROWS {
        return Err(Error::config(
            "rows",
            rows,
            format!("at most {MEMORY_ROWS} rows are generated in memory; stream more to a file with generate_csv"),
        ));
    }
    Ok(())
}

/// Checks a number of rows to generate into a file: at least 1, at most
/// [`crate::util::limits::MAX_GENERATED_ROWS`].
pub(crate) fn check_streamed_rows(rows: usize) -> Result<()> {
    if rows == 0 {
        return Err(Error::config("rows", 0, "generate at least 1 row"));
    }
    crate::util::limits::at_most(
        "rows",
        rows,
        crate::util::limits::MAX_GENERATED_ROWS,
        "rows per call",
    )?;
    Ok(())
}

/// Checks the number of posterior paths per row.
fn check_paths(paths: usize) -> Result<usize> {
    if paths == 0 {
        return Err(Error::config(
            "paths",
            0,
            "use at least 1 posterior path per row",
        ));
    }
    crate::util::limits::at_most(
        "paths",
        paths,
        crate::util::limits::MAX_BATCH,
        "posterior paths per row",
    )?;
    Ok(paths)
}
