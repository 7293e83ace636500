//! A progress bar on stderr, fed by the trainer's observer hooks.

use std::ops::ControlFlow;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use neural_sde::{EpochRecord, Observer, StepInfo};

/// Shows epoch, current ELBO per dimension and the time left.
pub struct Progress {
    bar: ProgressBar,
    dims: f64,
    jacobian: f64,
    budget: Option<f64>,
    last_elbo: Option<f64>,
}

impl Progress {
    /// `jacobian` converts standardised log-densities to the data's units.
    pub fn new(dims: usize, jacobian: f64, budget: Option<f64>) -> Self {
        let bar = ProgressBar::with_draw_target(Some(1), ProgressDrawTarget::stderr_with_hz(4));
        bar.set_style(
            ProgressStyle::with_template("{bar:30} {msg}")
                .unwrap_or_else(|_| ProgressStyle::default_bar()),
        );
        Self {
            bar,
            dims: dims.max(1) as f64,
            jacobian,
            budget,
            last_elbo: None,
        }
    }

    /// A handle on the same bar (to clear it once training ends).
    pub fn bar_clone(&self) -> ProgressBar {
        self.bar.clone()
    }
}

fn clock(s: f64) -> String {
    let s = s.max(0.0).round() as u64;
    format!("{}:{:02}", s / 60, s % 60)
}

impl Observer for Progress {
    fn on_step(&mut self, info: &StepInfo) -> neural_sde::Result<ControlFlow<()>> {
        let total = (info.epochs * info.batches) as u64;
        let done = ((info.epoch - 1) * info.batches + info.batch) as u64;
        self.bar.set_length(total);
        self.bar.set_position(done);
        let by_rate = info.elapsed / done.max(1) as f64 * total.saturating_sub(done) as f64;
        let left = match self.budget {
            Some(b) => by_rate.min(b - info.elapsed),
            None => by_rate,
        };
        let elbo = self
            .last_elbo
            .map(|e| format!("{:.3}", (e + self.jacobian) / self.dims))
            .unwrap_or_else(|| "-".into());
        self.bar.set_message(format!(
            "epoch {}/{}  validation ELBO/dim {elbo}  at most {} left",
            info.epoch,
            info.epochs,
            clock(left)
        ));
        Ok(ControlFlow::Continue(()))
    }

    fn on_epoch(&mut self, record: &EpochRecord) -> neural_sde::Result<ControlFlow<()>> {
        self.last_elbo = Some(record.val_elbo.unwrap_or(record.train_elbo));
        Ok(ControlFlow::Continue(()))
    }
}

/// A bar while a big CSV file loads (files under 16 MB load in well under a second and show
/// none).
pub struct Loading {
    bar: Option<ProgressBar>,
}

impl Loading {
    /// A bar for reading `path`, or none for a small file.
    pub fn new(path: &std::path::Path) -> Self {
        let big = std::fs::metadata(path).is_ok_and(|m| m.len() >= 16 << 20);
        let bar = big.then(|| {
            let bar = ProgressBar::with_draw_target(Some(1), ProgressDrawTarget::stderr_with_hz(4));
            bar.set_style(
                ProgressStyle::with_template("reading {bar:30} {bytes}/{total_bytes} ({eta})")
                    .unwrap_or_else(|_| ProgressStyle::default_bar()),
            );
            bar
        });
        Self { bar }
    }

    /// `at` of `all` bytes read.
    pub fn update(&mut self, at: u64, all: u64) {
        if let Some(b) = &self.bar {
            b.set_length(all);
            b.set_position(at);
        }
    }

    /// Removes the bar.
    pub fn finish(self) {
        if let Some(b) = self.bar {
            b.finish_and_clear();
        }
    }
}
