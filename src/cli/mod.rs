//! Argument parsing and dispatch; every failure becomes one line on stderr.

mod evaluate;
mod files;
mod fit;
mod group;
mod impute;
mod inspect;
mod models;
mod progress;
mod sample;

use std::path::Path;

use clap::{Parser, Subcommand};

/// Fit latent-diffusion (neural SDE) models to CSV tables (continuous and categorical
/// columns, missing cells allowed), then evaluate them, generate new rows and fill in missing
/// cells. Fitted models can mislead: validate them before relying on them.
#[derive(Debug, Parser)]
#[command(name = "neural-sde", version)]
pub struct Cli {
    /// Threads for the numerical work [default: RAYON_NUM_THREADS if set, else for fit 1
    /// for batches under 256 rows and every core otherwise, for evaluate and sample every
    /// core]. Results do not depend on it.
    #[arg(long, global = true, value_parser = positive_usize)]
    threads: Option<usize>,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Fit a model to a table (or to the built-in synthetic demo table with --demo), with early
    /// stopping on held-out rows (and with --refit, a final fit on every row). Under
    /// `mpirun -np P` (built with the `mpi` feature) the P processes train one model together.
    Fit(Box<fit::FitArgs>),
    /// ELBO and importance-weighted log-likelihood of a model on a table, in the data's units.
    Evaluate(evaluate::EvaluateArgs),
    /// Generate new rows from a model, optionally conditioned on some cells (--given).
    Sample(sample::SampleArgs),
    /// Fill in the missing cells of a table with draws from the model's conditional
    /// distribution given each row's observed cells.
    Impute(impute::ImputeArgs),
    /// Show a model's configuration, columns, scaler and training summary.
    Inspect(inspect::InspectArgs),
}

/// A failure with its exit status.
pub struct Failure {
    code: i32,
    message: String,
    /// Another process of the same job prints the message.
    quiet: bool,
}

impl Failure {
    /// Bad input or options: exit status 2.
    pub fn input(message: impl Into<String>) -> Self {
        Self {
            code: 2,
            message: message.into(),
            quiet: false,
        }
    }

    /// Prints the message as one `error:` line on stderr.
    pub fn print(&self) {
        // Messages clip what they echo; this only guards against printing megabytes.
        let mut m = self.message.clone();
        if let Some((cut, _)) = m.char_indices().nth(2000) {
            m.truncate(cut);
            m.push('…');
        }
        eprintln!("error: {m}");
    }

    /// The same failure, left for another process of the job to print.
    pub fn quiet(self) -> Self {
        Self {
            quiet: true,
            ..self
        }
    }
}

impl From<neural_sde::Error> for Failure {
    fn from(e: neural_sde::Error) -> Self {
        let code = match e {
            neural_sde::Error::Training(_) => 1,
            _ => 2,
        };
        // candle appends a backtrace when RUST_BACKTRACE is set: keep the first line only.
        let message = first_line(&e.to_string()).to_string();
        Self {
            code,
            message,
            quiet: false,
        }
    }
}

/// Runs the tool; returns the exit status.
pub fn run() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) if !e.use_stderr() => {
            // --help and --version
            let _ = e.print();
            return 0;
        }
        Err(e) => {
            // One line: clap's first line names the problem; point to --help for the fix.
            let text = e.render().to_string();
            let first = text
                .lines()
                .find(|l| !l.trim().is_empty())
                .unwrap_or("error: invalid arguments");
            eprintln!("{first} (see --help)");
            return 2;
        }
    };
    let threads = cli.threads;
    let result = match cli.command {
        // `fit` sets the thread count once it knows the batch size.
        Command::Fit(a) => fit::run(*a, threads),
        Command::Evaluate(a) => set_threads(threads, cores()).and_then(|()| evaluate::run(a)),
        Command::Sample(a) => set_threads(threads, cores()).and_then(|()| sample::run(a)),
        Command::Impute(a) => set_threads(threads, cores()).and_then(|()| impute::run(a)),
        Command::Inspect(a) => set_threads(threads, 1).and_then(|()| inspect::run(a)),
    };
    match result {
        Ok(()) => 0,
        Err(f) if f.quiet => f.code,
        Err(f) => {
            f.print();
            f.code
        }
    }
}

