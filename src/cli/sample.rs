//! `neural-sde sample`.

use std::path::PathBuf;

use clap::Args;
use neural_sde::TabularModel;

use super::files::Files;
use super::{positive_usize, Failure};

#[derive(Debug, Args)]
pub struct SampleArgs {
    /// Model written by `neural-sde fit`.
    model: PathBuf,
    /// Number of rows to generate.
    #[arg(long, value_parser = positive_usize)]
    rows: usize,
    /// Where to write the rows (CSV with the model's column names).
    #[arg(long)]
    out: PathBuf,
    /// Seed of the generated rows.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Also draw histograms and pairwise scatter plots of the first four columns (SVG).
    #[arg(long)]
    plot: Option<PathBuf>,
    /// Table to draw beside the generated rows in the plot (e.g. the training data).
    #[arg(long)]
    data: Option<PathBuf>,
    /// The CSV file's first line names the columns, even if the names are numbers.
    #[arg(long)]
    header: bool,
    /// The CSV file has no header line (its columns are named c1, c2, …).
    #[arg(long)]
    no_header: bool,
    /// Draw the built-in demo table beside the generated rows.
    #[arg(long)]
    demo: bool,
}

pub fn run(a: SampleArgs) -> Result<(), Failure> {
    Files::default()
        .input("model", Some(&a.model))
        .input("data file", a.data.as_deref())
        .output("--out", Some(&a.out))
        .output("--plot", a.plot.as_deref())
        .check()?;
    let model = TabularModel::load(&a.model)?;
    let reference = if a.data.is_some() || a.demo {
        Some(super::load_table_with(
            a.data.as_deref(),
            a.demo,
            Some(model.columns()),
            super::header_line(a.header, a.no_header)?,
        )?)
    } else {
        None
    };
    // Streamed to the file; the plot shows the first rows.
    let first = model.generate_csv(&a.out, a.rows, a.seed)?;
    if let Some(p) = &a.plot {
        neural_sde::plot::pairs_svg(&first, reference.as_ref(), 4, p)?;
    }
    println!("{} rows written to {}", a.rows, a.out.display());
    Ok(())
}
