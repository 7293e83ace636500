//! `neural-sde fit`.

use std::path::PathBuf;

use clap::Args;
use neural_sde::{
    AdamWConfig, EnsembleTrainer, History, LatentConfig, MlpConfig, OptimizerConfig, SolverConfig,
    TrainConfig, TrainReport,
};

use neural_sde::collective::on_root;

use super::files::Files;
use super::group::Group;
use super::{fraction, positive_f64, positive_usize, scale_factor, Failure};

#[derive(Debug, Args)]
pub struct FitArgs {
    /// CSV file with a header line: continuous and categorical columns, missing cells empty or
    /// NA.
    data: Option<PathBuf>,
    /// Fit the built-in demo table (synthetic greenhouse readings, 2,000 rows × 5 columns).
    #[arg(long)]
    demo: bool,
    /// Where to write the model (a .safetensors file; written only when fitting succeeds).
    #[arg(long)]
    out: PathBuf,
    /// The CSV file's first line names the columns, even if the names are numbers.
    #[arg(long)]
    header: bool,
    /// The CSV file has no header line: the first line is data and the columns are named
    /// c1, c2, … (a first line of numbers only is refused unless one of these is given).
    #[arg(long)]
    no_header: bool,
    /// Columns to model, comma-separated [default: all].
    #[arg(long, value_delimiter = ',')]
    columns: Option<Vec<String>>,
    /// Latent dimension [default: the number of columns].
    #[arg(long, value_parser = positive_usize)]
    latent_dim: Option<usize>,
    /// Components of the observation noise, a Gaussian mixture over the continuous cells (1:
    /// one Gaussian). The fit starts from the mixture EM finds [default: from 1 to 10, the
    /// larger of the counts chosen by BIC on the training rows and by the likelihood of the
    /// validation rows, for tables of up to 64 continuous columns with no categorical column
    /// and no missing cell, otherwise 1; when that is a mixture, the fit from one Gaussian
    /// is also trained and the member's weight is split between the two fits by the weight
    /// that maximises their mixture's validation log-likelihood (a fit whose weight is 0 is
    /// dropped)].
    #[arg(long, value_parser = positive_usize)]
    noise_components: Option<usize>,
    /// Hidden units per layer of the drift and control networks.
    #[arg(long, default_value_t = 64, value_parser = positive_usize)]
    hidden: usize,
    /// Hidden layers of the drift and control networks.
    #[arg(long, default_value_t = 2, value_parser = positive_usize)]
    depth: usize,
    /// Euler–Maruyama steps of the latent path on [0, 1].
    #[arg(long, default_value_t = 20, value_parser = positive_usize)]
    steps: usize,
    /// Models to fit, with seeds --seed, --seed + 1, …, each holding out a different block of
    /// --validation-fraction of the rows, written to --out as one ensemble: the mixture of
    /// their densities, which every other command reads. They train in turn, one epoch each,
    /// sharing --time-budget [default: as many, 2 to 4, as keep their training rows within
    /// 6,400 in all (4 for tables of up to 1,600 rows, 3 up to 2,133, 2 up to 50,000), so
    /// that fits of a few thousand rows end within the time budget; four members gained over
    /// two on average on every table measured (benchmarks document). 1 for bigger tables;
    /// with --resume, the checkpoint's].
    #[arg(long, value_parser = positive_usize)]
    members: Option<usize>,
    /// Epochs to train each member (each at least 50 optimiser steps, and at most 1,000: on
    /// big tables an epoch is 1,000 steps of freshly shuffled rows); the learning-rate
    /// schedule is planned over them. With --resume: the epoch to stop at [default: 150,
    /// and 300 for a single member; with --resume, the checkpoint's plan].
    /// Resumed runs keep the checkpoint's schedule; epochs past its plan run at the final
    /// learning rate.
    #[arg(long, value_parser = positive_usize)]
    epochs: Option<usize>,
    /// End this run after this many epochs in all, keeping the schedule planned over
    /// --epochs; continue later with --resume (the result is then the same as one run).
    #[arg(long, value_parser = positive_usize)]
    stop_after: Option<usize>,
    /// Rows per minibatch [default: 64; 1024 for tables of 50,000 rows or more, where bigger
    /// batches keep every core busy].
    #[arg(long, value_parser = positive_usize)]
    batch_size: Option<usize>,
    /// Peak learning rate (AdamW, warm-up then cosine decay). A fit whose noise is a mixture
    /// of several components runs at --mixture-learning-rate-scale times it.
    #[arg(long, default_value_t = 3e-3, value_parser = positive_f64, allow_negative_numbers = true)]
    learning_rate: f64,
    /// Factor, in (0, 1], on the learning rate of a fit whose observation noise is a mixture
    /// of several components: at the full rate Adam's steps disturb the mixture start's
    /// narrow components (measured in the benchmarks document) [default: 1/3].
    #[arg(long, default_value_t = 1.0 / 3.0, hide_default_value = true, value_parser = scale_factor, allow_negative_numbers = true)]
    mixture_learning_rate_scale: f64,
    /// Decay, in [0, 1), of the running average of the weights that validation scores and
    /// the fit keeps (0: no average; 0.99 averages over about a hundred steps).
    #[arg(long, default_value_t = 0.99, value_parser = fraction, allow_negative_numbers = true)]
    weight_average: f64,
    /// Seed of every random draw (split, minibatches, weights, noise) of the first member;
    /// member i has seed --seed + i - 1.
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Share of rows held out to measure the validation ELBO (early stopping; computed each
    /// epoch on a seeded subset of at most 2,048 of them).
    #[arg(long, default_value_t = 0.2, value_parser = fraction, allow_negative_numbers = true)]
    validation_fraction: f64,
    /// Stop training after this many seconds (all members together) and keep the best
    /// models so far. The default lets the default fit of tables of a few thousand rows end
    /// by itself (the open tables measured took up to 140 s on one core).
    #[arg(long, default_value_t = 180.0, value_parser = positive_f64, allow_negative_numbers = true)]
    time_budget: f64,
    /// Write the per-epoch history (CSV) here.
    #[arg(long)]
    history: Option<PathBuf>,
    /// Write the training and validation ELBO curves (SVG) here.
    #[arg(long)]
    plot: Option<PathBuf>,
    /// Continue training from this checkpoint, on the same table (other model options are
    /// taken from the checkpoint).
    #[arg(long)]
    resume: Option<PathBuf>,
    /// Columns to treat as categorical (comma-separated), whatever they hold. By default a
    /// column with a non-numeric cell, or whose values are all integers with at most 20
    /// distinct values, is categorical; every other column is continuous.
    #[arg(long, value_delimiter = ',')]
    categorical: Vec<String>,
    /// Columns to treat as continuous (comma-separated), e.g. an integer count with few values.
    #[arg(long, value_delimiter = ',')]
    continuous: Vec<String>,
    /// A cell text that marks a missing cell, besides the empty cell and NA (repeat for more).
    #[arg(long = "missing-marker")]
    missing_marker: Vec<String>,
    /// Once the fit (on the rows not held out) ends by its plan or by early stopping, train
    /// the model again on every row for the number of epochs validation chose, within what is
    /// left of --time-budget, and write that model. Off by default: it helped the smallest
    /// open table the crate is measured on and lost a little on the others.
    #[arg(long)]
    refit: bool,
    /// Also write the training checkpoint to --out every N epochs while fitting (atomically),
    /// so that a killed fit can be continued with --resume.
    #[arg(long, value_parser = positive_usize)]
    checkpoint_every: Option<usize>,
}

/// Tables with at least this many rows get the bigger default batch.
const BIG_TABLE_ROWS: usize = 50_000;

/// Batches of at least this many rows use every core by default (the fused kernel runs
/// blocks of 128 paths in parallel; see the benchmarks document).
const PARALLEL_BATCH: usize = 256;

/// Fits a model; under `mpirun` (with the `mpi` feature), every process runs this and they
/// train one model together (see [`super::group`]).
pub fn run(a: FitArgs, threads: Option<usize>) -> Result<(), Failure> {
    let group = Group::join()?;
    let result = (|| {
        let ready = prepare(&a, &group, threads);
        let (trainer, dims, rows, table) = group.agree(ready)?;
        let mut trainer = trainer
            .in_group(|| group.handle())
            .map_err(|e| group.settle(e))?;
        finish(&a, &group, &mut trainer, (dims, rows), table)
    })();
    group.finish(result)
}

/// Loads the table and builds (or resumes) the members' trainers: everything that can fail
/// on one process alone before the processes train together.
fn prepare(
    a: &FitArgs,
    group: &Group,
    threads: Option<usize>,
) -> Result<(EnsembleTrainer, usize, usize, Option<neural_sde::Table>), Failure> {
    Files::default()
        .input("data file", a.data.as_deref())
        .input("checkpoint to resume", a.resume.as_deref())
        .output("--out", Some(&a.out))
        .output("--history", a.history.as_deref())
        .output("--plot", a.plot.as_deref())
        .check()?;
    if let (Some(m), true) = (a.members, a.resume.is_some()) {
        return Err(Failure::input(format!(
            "--members {m} cannot be given with --resume: a resumed fit keeps the checkpoint's members"
        )));
    }
    if let Some(m) = a.members.filter(|&m| m > neural_sde::MAX_MEMBERS) {
        return Err(Failure::input(format!(
            "--members {m} is more than the {} an ensemble may hold; fit fewer",
            neural_sde::MAX_MEMBERS
        )));
    }
    let header = super::header_line(a.header, a.no_header)?;
    let table = match &a.resume {
        // Resuming reads the table with the checkpoint's column types.
        Some(ck) if a.data.is_some() => {
            let info = neural_sde::inspect_checkpoint(ck)?;
            super::load_table_with(
                a.data.as_deref(),
                a.demo,
                Some(&info.columns),
                header,
                super::Reading::Schema(&info.schema),
            )?
        }
        _ => {
            let rules = neural_sde::ColumnRules {
                categorical: a.categorical.clone(),
                continuous: a.continuous.clone(),
                missing_markers: a.missing_marker.clone(),
                ..neural_sde::ColumnRules::default()
            };
            super::load_table_with(
                a.data.as_deref(),
                a.demo,
                a.columns.as_deref(),
                header,
                super::Reading::Typed(&rules),
            )?
        }
    };
    let big = table.n_rows() >= BIG_TABLE_ROWS;
    let batch_size = a.batch_size.unwrap_or(if big { 1024 } else { 64 });
    let default_threads = if batch_size >= PARALLEL_BATCH {
        super::cores()
    } else {
        1
    };
    super::set_threads(threads, default_threads)?;
    let trainer = match &a.resume {
        Some(ck) => {
            let mut t = EnsembleTrainer::resume(ck, &table)?;
            let plan = t.members()[0].planned_epochs();
            let until = a.stop_after.or(a.epochs).unwrap_or(plan);
            if until > plan && group.is_root() {
                eprintln!(
                    "note: the checkpoint's learning-rate schedule is planned over {plan} epochs; epochs {} to {until} run at its final learning rate",
                    plan + 1
                );
            }
            let reached = t.members().iter().map(|m| m.state().epoch).max();
            t.set_epochs(until.max(reached.unwrap_or(0)));
            t
        }
        None => {
            let members = a.members.unwrap_or_else(|| default_members(table.n_rows()));
            let mlp = MlpConfig {
                width: a.hidden,
                depth: a.depth,
                ..MlpConfig::default()
            };
            let model = LatentConfig {
                latent_dim: a.latent_dim,
                noise_components: a.noise_components,
                prior: mlp.clone(),
                control: mlp,
                solver: SolverConfig {
                    n_steps: a.steps,
                    ..SolverConfig::default()
                },
                ..LatentConfig::default()
            };
            let train = TrainConfig {
                epochs: a.epochs.unwrap_or(if members == 1 {
                    SINGLE_FIT_EPOCHS
                } else {
                    MEMBER_EPOCHS
                }),
                batch_size,
                optimizer: OptimizerConfig {
                    adamw: AdamWConfig {
                        learning_rate: a.learning_rate,
                        ..AdamWConfig::default()
                    },
                    ..OptimizerConfig::default()
                },
                seed: a.seed,
                refit: a.refit,
                mixture_learning_rate_scale: a.mixture_learning_rate_scale,
                weight_average: a.weight_average,
                validation_fraction: a.validation_fraction,
                ..TrainConfig::default()
            };
            let mut t = EnsembleTrainer::new(&table, model, train, members)?;
            if let Some(k) = a.stop_after {
                t.set_epochs(k);
            }
            t
        }
    };
    let mut trainer = trainer;
    trainer.set_time_budget(Some(a.time_budget))?;
    if let Some(every) = a.checkpoint_every {
        trainer.checkpoint_every(every, &a.out)?;
    }
    // The trainers keep their coded rows: the table is kept only for a refit on all rows or
    // a second start.
    let first = &trainer.members()[0];
    let refit = first.config().refit && first.config().validation_fraction > 0.0;
    let keep = refit || trainer.members().iter().any(|m| m.state().mixture_chosen);
    let (dims, rows) = (table.n_cols(), table.n_rows());
    Ok((trainer, dims, rows, keep.then_some(table)))
}

/// The default fit's members hold at most about this many rows in all: as many members, 2
/// to 4, as keep within it (one for tables of [`BIG_TABLE_ROWS`] rows or more). Each member
/// costs one more fit: four members of wine's 1,279 training rows took 129–142 s with two
/// fits side by side (the whole 1,599-row table alone: 118 s), so tables of a few thousand
/// rows get fewer and end within the default time budget (benchmarks document).
const DEFAULT_MEMBER_ROWS: usize = 6_400;

/// The default member count for a table of `rows` rows (see [`DEFAULT_MEMBER_ROWS`]).
fn default_members(rows: usize) -> usize {
    if rows >= BIG_TABLE_ROWS {
        1
    } else {
        (DEFAULT_MEMBER_ROWS / rows.max(1)).clamp(2, 4)
    }
}

/// Epochs of each member of a default fit of two or more members.
const MEMBER_EPOCHS: usize = 150;

/// Epochs of a default fit of a single member.
const SINGLE_FIT_EPOCHS: usize = 300;

/// Trains, writes the model and its history (process 0), and reports.
fn finish(
    a: &FitArgs,
    group: &Group,
    trainer: &mut EnsembleTrainer,
    (dims, rows): (usize, usize),
    table: Option<neural_sde::Table>,
) -> Result<(), Failure> {
    let root = group.is_root();
    if root {
        for w in trainer.members().iter().flat_map(|m| m.warnings()) {
            eprintln!("warning: {w}");
        }
    }
    let outcome = fit_with_progress(trainer, root, dims, a.time_budget);
    let (mut reports, failure) = match outcome {
        Ok(r) => (Some(r), None),
        // Keep what was learned: after a training failure the trainers hold the best weights.
        Err(neural_sde::Error::Training(why)) => (None, Some(why)),
        Err(e) => return Err(group.settle(e)),
    };
    let mut start_notes = Vec::new();
    if let (Some(r), Some(t)) = (&mut reports, &table) {
        start_notes = compare_starts(a, group, trainer, t, r, dims)?;
    }
    trainer.save(&a.out).map_err(|e| group.settle(e))?;
    let collective = trainer.members()[0].group();
    let histories: Vec<&History> = trainer.members().iter().map(|m| m.history()).collect();
    if let Some(h) = &a.history {
        let what = format!("the history {}", h.display());
        on_root(collective, &what, || {
            History::write_members_csv(&histories, h)
        })
        .map_err(|e| group.settle(e))?;
    }
    if let Some(p) = &a.plot {
        let what = format!("the plot {}", p.display());
        on_root(collective, &what, || {
            neural_sde::plot::elbo_curves_svg(&histories, dims, p)
        })
        .map_err(|e| group.settle(e))?;
    }
    if !root {
        return match failure {
            Some(why) => Err(Failure::from(neural_sde::Error::Training(why)).quiet()),
            None => Ok(()),
        };
    }
    if let Some(why) = failure {
        return Err(Failure::from(neural_sde::Error::Training(format!(
            "{why}; the best model so far was written to {}",
            a.out.display()
        ))));
    }
    let reports = reports.ok_or_else(|| Failure::input("training produced no report"))?;
    let seconds = reports.iter().map(|r| r.seconds).fold(0.0, f64::max);
    let several = reports.len() > 1;
    if several {
        println!(
            "fitted {dims} columns of {rows} rows in {seconds:.1} s: an ensemble of {} members (seeds {} to {})",
            reports.len(),
            trainer.members()[0].config().seed,
            trainer.members()[reports.len() - 1].config().seed
        );
    }
    let what = if a.validation_fraction > 0.0 {
        "validation"
    } else {
        "training"
    };
    for (i, (report, member)) in reports.iter().zip(trainer.members()).enumerate() {
        let how = report.termination;
        let mut line = if several {
            format!(
                "member {}: {how} after {} epochs; kept epoch {}",
                i + 1,
                report.epochs,
                report.best_epoch
            )
        } else {
            format!(
                "fitted {dims} columns of {rows} rows in {:.1} s: {how} after {} epochs; kept epoch {}",
                report.seconds, report.epochs, report.best_epoch
            )
        };
        // Each member's scaler is fitted on its own training rows.
        let jac = member.model().scaler().log_jacobian();
        if let Some(best) = member.state().best_elbo {
            line.push_str(&format!(
                "{}best {what} ELBO per dimension: {:.4} nats (data units)",
                if several { "; " } else { "\n" },
                (best + jac) / dims as f64
            ));
        }
        println!("{line}");
        if let Some(Some(note)) = start_notes.get(i) {
            println!("{note}");
        }
    }
    if let (Some(t), true) = (&table, trainer.members()[0].config().refit) {
        refit(a, group, trainer, t, seconds, dims)?;
    }
    println!("model written to {}", a.out.display());
    Ok(())
}

/// Trains the members, showing a progress bar (against `budget` seconds) on process 0,
/// fed by the first member.
fn fit_with_progress(
    trainer: &mut EnsembleTrainer,
    root: bool,
    dims: usize,
    budget: f64,
) -> neural_sde::Result<Vec<TrainReport>> {
    let first = &mut trainer.members_mut()[0];
    let jac = first.model().scaler().log_jacobian();
    let bar = if root {
        let progress = super::progress::Progress::new(dims, jac, Some(budget));
        let bar = progress.bar_clone();
        first.add_observer(Box::new(progress));
        Some(bar)
    } else {
        None
    };
    let outcome = trainer.fit();
    if let Some(bar) = bar {
        bar.finish_and_clear();
    }
    outcome
}

/// Beside each member whose fit started from a Gaussian mixture of the count it chose, trains
/// the fit from one Gaussian (all of them together, within what is left of the time budget)
/// and weighs the two fits by their validation likelihood, keeping both or one (see
/// `EnsembleTrainer::compare_starts`); a member's report becomes the fit from one Gaussian's
/// when that alone was kept, with the seconds of both. Returns, per member, the line that
/// reports the outcome.
fn compare_starts(
    a: &FitArgs,
    group: &Group,
    trainer: &mut EnsembleTrainer,
    table: &neural_sde::Table,
    reports: &mut [TrainReport],
    dims: usize,
) -> Result<Vec<Option<String>>, Failure> {
    let root = group.is_root();
    let none = vec![None; reports.len()];
    if !trainer.members().iter().any(|m| m.state().mixture_chosen) {
        return Ok(none);
    }
    let components: Vec<usize> = trainer
        .members()
        .iter()
        .map(|m| m.model().latent().config().noise_components.unwrap_or(1))
        .collect();
    let spent = reports.iter().map(|r| r.seconds).fold(0.0, f64::max);
    let left = a.time_budget - spent;
    // Every process of a job trains the second starts, or none: process 0's clock decides.
    if !group.root_decides(left >= 1.0)? {
        if root {
            eprintln!("note: the time budget is spent; the fit from one Gaussian was not tried");
        }
        return Ok(none);
    }
    let jac = trainer.members()[0].model().scaler().log_jacobian();
    let mut bar = None;
    let outcome = trainer.compare_starts(table, Some(left), |t| {
        let mut t = t.in_group(group.handle())?;
        if root && bar.is_none() {
            let progress = super::progress::Progress::new(dims, jac, Some(left));
            bar = Some(progress.bar_clone());
            t.add_observer(Box::new(progress));
        }
        Ok(t)
    });
    if let Some(bar) = bar {
        bar.finish_and_clear();
    }
    let comparisons = match outcome {
        Ok(c) => c,
        Err(neural_sde::Error::Training(why)) => {
            if root {
                eprintln!(
                    "note: a fit from one Gaussian failed ({why}); the mixture starts are kept"
                );
            }
            return Ok(none);
        }
        Err(e) => return Err(group.settle(e)),
    };
    let mut notes = none;
    for (i, c) in comparisons.iter().enumerate() {
        let Some(c) = c else { continue };
        let member = &trainer.members()[i];
        // Both fits of a member share its split and so its scaler.
        let jac = member.model().scaler().log_jacobian();
        let per_dim = |ll: f64| (ll + jac) / dims as f64;
        if c.mixture_weight <= 0.0 {
            let r = &mut reports[i];
            r.epochs = member.state().epoch;
            r.best_epoch = member.state().best_epoch;
            r.best_elbo = member.state().best_elbo;
            r.termination = member.state().finished.unwrap_or(r.termination);
        }
        reports[i].seconds += c.seconds;
        let components = components[i];
        let kept = match c.gaussian_at {
            Some(at) => format!(
                "kept both, weighted {} by their validation likelihood (the fit from one Gaussian is model {} of the file)",
                pair_of_weights(c.mixture_weight),
                at + 1
            ),
            None if c.mixture_weight > 0.0 => "kept the fit from the mixture".to_string(),
            None => "kept the fit from one Gaussian".to_string(),
        };
        let whose = if reports.len() > 1 {
            format!("member {}: ", i + 1)
        } else {
            String::new()
        };
        notes[i] = Some(format!(
            "{whose}started from a Gaussian mixture of {components} components (the larger of the counts chosen by BIC and by the validation rows) and from one Gaussian: validation log-likelihood per dimension {:.4} against {:.4} nats (importance-weighted, {} paths per row); {kept}",
            per_dim(c.mixture),
            per_dim(c.gaussian),
            neural_sde::VALIDATION_LOGLIK_PATHS
        ));
    }
    Ok(notes)
}

/// "w and 1 − w", with three decimals, or in scientific notation when one of them would
/// print as 0.
fn pair_of_weights(w: f64) -> String {
    if w.min(1.0 - w) < 5e-4 {
        format!("{w:.3e} and {:.3e}", 1.0 - w)
    } else {
        format!("{w:.3} and {:.3}", 1.0 - w)
    }
}

/// Trains the final models on every row for the epochs validation chose (each member its
/// own), within what is left of the time budget, and writes them over the validated ones
/// (see `Trainer::refit`).
fn refit(
    a: &FitArgs,
    group: &Group,
    trainer: &EnsembleTrainer,
    table: &neural_sde::Table,
    seconds: f64,
    dims: usize,
) -> Result<(), Failure> {
    let root = group.is_root();
    let mut refits = Vec::new();
    for m in trainer.members() {
        match m.refit(table).map_err(|e| group.settle(e))? {
            Some(r) => refits.push(r),
            None => return Ok(()),
        }
    }
    let epochs: Vec<usize> = refits.iter().map(|r| r.config().epochs).collect();
    // The fit's time per epoch, for as many epochs; the epochs of a small table have a fixed
    // number of steps, so the extra held-out rows do not lengthen them.
    let need: f64 = trainer
        .members()
        .iter()
        .zip(&epochs)
        .map(|(m, &e)| m.state().seconds / m.state().epoch.max(1) as f64 * e as f64 * 1.1)
        .sum();
    let left = a.time_budget - seconds;
    // Every process of a job refits, or none: process 0's clock decides.
    if !group.root_decides(need <= left)? {
        if root {
            eprintln!(
                "note: not refitted on all rows: the refit needs about {need:.0} s and {:.0} s of the time budget are left; the validated model is kept (raise --time-budget to refit)",
                left.max(0.0)
            );
        }
        return Ok(());
    }
    // The refits keep the weights validation gave the fits they repeat.
    let mut r = EnsembleTrainer::from_trainers(refits)
        .and_then(|mut r| {
            r.set_weights(trainer.weights())?;
            r.in_group(|| group.handle())
        })
        .map_err(|e| group.settle(e))?;
    // Started only when its estimate fits in what is left; its own cap is the whole budget,
    // which the checkpoint records (the seconds left differ from run to run).
    r.set_time_budget(Some(a.time_budget))
        .map_err(|e| group.settle(e))?;
    if let Some(every) = a.checkpoint_every {
        r.checkpoint_every(every, &a.out)
            .map_err(|e| group.settle(e))?;
    }
    let outcome = fit_with_progress(&mut r, root, dims, left);
    let reports = outcome.map_err(|e| group.settle(e))?;
    r.save(&a.out).map_err(|e| group.settle(e))?;
    if root {
        let epochs: Vec<String> = epochs.iter().map(|e| e.to_string()).collect();
        println!(
            "refitted on all {} rows for {} epochs (the epochs validation chose) in {:.1} s",
            table.n_rows(),
            epochs.join(" and "),
            reports.iter().map(|r| r.seconds).fold(0.0, f64::max)
        );
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    // The rule as `--help` states it (no outside source: a documented default).
    #[test]
    fn default_members_keep_their_rows_within_the_limit() {
        for (rows, members) in [
            (1, 4),
            (120, 4),
            (1_600, 4),
            (1_601, 3),
            (2_133, 3),
            (2_134, 2),
            (49_999, 2),
            (BIG_TABLE_ROWS, 1),
        ] {
            assert_eq!(default_members(rows), members, "{rows} rows");
        }
    }
}
