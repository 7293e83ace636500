//! Trainer behaviour: history, observers, stopping rules, recovery from non-finite steps,
//! and generation.
mod common;

use std::ops::ControlFlow;
use std::sync::{Arc, Mutex};

use common::*;
use neural_sde::*;

fn table(n: usize) -> Table {
    correlated_table(n)
}

fn small() -> (LatentConfig, TrainConfig) {
    (
        LatentConfig {
            solver: SolverConfig {
                n_steps: 8,
                ..Default::default()
            },
            ..Default::default()
        },
        TrainConfig {
            epochs: 3,
            min_steps_per_epoch: 4,
            batch_size: 32,
            ..Default::default()
        },
    )
}

#[derive(Default)]
struct Counts {
    steps: usize,
    epochs: Vec<usize>,
}

struct Recorder(Arc<Mutex<Counts>>);

impl Observer for Recorder {
    fn on_step(&mut self, info: &StepInfo) -> Result<ControlFlow<()>> {
        assert!(info.loss.is_finite() && info.batch <= info.batches);
        self.0.lock().unwrap().steps += 1;
        Ok(ControlFlow::Continue(()))
    }
    fn on_epoch(&mut self, r: &EpochRecord) -> Result<ControlFlow<()>> {
        self.0.lock().unwrap().epochs.push(r.epoch);
        Ok(ControlFlow::Continue(()))
    }
}

