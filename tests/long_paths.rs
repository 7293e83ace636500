//! 1,000-step paths with an MLP drift train without overflowing the stack (candle's backward
//! and graph drop are recursive; the library runs them on a large-stack thread). This test
//! runs on the default 2 MiB test thread on purpose.
use std::sync::Arc;

use neural_sde::*;

#[test]
fn thousand_step_paths_train() {
    let target = Arc::new(GaussianMixture::new(vec![vec![1.0, -1.0]], 0.8).unwrap());
    let cfg = SamplerConfig {
        batch_size: 16,
        iterations: 3,
        solver: SolverConfig {
            n_steps: 1000,
            ..Default::default()
        },
        ..Default::default()
    };
    let mut s = Sampler::new(target, cfg).unwrap();
    let report = s.fit().unwrap();
    assert_eq!(report.steps, 3);
    assert!(s.history().iter().all(|r| r.loss.is_finite()));
    // The target is a normalised density (log Z = 0) and the importance weights are
    // unbiased for Z under any control (Euler–Maruyama is exact for the reference Brownian
    // motion; see the sampler module docs): 4 delta-method SE plus 0.05 nats of log-bias.
    let est = s.estimate(EstimateOptions::new(512, 0)).unwrap();
    assert!(est.log_z.abs() < 4.0 * est.log_z_se + 0.05, "{est}");
}

/// A user's prior drift `b(z) = w ⊙ z` whose parameter comes from the builder.
struct Scaled {
    w: Param,
}

impl Drift for Scaled {
    fn dim(&self) -> usize {
        self.w.dims1().unwrap_or(0)
    }
    fn forward(
        &self,
        z: &candle_core::Tensor,
        _t: f64,
        _c: Option<&candle_core::Tensor>,
    ) -> candle_core::Result<candle_core::Tensor> {
        z.broadcast_mul(&self.w.unsqueeze(0)?)
    }
}

fn scaled_prior() -> PriorFactory {
    Arc::new(
        |pb: &ParamBuilder, d: usize, _rng: &mut dyn rand::RngCore| {
            Ok(Box::new(Scaled {
                w: pb.constant(&[d], "w", -0.1)?,
            }) as Box<dyn Drift>)
        },
    )
}

/// Evaluation and generation with a custom prior on 2,000 steps: inference builds no
/// autodiff graph (the builder's parameters are read frozen), so nothing deep is built or
/// dropped, on the default 2 MiB test thread.
#[test]
fn custom_prior_two_thousand_steps_evaluate_and_generate() {
    let rows: Vec<Vec<f64>> = (0..24)
        .map(|i| {
            let x = i as f64 / 12.0 - 1.0;
            vec![x, 0.5 * x + 0.1 * ((i * 7) % 5) as f64]
        })
        .collect();
    let table = Table::new(vec!["a".into(), "b".into()], rows).unwrap();
    let mut model_cfg = LatentConfig::default();
    model_cfg.solver.n_steps = 2000;
    let train = TrainConfig {
        epochs: 1,
        batch_size: 8,
        min_steps_per_epoch: 1,
        validation_fraction: 0.0,
        validation_paths: 1,
        ..Default::default()
    };
    let trainer = Trainer::with_prior(&table, model_cfg, train, scaled_prior()).unwrap();
    let model = trainer.into_model();
    let eval = model.evaluate(&table, EvalOptions::new(2, 0)).unwrap();
    assert_eq!(eval.rows, 24);
    assert!(eval.loglik_per_row.is_finite());
    let generated = model.generate(16, 1).unwrap();
    assert_eq!(generated.n_rows(), 16);
}

/// Inside `frozen`, a custom drift built from builder parameters records no graph; outside,
/// it does (so the frozen mode is what removes it).
#[test]
fn frozen_mode_detaches_custom_drift_parameters() {
    let vm = candle_nn::VarMap::new();
    let pb = ParamBuilder::new(&vm, candle_core::DType::F32, &candle_core::Device::Cpu);
    let drift = Scaled {
        w: pb.constant(&[3], "w", 0.5).unwrap(),
    };
    let x = candle_core::Tensor::ones((4, 3), candle_core::DType::F32, &candle_core::Device::Cpu)
        .unwrap();
    assert!(drift.forward(&x, 0.0, None).unwrap().track_op());
    assert!(!frozen(|| drift.forward(&x, 0.0, None).unwrap().track_op()));
    // The frozen view reads the variable's current values.
    let var = &sorted_vars(&vm).unwrap()[0].1;
    var.set(&candle_core::Tensor::full(2.0f32, 3, &candle_core::Device::Cpu).unwrap())
        .unwrap();
    let y = frozen(|| drift.forward(&x, 0.0, None).unwrap());
    assert_eq!(y.to_vec2::<f32>().unwrap()[0], vec![2.0, 2.0, 2.0]);
}
