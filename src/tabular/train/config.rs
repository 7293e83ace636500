//! Training settings.

use serde::{Deserialize, Serialize};

use crate::error::{check_positive, Error, Result};
use crate::nn::schedule::OptimizerConfig;

/// Settings of a [`crate::Trainer`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct TrainConfig {
    /// Epochs to train (an epoch is one or more passes over the training rows, see
    /// `min_steps_per_epoch`). The learning-rate schedule is planned over them when training
    /// starts and keeps that plan when resumed; [`crate::Trainer::set_epochs`] only moves the
    /// stop.
    pub epochs: usize,
    /// Rows per minibatch.
    pub batch_size: usize,
    /// Smallest number of optimiser steps per epoch: on small tables an epoch makes several
    /// passes over the rows (each freshly shuffled), so early stopping and the schedule see
    /// comparable amounts of training whatever the table size.
    pub min_steps_per_epoch: usize,
    /// Largest number of optimiser steps per epoch: on big tables (a pass longer than this)
    /// an epoch is this many minibatches of a fresh shuffle, so validation, the history and
    /// early stopping come every fixed number of steps however many rows there are.
    #[serde(default = "default_max_steps_per_epoch")]
    pub max_steps_per_epoch: usize,
    /// AdamW, its schedule (warm-up, then cosine decay over the planned epochs) and gradient
    /// clipping. Its fields sit at the top level of the serialised config.
    #[serde(flatten)]
    pub optimizer: OptimizerConfig,
    /// Share of the rows held out for validation (early stopping); 0 trains on all rows and
    /// stops on the training ELBO.
    pub validation_fraction: f64,
    /// Largest number of held-out rows the validation ELBO is computed on each epoch (a
    /// seeded subset of them; all of them when there are fewer), so that validation costs the
    /// same on big tables as on small ones.
    #[serde(default = "default_max_validation_rows")]
    pub max_validation_rows: usize,
    /// Posterior paths per validation row (the validation ELBO averages them).
    pub validation_paths: usize,
    /// Epochs without a better validation ELBO before stopping.
    pub patience: usize,
    /// Smallest gain in validation ELBO per row that counts as better (nats).
    pub min_improvement: f64,
    /// Stop after this many seconds of training (`None`: no limit).
    pub time_budget_secs: Option<f64>,
    /// Non-finite steps tolerated (each restores the last good state and halves the
    /// learning rate) before training stops with an error.
    pub max_failures: usize,
    /// Seed of every random draw (split, minibatches, weights, noise).
    pub seed: u64,
    /// Model selection, then a final model on every row: after a fit that held rows out and
    /// ended by its plan or by early stopping, [`crate::Trainer::refit`] trains the model
    /// again on all the rows for the number of epochs validation chose (its best epoch), so
    /// no row is left out of the final model. Off by default: measured on the crate's open
    /// tables it helped the smallest (iris, 120 rows) and lost on the others (see the
    /// benchmarks document).
    #[serde(default)]
    pub refit: bool,
    /// Factor on the learning rate of a fit whose observation noise is a mixture of several
    /// components (see [`crate::LatentConfig::noise_components`]). Adam moves every weight by
    /// about the learning rate whatever its scale, which at the full rate disturbs the start's
    /// near-point components; measured on the crate's open tables a third of the rate gained
    /// 0.155 nats per dimension on diabetes and changed the others by at most 0.001 (see the
    /// benchmarks document). A configuration saved without this field (an older checkpoint)
    /// reads as 1, the factor it was trained with.
    #[serde(default = "one")]
    pub mixture_learning_rate_scale: f64,
    /// Decay `β` of the exponential moving average of the weights, in `[0, 1)`: after each
    /// step the average moves a share `1 − β` towards the current weights, and validation,
    /// early stopping and the model kept use the average (training continues from the
    /// current weights). 0 keeps the current weights, as a configuration saved without this
    /// field (an older checkpoint) reads. The default 0.99 averages over about a hundred
    /// steps (two epochs of a small table); measured on the crate's open tables it gained
    /// 0.075 nats per dimension on diabetes over no average and moved the others by at most
    /// 0.005 (see the benchmarks document).
    #[serde(default)]
    pub weight_average: f64,
    /// Seed of the training/validation split (`None`: [`TrainConfig::seed`]). The members of
    /// an [`crate::EnsembleTrainer`] share one, so that they hold out blocks of one shuffle.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub split_seed: Option<u64>,
    /// Which block of the shuffled rows is held out: block `b` is the `b`-th run of
    /// `round(n · validation_fraction)` rows of the split's shuffle, wrapping around at its
    /// end (0: the first). [`crate::EnsembleTrainer`] gives member `i` block `i`, so that
    /// the members hold out different rows and every row trains at least one member while
    /// the blocks do not wrap.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub validation_block: usize,
}