#[test]
fn history_and_observer() {
    let t = table(200);
    let (m, c) = small();
    let mut tr = Trainer::new(&t, m, c).unwrap();
    let counts = Arc::new(Mutex::new(Counts::default()));
    tr.add_observer(Box::new(Recorder(counts.clone())));
    let rep = tr.fit().unwrap();
    assert_eq!(rep.termination, Termination::MaxEpochs);
    let c = counts.lock().unwrap();
    assert_eq!(c.epochs, vec![1, 2, 3]);
    // 160 training rows, batches of 32: 5 per pass, at least 4 per epoch.
    assert_eq!(c.steps, 15);
    let h = tr.history();
    assert_eq!(h.epochs.len(), 3);
    // A fit from a mixture of several components (when the trainer chose one for this
    // table's training rows) runs at `mixture_learning_rate_scale` times the peak.
    let scale = if tr.model().latent().config().noise_components.unwrap_or(1) > 1 {
        TrainConfig::default().mixture_learning_rate_scale
    } else {
        1.0
    };
    for (e, r) in h.epochs.iter().enumerate() {
        // Five minibatches per epoch; the last one's learning rate is still in the linear
        // warm-up of 50 steps: peak · step / 50 (linear warm-up, common practice, no source).
        assert_eq!(r.step, 5 * (e as u64 + 1));
        // The scale multiplies the scheduled rate, in that order.
        let peak = TrainConfig::default().optimizer.learning_rate();
        assert_eq!(r.learning_rate, peak * r.step as f64 / 50.0 * scale);
        assert!(r.val_elbo.is_some_and(f64::is_finite) && r.train_elbo.is_finite());
    }
    let d = std::env::temp_dir().join(format!("neural-sde-history-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    h.write_csv(d.join("h.csv")).unwrap();
    h.write_json(d.join("h.json")).unwrap();
    let csv = std::fs::read_to_string(d.join("h.csv")).unwrap();
    assert!(csv.starts_with("epoch,step,train_elbo,val_elbo,control_cost,reconstruction,learning_rate,grad_norm,seconds\n"));
    assert_eq!(csv.lines().count(), 4);
    let back: History =
        serde_json::from_str(&std::fs::read_to_string(d.join("h.json")).unwrap()).unwrap();
    assert_eq!(&back, h);
}

#[test]
fn a_mixture_start_trains_at_the_scaled_learning_rate() {
    // Same warm-up as above (peak · step / 50, common practice, no source), times
    // `mixture_learning_rate_scale` when the noise is a mixture of several components, and
    // not when it is one Gaussian.
    let t = table(200);
    let (m, c) = small();
    let peak = c.optimizer.learning_rate();
    for (components, factor) in [(1, 1.0), (2, c.mixture_learning_rate_scale)] {
        let m = LatentConfig {
            noise_components: Some(components),
            ..m.clone()
        };
        let mut tr = Trainer::new(&t, m, c.clone()).unwrap();
        tr.fit().unwrap();
        for r in &tr.history().epochs {
            let want = factor * peak * r.step as f64 / 50.0;
            assert!((r.learning_rate - want).abs() < 1e-12 * want, "{r:?}");
        }
    }
    assert_eq!(c.mixture_learning_rate_scale, 1.0 / 3.0);
    for bad in [0.0, -1.0, 1.5, f64::NAN] {
        let c = TrainConfig {
            mixture_learning_rate_scale: bad,
            ..c.clone()
        };
        let e = Trainer::new(&t, LatentConfig::default(), c).unwrap_err();
        assert!(
            matches!(
                e,
                Error::InvalidConfig {
                    field: "mixture_learning_rate_scale",
                    ..
                }
            ),
            "{e}"
        );
    }
    // A configuration saved without the field (an older checkpoint) reads as the factor it
    // was trained with, 1.
    let mut json = serde_json::to_value(&c).unwrap();
    json.as_object_mut()
        .unwrap()
        .remove("mixture_learning_rate_scale");
    let old: TrainConfig = serde_json::from_value(json).unwrap();
    assert_eq!(old.mixture_learning_rate_scale, 1.0);
}

fn weight_values(tr: &Trainer) -> Vec<Vec<f64>> {
    sorted_vars(tr.model().latent().varmap())
        .unwrap()
        .into_iter()
        .map(|(_, v)| {
            v.as_tensor()
                .flatten_all()
                .unwrap()
                .to_dtype(candle_core::DType::F64)
                .unwrap()
                .to_vec1()
                .unwrap()
        })
        .collect()
}

#[test]
fn the_kept_model_is_the_running_average_of_the_weights() {
    // With `weight_average` β the model validation scores and training keeps is
    // m_n = β m_{n−1} + (1 − β) w_n over the weights w_n after each step, m_1 = w_1 (the
    // exponentially weighted moving average; Polyak & Juditsky 1992, "Acceleration of
    // stochastic approximation by averaging", SIAM J. Control Optim. 30(4), for averaging
    // the iterates; the exponential window is common practice, no source). Recomputed here
    // from the weights read after every step, in f64.
    let t = table(200);
    let (m, c) = small();
    assert_eq!(c.weight_average, 0.99);
    let c = TrainConfig {
        epochs: 1,
        weight_average: 0.5,
        min_improvement: 0.0,
        ..c
    };
    let beta = c.weight_average;
    let mut tr = Trainer::new(&t, m, c.clone()).unwrap();
    let mut avg: Option<Vec<Vec<f64>>> = None;
    loop {
        let done = tr.step().unwrap();
        let w = weight_values(&tr);
        avg = Some(match avg {
            None => w,
            Some(a) => a
                .iter()
                .zip(&w)
                .map(|(a, w)| {
                    a.iter()
                        .zip(w)
                        .map(|(a, w)| beta * a + (1.0 - beta) * w)
                        .collect()
                })
                .collect(),
        });
        if done.is_some() {
            break;
        }
    }
    // The first epoch improved on the start, so the best weights are the epoch's average.
    assert_eq!(tr.state().best_epoch, 1, "{:?}", tr.history().epochs);
    let current = weight_values(&tr);
    tr.restore_best().unwrap();
    let kept = weight_values(&tr);
    let want = avg.unwrap();
    let (mut diff, mut moved) = (0.0f64, 0.0f64);
    for ((k, w), c) in kept.iter().zip(&want).zip(&current) {
        for ((k, w), c) in k.iter().zip(w).zip(c) {
            diff = diff.max((k - w).abs());
            moved = moved.max((c - w).abs());
        }
    }
    // f32 weights: the library averages in f32, this check in f64. The last steps moved
    // the weights by far more than that rounding, so the check tells the average apart
    // from the last weights.
    assert!(
        diff < 1e-6,
        "kept weights differ from the average by {diff}"
    );
    assert!(
        moved > 20.0 * diff.max(1e-7),
        "the average should differ from the last weights ({moved} against {diff})"
    );

    for bad in [1.0, -0.1, f64::NAN] {
        let c = TrainConfig {
            weight_average: bad,
            ..c.clone()
        };
        let e = Trainer::new(&t, LatentConfig::default(), c).unwrap_err();
        assert!(
            matches!(
                e,
                Error::InvalidConfig {
                    field: "weight_average",
                    ..
                }
            ),
            "{e}"
        );
    }
    // A configuration saved without the field (an older checkpoint) reads as no average.
    let mut json = serde_json::to_value(&c).unwrap();
    json.as_object_mut().unwrap().remove("weight_average");
    let old: TrainConfig = serde_json::from_value(json).unwrap();
    assert_eq!(old.weight_average, 0.0);
}

struct Failing;
impl Observer for Failing {
    fn on_epoch(&mut self, _r: &EpochRecord) -> Result<ControlFlow<()>> {
        Err(Error::Training("stop requested by the observer".into()))
    }
}

#[test]
fn observer_error_stops_training_and_time_budget_ends_it() {
    let t = table(200);
    let (m, c) = small();
    let mut tr = Trainer::new(&t, m.clone(), c.clone()).unwrap();
    tr.add_observer(Box::new(Failing));
    let e = tr.fit().unwrap_err().to_string();
    assert!(e.contains("stop requested"), "{e}");
    let mut tr = Trainer::new(
        &t,
        m,
        TrainConfig {
            epochs: 1000,
            time_budget_secs: Some(1e-6),
            ..c
        },
    )
    .unwrap();
    let rep = tr.fit().unwrap();
    assert_eq!(rep.termination, Termination::TimeBudget);
    assert_eq!(rep.epochs, 1);
}

#[test]
fn non_finite_steps_restore_state_then_stop_with_best_weights() {
    let t = table(200);
    let (m, c) = small();
    // An absurd learning rate drives the weights to overflow.
    let cfg = TrainConfig {
        optimizer: OptimizerConfig::constant(1e30),
        epochs: 50,
        ..c
    };
    let mut tr = Trainer::new(&t, m, cfg).unwrap();
    let initial: Vec<Vec<f32>> = sorted_vars(tr.model().latent().varmap())
        .unwrap()
        .iter()
        .map(|(_, v)| v.as_tensor().flatten_all().unwrap().to_vec1().unwrap())
        .collect();
    let e = tr.fit().unwrap_err();
    assert!(matches!(e, Error::Training(_)), "{e}");
    assert!(e.to_string().contains("non-finite steps"), "{e}");
    // Each failure halves the learning-rate scale.
    let rec = tr.state().recovery;
    assert_eq!(rec.failures, tr.config().max_failures + 1);
    assert_eq!(rec.lr_scale, 0.5f64.powi(rec.failures as i32));
    // The best weights (here the initial Gaussian fit, epoch 0) are what the trainer holds.
    let now: Vec<Vec<f32>> = sorted_vars(tr.model().latent().varmap())
        .unwrap()
        .iter()
        .map(|(_, v)| v.as_tensor().flatten_all().unwrap().to_vec1().unwrap())
        .collect();
    assert_eq!(initial, now);
    let ev = tr.model().evaluate(&t, EvalOptions::new(4, 0)).unwrap();
    assert!(ev.loglik_per_row.is_finite());
}

#[test]
fn early_stopping_and_validation() {
    let t = table(200);
    let (m, c) = small();
    let mut tr = Trainer::new(
        &t,
        m,
        TrainConfig {
            epochs: 500,
            patience: 2,
            min_improvement: 1e9,
            ..c
        },
    )
    .unwrap();
    let rep = tr.fit().unwrap();
    // No epoch can improve by 1e9 nats: it stops after `patience` epochs and keeps epoch 0.
    assert_eq!(rep.termination, Termination::EarlyStopped);
    assert_eq!(rep.epochs, 2);
    assert_eq!(rep.best_epoch, 0);
    let e = TrainConfig {
        validation_fraction: 1.0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(matches!(
        e,
        Error::InvalidConfig {
            field: "validation_fraction",
            ..
        }
    ));
    let e = TrainConfig {
        epochs: 0,
        ..Default::default()
    }
    .validate()
    .unwrap_err();
    assert!(matches!(
        e,
        Error::InvalidConfig {
            field: "epochs",
            ..
        }
    ));
}

#[test]
fn generation_from_the_initial_model_follows_the_gaussian_fit() {
    initial_model_is_the_gaussian_fit(DecoderKind::Linear);
}

#[test]
fn the_mlp_decoder_also_starts_at_the_gaussian_fit() {
    // Its residual network starts at zero, so the initial model is the same Gaussian.
    initial_model_is_the_gaussian_fit(DecoderKind::Mlp);
}

fn initial_model_is_the_gaussian_fit(kind: DecoderKind) {
    // The untrained model is the ML Gaussian of its training rows (see
    // `LatentModel::init_from_data`); its samples must have that mean and covariance
    // (sample moments within 4 standard errors; Gaussian sampling theory).
    let t = table(400);
    let (mut m, c) = small();
    m.decoder.kind = kind;
    let model = Trainer::new(
        &t,
        m,
        TrainConfig {
            validation_fraction: 0.0,
            ..c
        },
    )
    .unwrap()
    .into_model();
    let g = model.generate(20_000, 3).unwrap();
    assert_eq!(g.columns(), t.columns());
    assert_eq!(g.n_rows(), 20_000);
    for j in 0..2 {
        let data = t.column(j);
        let n = data.len() as f64;
        let mu = data.iter().sum::<f64>() / n;
        let var = data.iter().map(|v| (v - mu).powi(2)).sum::<f64>() / n;
        let (gm, gse) = mean_se(&g.column(j));
        let (gv, gvse) = var_se(&g.column(j));
        assert_within(&format!("mean {j}"), gm, mu, gse, 4.0, 0.0);
        // The ridge of 1e-6 (standardised units) is far below the SE.
        assert_within(&format!("var {j}"), gv, var, gvse, 4.0, 0.0);
    }
    // Seeded: the same seed gives the same rows.
    assert_eq!(
        model.generate(100, 3).unwrap().values(),
        model.generate(100, 3).unwrap().values()
    );
    assert_ne!(
        model.generate(100, 3).unwrap().values(),
        model.generate(100, 4).unwrap().values()
    );
}

/// Asks training to stop after `after` optimiser steps.
struct StopAfter(usize);
impl Observer for StopAfter {
    fn on_step(&mut self, _info: &StepInfo) -> Result<ControlFlow<()>> {
        // Fires once: past zero the count wraps around.
        self.0 = self.0.wrapping_sub(1);
        Ok(if self.0 == 0 {
            ControlFlow::Break(())
        } else {
            ControlFlow::Continue(())
        })
    }
}

#[test]
fn an_observer_stops_training_without_an_error_and_fit_continues_later() {
    let t = table(200);
    let (m, c) = small();
    let mut tr = Trainer::new(&t, m, c).unwrap();
    tr.add_observer(Box::new(StopAfter(2)));
    let rep = tr.fit().unwrap();
    assert_eq!(rep.termination, Termination::Requested);
    // The epoch ends at the request: one epoch of two steps.
    assert_eq!(rep.epochs, 1);
    assert_eq!(tr.state().step, 2);
    assert_eq!(tr.history().epochs[0].step, 2);
    // A second call continues (the observer no longer asks to stop) to the planned epochs.
    let rep = tr.fit().unwrap();
    assert_eq!(rep.termination, Termination::MaxEpochs);
    assert_eq!(rep.epochs, 3);
}

#[test]
fn a_fit_stopped_by_its_time_budget_continues_on_the_next_call() {
    let t = table(200);
    let (m, c) = small();
    let mut tr = Trainer::new(
        &t,
        m,
        TrainConfig {
            time_budget_secs: Some(1e-9),
            ..c
        },
    )
    .unwrap();
    assert_eq!(tr.fit().unwrap().termination, Termination::TimeBudget);
    assert_eq!(tr.state().step, 0);
    tr.set_time_budget(None).unwrap();
    let rep = tr.fit().unwrap();
    assert_eq!(rep.termination, Termination::MaxEpochs);
    // The epoch cut short by the budget counts as one (with no step): two full ones follow.
    assert_eq!(rep.epochs, 3);
    assert_eq!(tr.state().step, 2 * 5);
    assert!(tr.history().epochs[0].train_elbo.is_nan());
    assert!(tr.set_time_budget(Some(-1.0)).is_err());
}

#[test]
fn step_runs_one_minibatch_and_returns_the_record_at_the_epoch_end() {
    let t = table(200);
    let (m, c) = small();
    let mut tr = Trainer::new(&t, m.clone(), c.clone()).unwrap();
    let d = std::env::temp_dir().join(format!("neural-sde-step-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    for k in 1..=4 {
        assert!(tr.step().unwrap().is_none(), "step {k}");
        assert_eq!(tr.state().step, k);
    }
    // Checkpoints are taken between epochs.
    let e = tr.save(d.join("mid.safetensors")).unwrap_err().to_string();
    assert!(e.contains("middle of an epoch"), "{e}");
    assert!(!d.join("mid.safetensors").exists());
    let r = tr
        .step()
        .unwrap()
        .expect("the fifth minibatch ends the epoch");
    assert_eq!((r.epoch, r.step), (1, 5));
    tr.save(d.join("end.safetensors")).unwrap();
    // Stepping by hand gives the same epoch as run_epoch.
    let mut other = Trainer::new(&t, m, c).unwrap();
    let r2 = other.run_epoch().unwrap();
    assert_eq!(r.train_elbo.to_bits(), r2.train_elbo.to_bits());
    assert_eq!(r.val_elbo.map(f64::to_bits), r2.val_elbo.map(f64::to_bits));
}

#[test]
fn periodic_checkpoints_are_written_and_resume() {
    let t = table(200);
    let (m, c) = small();
    let d = std::env::temp_dir().join(format!("neural-sde-periodic-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    let p = d.join("every2.safetensors");
    let mut tr = Trainer::new(&t, m, c).unwrap();
    assert!(tr.checkpoint_every(0, &p).is_err());
    tr.checkpoint_every(2, &p).unwrap();
    tr.run_epoch().unwrap();
    assert!(!p.exists(), "no checkpoint after epoch 1");
    tr.run_epoch().unwrap();
    let at2 = Trainer::resume(&p, &t).unwrap();
    assert_eq!(at2.state(), tr.state());
    tr.run_epoch().unwrap();
    // Epoch 3 is not a multiple of 2: the file still holds epoch 2.
    assert_eq!(Trainer::resume(&p, &t).unwrap().state().epoch, 2);
}

#[test]
fn ensemble_members_train_in_turn_as_their_own_trainers_would() {
    // Training the members in turn changes nothing in each: member i equals the trainer
    // made alone with seed + i, split seed and validation block i (no shared state; common
    // practice, no source). One member is the plain trainer.
    let t = table(300);
    let (model, cfg) = small();
    let mut together = EnsembleTrainer::new(&t, model.clone(), cfg.clone(), 2).unwrap();
    let reports = together.fit().unwrap();
    assert_eq!(reports.len(), 2);
    for (i, member) in together.members().iter().enumerate() {
        let alone_cfg = TrainConfig {
            seed: cfg.seed + i as u64,
            split_seed: Some(cfg.seed),
            validation_block: i,
            ..cfg.clone()
        };
        assert_eq!(member.config(), &alone_cfg);
        let mut alone = Trainer::new(&t, model.clone(), alone_cfg).unwrap();
        alone.fit().unwrap();
        assert_eq!(weight_values(member), weight_values(&alone));
        assert_eq!(member.state().best_elbo, alone.state().best_elbo);
    }
    let mut one = EnsembleTrainer::new(&t, model.clone(), cfg.clone(), 1).unwrap();
    one.fit().unwrap();
    let mut plain = Trainer::new(&t, model, cfg).unwrap();
    plain.fit().unwrap();
    assert_eq!(weight_values(&one.members()[0]), weight_values(&plain));
    assert_eq!(one.members()[0].config(), plain.config());
}
