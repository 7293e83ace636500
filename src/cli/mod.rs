//! Argument parsing and dispatch; every failure becomes one line on stderr.

mod evaluate;
mod files;
mod fit;
mod inspect;
mod progress;
mod sample;

use std::path::Path;

use clap::{Parser, Subcommand};

/// Fit latent-diffusion (neural SDE) models to numeric CSV tables, then evaluate them and
/// generate new rows. Fitted models can mislead: validate them before relying on them.
#[derive(Debug, Parser)]
#[command(name = "neural-sde", version)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Fit a model to a table (or to the built-in synthetic demo table with --demo).
    Fit(fit::FitArgs),
    /// ELBO and importance-weighted log-likelihood of a model on a table, in the data's units.
    Evaluate(evaluate::EvaluateArgs),
    /// Generate new rows from a model.
    Sample(sample::SampleArgs),
    /// Show a model's configuration, columns, scaler and training summary.
    Inspect(inspect::InspectArgs),
}

/// A failure with its exit status.
pub struct Failure {
    code: i32,
    message: String,
}

impl Failure {
    /// Bad input or options: exit status 2.
    pub fn input(message: impl Into<String>) -> Self {
        Self {
            code: 2,
            message: message.into(),
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
        Self { code, message }
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
    let result = match cli.command {
        Command::Fit(a) => fit::run(a),
        Command::Evaluate(a) => evaluate::run(a),
        Command::Sample(a) => sample::run(a),
        Command::Inspect(a) => inspect::run(a),
    };
    match result {
        Ok(()) => 0,
        Err(f) => {
            // Messages clip what they echo; this only guards against printing megabytes.
            let mut m = f.message;
            if let Some((cut, _)) = m.char_indices().nth(2000) {
                m.truncate(cut);
                m.push('…');
            }
            eprintln!("error: {m}");
            f.code
        }
    }
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

/// Loads a CSV table or the demo table, keeping `columns` when given; `header` says whether
/// the CSV file's first line names the columns.
pub fn load_table_with(
    data: Option<&Path>,
    demo: bool,
    columns: Option<&[String]>,
    header: neural_sde::HeaderLine,
) -> Result<neural_sde::Table, Failure> {
    match (data, demo) {
        (Some(_), true) => Err(Failure::input(
            "give either a data file or --demo, not both",
        )),
        (None, false) => Err(Failure::input(
            "give a data file (CSV with a header), or --demo for the built-in demo table",
        )),
        (Some(p), false) => Ok(neural_sde::Table::from_csv_with_header(p, columns, header)?),
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