fn is_zero(v: &usize) -> bool {
    *v == 0
}

fn one() -> f64 {
    1.0
}

impl Default for TrainConfig {
    fn default() -> Self {
        Self {
            epochs: 300,
            batch_size: 64,
            min_steps_per_epoch: 50,
            max_steps_per_epoch: default_max_steps_per_epoch(),
            optimizer: OptimizerConfig::default(),
            validation_fraction: 0.2,
            max_validation_rows: default_max_validation_rows(),
            validation_paths: 4,
            patience: 30,
            min_improvement: 1e-3,
            time_budget_secs: None,
            max_failures: 5,
            seed: 0,
            refit: false,
            mixture_learning_rate_scale: 1.0 / 3.0,
            weight_average: 0.99,
            split_seed: None,
            validation_block: 0,
        }
    }
}

fn default_max_steps_per_epoch() -> usize {
    1000
}

fn default_max_validation_rows() -> usize {
    2048
}

impl TrainConfig {
    /// The training and validation rows of a table of `n` rows: block
    /// [`TrainConfig::validation_block`] of the shuffle seeded by
    /// [`TrainConfig::split_seed`] (or else [`TrainConfig::seed`]) is held out.
    pub(crate) fn split(&self, n: usize) -> Result<(Vec<usize>, Vec<usize>)> {
        crate::tabular::split::split_rows(
            n,
            self.validation_fraction,
            self.split_seed.unwrap_or(self.seed),
            self.validation_block,
        )
    }

    /// Checks every field.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] naming the bad field.
    pub fn validate(&self) -> Result<()> {
        if self.epochs == 0 {
            return Err(Error::config("epochs", 0, "train for at least 1 epoch"));
        }
        if self.batch_size == 0 {
            return Err(Error::config(
                "batch_size",
                0,
                "use at least 1 row per batch",
            ));
        }
        if self.min_steps_per_epoch == 0 {
            return Err(Error::config(
                "min_steps_per_epoch",
                0,
                "use at least 1 step per epoch",
            ));
        }
        if self.max_steps_per_epoch < self.min_steps_per_epoch {
            return Err(Error::config(
                "max_steps_per_epoch",
                self.max_steps_per_epoch,
                format!(
                    "must be at least min_steps_per_epoch ({})",
                    self.min_steps_per_epoch
                ),
            ));
        }
        if self.max_validation_rows == 0 {
            return Err(Error::config(
                "max_validation_rows",
                0,
                "validate on at least 1 row",
            ));
        }
        self.optimizer.validate()?;
        use crate::util::limits::{at_most, MAX_BATCH};
        at_most("epochs", self.epochs, 10_000_000, "epochs")?;
        at_most(
            "min_steps_per_epoch",
            self.min_steps_per_epoch,
            10_000_000,
            "steps per epoch",
        )?;
        at_most("batch_size", self.batch_size, MAX_BATCH, "rows per batch")?;
        at_most(
            "validation_paths",
            self.validation_paths,
            MAX_BATCH,
            "paths per row",
        )?;
        if !(0.0..1.0).contains(&self.validation_fraction) {
            return Err(Error::config(
                "validation_fraction",
                self.validation_fraction,
                "must lie in [0, 1)",
            ));
        }
        if self.validation_paths == 0 {
            return Err(Error::config(
                "validation_paths",
                0,
                "use at least 1 path per row",
            ));
        }
        if !(self.min_improvement >= 0.0 && self.min_improvement.is_finite()) {
            return Err(Error::config(
                "min_improvement",
                self.min_improvement,
                "must be finite and >= 0",
            ));
        }
        if !(self.mixture_learning_rate_scale > 0.0 && self.mixture_learning_rate_scale <= 1.0) {
            return Err(Error::config(
                "mixture_learning_rate_scale",
                self.mixture_learning_rate_scale,
                "must lie in (0, 1]",
            ));
        }
        if !(0.0..1.0).contains(&self.weight_average) {
            return Err(Error::config(
                "weight_average",
                self.weight_average,
                "must lie in [0, 1) (0: no average)",
            ));
        }
        if let Some(t) = self.time_budget_secs {
            check_positive("time_budget_secs", t)?;
        }
        Ok(())
    }
}
