//! `neural-sde evaluate`.

use std::path::PathBuf;

use clap::Args;
use neural_sde::{EvalOptions, TabularModel};

use super::{positive_usize, Failure};

#[derive(Debug, Args)]
pub struct EvaluateArgs {
    /// Model written by `neural-sde fit`.
    model: PathBuf,
    /// CSV file with (at least) the model's columns.
    data: Option<PathBuf>,
    /// The CSV file's first line names the columns, even if the names are numbers.
    #[arg(long)]
    header: bool,
    /// The CSV file has no header line (its columns are named c1, c2, …).
    #[arg(long)]
    no_header: bool,
    /// Evaluate on the built-in demo table instead of a file.
    #[arg(long)]
    demo: bool,
    /// Posterior paths per row for the importance-weighted estimate (more: tighter).
    #[arg(long, default_value_t = 128, value_parser = positive_usize)]
    paths: usize,
    /// Seed of the posterior paths.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Print one JSON object on one line instead of text.
    #[arg(long)]
    json: bool,
}

pub fn run(a: EvaluateArgs) -> Result<(), Failure> {
    let model = TabularModel::load(&a.model)?;
    let header = super::header_line(a.header, a.no_header)?;
    let options = EvalOptions::new(a.paths, a.seed);
    let e = match (&a.data, a.demo) {
        // A file is read a chunk of rows at a time: memory does not grow with its length.
        (Some(path), false) => model.evaluate_csv(path, header, options)?,
        _ => {
            let table =
                super::load_table_with(a.data.as_deref(), a.demo, Some(model.columns()), header)?;
            model.evaluate(&table, options)?
        }
    };
    if a.json {
        let v = serde_json::json!({
            "rows": e.rows,
            "dims": e.dims,
            "paths": e.paths,
            "elbo_per_row": e.elbo_per_row,
            "elbo_per_dim": e.elbo_per_dim,
            "loglik_per_row": e.loglik_per_row,
            "loglik_per_dim": e.loglik_per_dim,
            "loglik_se_per_row": e.loglik_se,
        });
        println!("{v}");
    } else {
        println!("{e}");
    }
    Ok(())
}
