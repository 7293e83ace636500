//! Trainer behaviour: history, observers, stopping rules, recovery from non-finite steps,
//! and generation.
mod common;

use std::sync::{Arc, Mutex};

use common::*;
use neural_sde::*;

fn table(n: usize) -> Table {
    // Demo rows from a fixed generator: a correlated Gaussian.
    let z = standard_normals(&mut generator(8, 0), n * 2);
    let rows = z
        .chunks_exact(2)
        .map(|e| vec![10.0 + 2.0 * e[0], -3.0 + 0.5 * (0.8 * e[0] + 0.6 * e[1])])
        .collect();
    Table::new(vec!["x".into(), "y".into()], rows).unwrap()
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
    fn on_step(&mut self, info: &StepInfo) -> Result<()> {
        assert!(info.loss.is_finite() && info.batch <= info.batches);
        self.0.lock().unwrap().steps += 1;
        Ok(())
    }
    fn on_epoch(&mut self, r: &EpochRecord) -> Result<()> {
        self.0.lock().unwrap().epochs.push(r.epoch);
        Ok(())
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
    assert!(h
        .epochs
        .iter()
        .all(|r| r.val_elbo.is_some() && r.seconds >= 0.0 && r.learning_rate > 0.0));
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

struct Failing;
impl Observer for Failing {
    fn on_epoch(&mut self, _r: &EpochRecord) -> Result<()> {
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
        learning_rate: 1e30,
        warmup_steps: 0,
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
    assert!(tr.state().failures > tr.config().max_failures);
    assert!(tr.state().lr_scale < 1.0);
    // The best weights (here the initial Gaussian fit, epoch 0) are what the trainer holds.
    let now: Vec<Vec<f32>> = sorted_vars(tr.model().latent().varmap())
        .unwrap()
        .iter()
        .map(|(_, v)| v.as_tensor().flatten_all().unwrap().to_vec1().unwrap())
        .collect();
    assert_eq!(initial, now);
    let ev = tr.model().evaluate(&t, 4, 0).unwrap();
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
    // The untrained model is the ML Gaussian of its training rows (see
    // `LatentModel::init_from_data`); its samples must have that mean and covariance
    // (sample moments within 4 standard errors; Gaussian sampling theory).
    let t = table(400);
    let (m, c) = small();
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
