//! `neural-sde impute`.

use std::path::PathBuf;

use clap::Args;
use neural_sde::ImputeOptions;

use super::files::Files;
use super::models::Scored;
use super::{positive_usize, Failure};

#[derive(Debug, Args)]
pub struct ImputeArgs {
    /// Model written by `neural-sde fit`.
    model: PathBuf,
    /// CSV file with the model's columns (other columns are left out of the output); missing
    /// cells empty, NA, or a marker given when the model was fitted.
    data: PathBuf,
    /// Where to write the completed table (CSV; observed cells are copied unchanged).
    #[arg(long)]
    out: PathBuf,
    /// Completed copies to draw (multiple imputation); with more than one, a first column
    /// `draw` numbers them.
    #[arg(long, default_value_t = 1, value_parser = positive_usize)]
    draws: usize,
    /// Posterior paths per row; more paths give draws closer to the model's conditional.
    #[arg(long, default_value_t = 256, value_parser = positive_usize)]
    paths: usize,
    /// Seed of the paths and draws.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// The CSV file's first line names the columns, even if the names are numbers.
    #[arg(long)]
    header: bool,
    /// The CSV file has no header line (its columns are named c1, c2, …).
    #[arg(long)]
    no_header: bool,
}

pub fn run(a: ImputeArgs) -> Result<(), Failure> {
    Files::default()
        .input("model", Some(&a.model))
        .input("data file", Some(&a.data))
        .output("--out", Some(&a.out))
        .check()?;
    let scored = Scored::load(&a.model, &[])?;
    let model = scored.first();
    let header = super::header_line(a.header, a.no_header)?;
    let table = super::load_table_with(
        Some(&a.data),
        false,
        Some(model.columns()),
        header,
        super::Reading::Schema(model.schema()),
    )?;
    if a.draws > 1 && model.columns().iter().any(|c| c == "draw") {
        return Err(Failure::input(
            "the table has a column named 'draw', which --draws would add; rename it or draw one copy",
        ));
    }
    let options = ImputeOptions {
        paths: a.paths,
        draws: a.draws,
        seed: a.seed,
    };
    let result = scored.impute(&table, options)?;
    let missing = table.values().iter().filter(|v| v.is_nan()).count();
    if a.draws == 1 {
        result.tables[0].write_csv(&a.out)?;
    } else {
        neural_sde::write_draws_csv(&result.tables, &a.out)?;
    }
    let rows_missing = (0..table.n_rows())
        .filter(|&i| table.row(i).iter().any(|v| v.is_nan()))
        .count();
    println!(
        "{missing} missing cells in {rows_missing} of {} rows filled ({} completed {}) and written to {}",
        table.n_rows(),
        a.draws,
        if a.draws == 1 { "copy" } else { "copies" },
        a.out.display()
    );
    report_ess(&result.ess, a.paths * scored.count(), |i| {
        table.row(i).iter().any(|v| v.is_nan())
    });
    Ok(())
}

/// Prints the effective sample sizes of the rows `counted` selects, and a warning when some
/// are small.
pub fn report_ess(ess: &[f64], paths: usize, counted: impl Fn(usize) -> bool) {
    let mut v: Vec<f64> = ess
        .iter()
        .enumerate()
        .filter(|(i, _)| counted(*i))
        .map(|(_, e)| *e)
        .collect();
    if v.is_empty() {
        return;
    }
    v.sort_by(f64::total_cmp);
    println!(
        "effective sample size of the posterior paths per row: min {:.1}, median {:.1} (of {paths})",
        v[0],
        v[v.len() / 2]
    );
    let small = v.iter().filter(|&&e| e < 10.0).count();
    if small > 0 {
        eprintln!(
            "warning: {small} rows have an effective sample size under 10: their draws rest on a few posterior paths and may not follow the model's conditional; raise --paths, and check those rows"
        );
    }
}