/// The machine's cores.
pub fn cores() -> usize {
    std::thread::available_parallelism().map_or(1, usize::from)
}

/// Sets the thread count of the numerical work: `--threads`, else `RAYON_NUM_THREADS`, else
/// `default`.
pub fn set_threads(threads: Option<usize>, default: usize) -> Result<(), Failure> {
    let from_env = std::env::var("RAYON_NUM_THREADS")
        .ok()
        .and_then(|v| v.parse::<usize>().ok())
        .filter(|&n| n >= 1);
    Ok(neural_sde::set_threads(
        threads.or(from_env).unwrap_or(default),
    )?)
}

/// The first line of `text`.
pub fn first_line(text: &str) -> &str {
    text.lines().next().unwrap_or("unknown error")
}

/// The `--header` / `--no-header` choice.
pub fn header_line(header: bool, no_header: bool) -> Result<neural_sde::HeaderLine, Failure> {
    match (header, no_header) {
        (true, true) => Err(Failure::input("give --header or --no-header, not both")),
        (true, false) => Ok(neural_sde::HeaderLine::Present),
        (false, true) => Ok(neural_sde::HeaderLine::Absent),
        (false, false) => Ok(neural_sde::HeaderLine::Auto),
    }
}

/// How a CSV file's cells are read.
pub enum Reading<'a> {
    /// Column types guessed by these rules (fit).
    Typed(&'a neural_sde::ColumnRules),
    /// The types of a fitted model.
    Schema(&'a neural_sde::Schema),
}

/// Loads a CSV table or the demo table, keeping `columns` when given; `header` says whether
/// the CSV file's first line names the columns.
pub fn load_table_with(
    data: Option<&Path>,
    demo: bool,
    columns: Option<&[String]>,
    header: neural_sde::HeaderLine,
    reading: Reading<'_>,
) -> Result<neural_sde::Table, Failure> {
    match (data, demo) {
        (Some(_), true) => Err(Failure::input(
            "give either a data file or --demo, not both",
        )),
        (None, false) => Err(Failure::input(
            "give a data file (CSV with a header), or --demo for the built-in demo table",
        )),
        (Some(p), false) => {
            // A bar for files that take more than a moment to read (progress::loading).
            let mut bar = progress::Loading::new(p);
            let t = match reading {
                Reading::Typed(rules) => neural_sde::Table::from_csv_typed_reporting(
                    p,
                    columns,
                    header,
                    rules,
                    &mut |at, all| bar.update(at, all),
                ),
                Reading::Schema(schema) => {
                    let Some(c) = columns else {
                        bar.finish();
                        return Err(Failure::input(
                            "internal: a model's schema needs its columns",
                        ));
                    };
                    neural_sde::Table::from_csv_schema(p, c, header, schema)
                }
            };
            bar.finish();
            Ok(t?)
        }
        (None, true) => {
            let t = neural_sde::builtin_demo()?;
            Ok(match columns {
                Some(c) => t.select(c)?,
                None => t,
            })
        }
    }
}

/// A strictly positive number.
pub fn positive_f64(s: &str) -> Result<f64, String> {
    let v: f64 = s.parse().map_err(|_| format!("'{s}' is not a number"))?;
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(format!("{s} must be a finite number > 0"))
    }
}

/// A number in (0, 1].
pub fn scale_factor(s: &str) -> Result<f64, String> {
    let v: f64 = s.parse().map_err(|_| format!("'{s}' is not a number"))?;
    if v > 0.0 && v <= 1.0 {
        Ok(v)
    } else {
        Err(format!("{s} must lie in (0, 1]"))
    }
}

/// An integer of at least 1.
pub fn positive_usize(s: &str) -> Result<usize, String> {
    let v: usize = s
        .parse()
        .map_err(|_| format!("'{s}' is not a whole number"))?;
    if v >= 1 {
        Ok(v)
    } else {
        Err("must be at least 1".into())
    }
}

/// A fraction in [0, 1).
pub fn fraction(s: &str) -> Result<f64, String> {
    let v: f64 = s.parse().map_err(|_| format!("'{s}' is not a number"))?;
    if (0.0..1.0).contains(&v) {
        Ok(v)
    } else {
        Err(format!("{s} must lie in [0, 1)"))
    }
}
