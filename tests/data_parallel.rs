//! Data-parallel training: a group of P processes (threads standing in for MPI processes
//! here; `tests/mpi.rs` runs the real engine) trains the model one process trains, and
//! refuses groups that cannot work.
//!
//! The claim checked is the one of synchronous data-parallel SGD: summing per-process
//! gradients of a split minibatch gives the minibatch gradient (linearity of the gradient of
//! a mean; Dean et al. 2012, "Large scale distributed deep networks", NeurIPS, §4 describes
//! the synchronous variant; common practice), so the weights agree up to rounding.
mod common;
#[path = "support/thread_group.rs"]
mod thread_group;

use std::sync::Arc;

use neural_sde::*;

fn table(n: usize) -> Table {
    common::correlated_table(n)
}

/// Runs `f` once per member of a group of `p` threads standing in for processes; the
/// results in rank order.
fn in_group<T: Send>(p: usize, f: impl Fn(thread_group::ThreadGroup) -> T + Sync) -> Vec<T> {
    let members = thread_group::group(p);
    std::thread::scope(|s| {
        let handles: Vec<_> = members.into_iter().map(|g| s.spawn(|| f(g))).collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    })
}

fn configs() -> (LatentConfig, TrainConfig) {
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
            min_steps_per_epoch: 10,
            batch_size: 33,
            ..Default::default()
        },
    )
}

/// Every weight of a model, in name order.
fn weights(vm: &candle_nn::VarMap) -> Vec<f64> {
    sorted_vars(vm)
        .unwrap()
        .into_iter()
        .flat_map(|(_, v)| {
            v.as_tensor()
                .flatten_all()
                .unwrap()
                .to_dtype(candle_core::DType::F64)
                .unwrap()
                .to_vec1::<f64>()
                .unwrap()
        })
        .collect()
}

fn max_relative_difference(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    let scale = a.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
        / scale
}

/// Trains in a group of `p` threads; returns each member's weights and history.
fn train_in_group(p: usize, table: &Table) -> Vec<(Vec<f64>, Vec<EpochRecord>)> {
    in_group(p, |g| {
        let (m, t) = configs();
        let mut trainer = Trainer::new(table, m, t)
            .unwrap()
            .in_group(Box::new(g))
            .unwrap();
        trainer.fit().unwrap();
        (
            weights(trainer.model().latent().varmap()),
            trainer.history().epochs.clone(),
        )
    })
}

#[test]
fn two_and_three_processes_train_the_model_one_process_trains() {
    let t = table(300);
    let (m, c) = configs();
    let mut alone = Trainer::new(&t, m, c).unwrap();
    alone.fit().unwrap();
    let w1 = weights(alone.model().latent().varmap());
    for p in [2, 3] {
        let members = train_in_group(p, &t);
        // Every process holds the same model, bit for bit: they apply the same update.
        for (w, _) in &members[1..] {
            assert_eq!(w, &members[0].0, "P = {p}: processes disagree");
        }
        // The same model as one process, up to the rounding of the split sums (measured
        // 1e-6 after 30+ steps; the bound leaves room for chaotic growth).
        let diff = max_relative_difference(&w1, &members[0].0);
        assert!(diff < 1e-3, "P = {p}: relative difference {diff}");
        assert!(diff > 0.0, "P = {p}: the group did not run a separate path");
        // The history (training and validation ELBO) is the group's, not one process's.
        let h1 = &alone.history().epochs;
        let hp = &members[0].1;
        assert_eq!(h1.len(), hp.len());
        for (a, b) in h1.iter().zip(hp) {
            assert!((a.train_elbo - b.train_elbo).abs() < 1e-3 * a.train_elbo.abs());
            let (va, vb) = (a.val_elbo.unwrap(), b.val_elbo.unwrap());
            assert!((va - vb).abs() < 1e-3 * va.abs(), "{va} vs {vb}");
        }
    }
}

#[test]
fn a_group_is_refused_when_a_process_has_another_table_or_too_few_rows() {
    let errors = in_group(2, |g| {
        // Process 1 reads a table with one more row.
        let t = table(300 + g.rank());
        let (m, c) = configs();
        Trainer::new(&t, m, c)
            .unwrap()
            .in_group(Box::new(g))
            .unwrap_err()
            .to_string()
    });
    for e in &errors {
        assert!(e.contains("process(es) 1 of 2"), "{e}");
        assert!(e.contains("different table or settings"), "{e}");
    }
    // More processes than training rows.
    let t = table(4);
    let errors = in_group(5, |g| {
        let (m, mut c) = configs();
        c.batch_size = 1;
        c.validation_fraction = 0.0;
        Trainer::new(&t, m, c)
            .unwrap()
            .in_group(Box::new(g))
            .unwrap_err()
            .to_string()
    });
    for e in &errors {
        assert!(e.contains("5 processes for 4 training rows"), "{e}");
    }
}

#[test]
fn the_sampler_trains_the_same_control_in_a_group() {
    let cfg = SamplerConfig {
        batch_size: 31,
        iterations: 20,
        solver: SolverConfig {
            n_steps: 10,
            ..Default::default()
        },
        seed: 2,
        ..Default::default()
    };
    let target: Arc<dyn LogDensity> =
        Arc::new(GaussianMixture::new(vec![vec![1.0, 0.0], vec![-1.0, 0.5]], 0.7).unwrap());
    let mut alone = Sampler::new(target.clone(), cfg.clone()).unwrap();
    alone.fit().unwrap();
    let w1 = weights(alone.varmap());
    let ws = in_group(2, |g| {
        let mut sm = Sampler::new(target.clone(), cfg.clone())
            .unwrap()
            .in_group(Box::new(g))
            .unwrap();
        sm.fit().unwrap();
        weights(sm.varmap())
    });
    assert_eq!(ws[0], ws[1]);
    let diff = max_relative_difference(&w1, &ws[0]);
    assert!(diff < 1e-3 && diff > 0.0, "relative difference {diff}");
}

#[test]
fn results_do_not_depend_on_how_rows_are_chunked_for_validation() {
    // Each validation row's noise is keyed by the row, so the validation ELBO of the
    // initial model is the same whether 1 or 3 processes share the rows (up to rounding).
    let t = table(300);
    let (m, c) = configs();
    let alone = Trainer::new(&t, m, c).unwrap();
    let e1 = alone.state().best_elbo.unwrap();
    let e3 = in_group(3, |g| {
        let (m, c) = configs();
        let mut tr = Trainer::new(&t, m, c)
            .unwrap()
            .in_group(Box::new(g))
            .unwrap();
        tr.run_epoch().unwrap().val_elbo.unwrap()
    });
    let mut alone = alone;
    let v1 = alone.run_epoch().unwrap().val_elbo.unwrap();
    assert!(e1.is_finite());
    for v in e3 {
        assert!((v - v1).abs() < 1e-6 * v1.abs(), "{v} vs {v1}");
    }
}
