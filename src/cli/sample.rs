//! `neural-sde sample`.

use std::path::PathBuf;

use clap::Args;

use super::files::Files;
use super::models::Scored;
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
    /// Generate rows conditioned on these cells, `column=value[,column=value…]` (a number for
    /// a continuous column, a level for a categorical one): the other cells are drawn from the
    /// model's conditional distribution given them (see `impute`).
    #[arg(long, value_delimiter = ',')]
    given: Vec<String>,
    /// Posterior paths per row for --given; more paths give rows closer to the model's
    /// conditional.
    #[arg(long, default_value_t = 256, value_parser = positive_usize)]
    paths: usize,
    /// Generate from the ensemble of the model and this one (a model file of the same
    /// columns, e.g. fitted with another --seed), each file weighing the same: each row comes
    /// from a member drawn at random. Repeat for more models.
    #[arg(long = "with", value_name = "MODEL")]
    with: Vec<PathBuf>,
}

pub fn run(a: SampleArgs) -> Result<(), Failure> {
    let mut files = Files::default();
    files
        .input("model", Some(&a.model))
        .input("data file", a.data.as_deref());
    for w in &a.with {
        files.input("--with model", Some(w));
    }
    files
        .output("--out", Some(&a.out))
        .output("--plot", a.plot.as_deref())
        .check()?;
    let scored = Scored::load(&a.model, &a.with)?;
    let model = scored.first();
    let reference = if a.data.is_some() || a.demo {
        Some(super::load_table_with(
            a.data.as_deref(),
            a.demo,
            Some(model.columns()),
            super::header_line(a.header, a.no_header)?,
            super::Reading::Schema(model.schema()),
        )?)
    } else {
        None
    };
    let first = if a.given.is_empty() {
        // Streamed to the file; the plot shows the first rows.
        scored.generate_csv(&a.out, a.rows, a.seed)?
    } else {
        let mut given = Vec::new();
        for g in &a.given {
            let Some((c, v)) = g.split_once('=') else {
                return Err(Failure::input(format!(
                    "--given '{}': write column=value",
                    g.chars().take(100).collect::<String>()
                )));
            };
            given.push((c.trim().to_string(), v.trim().to_string()));
        }
        let options = neural_sde::ImputeOptions {
            paths: a.paths,
            draws: 1,
            seed: a.seed,
        };
        let result = scored.generate_given(a.rows, &given, options)?;
        let t = result
            .tables
            .into_iter()
            .next()
            .ok_or_else(|| Failure::input("no rows drawn"))?;
        t.write_csv(&a.out)?;
        super::impute::report_ess(&result.ess, a.paths * scored.count(), |_| true);
        t
    };
    if let Some(p) = &a.plot {
        neural_sde::plot::pairs_svg(&first, reference.as_ref(), 4, p)?;
    }
    println!("{} rows written to {}", a.rows, a.out.display());
    Ok(())
}
