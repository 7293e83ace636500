//! The sampler's training machinery: a user-supplied control, the learning-rate schedule,
//! observers, recovery from non-finite steps, and checkpoints that resume bit for bit.
mod common;

use std::ops::ControlFlow;
use std::sync::Arc;

use candle_core::{DType, Device, Tensor};
use candle_nn::{Init, Linear, VarMap};
use common::*;
use neural_sde::*;

fn small_cfg(iterations: usize) -> SamplerConfig {
    SamplerConfig {
        batch_size: 32,
        iterations,
        solver: SolverConfig {
            n_steps: 10,
            ..Default::default()
        },
        optimizer: OptimizerConfig {
            warmup_steps: 2,
            final_lr_fraction: 0.1,
            ..OptimizerConfig::default()
        },
        seed: 4,
        ..Default::default()
    }
}

fn mixture() -> Arc<dyn LogDensity> {
    Arc::new(GaussianMixture::new(vec![vec![1.0, 0.0], vec![-1.0, 0.5]], 0.7).unwrap())
}

fn weights(s: &Sampler) -> Vec<(String, Vec<u32>)> {
    sorted_vars(s.varmap())
        .unwrap()
        .into_iter()
        .map(|(n, v)| {
            let x: Vec<f32> = v.as_tensor().flatten_all().unwrap().to_vec1().unwrap();
            (n, x.into_iter().map(f32::to_bits).collect())
        })
        .collect()
}

fn dir(name: &str) -> std::path::PathBuf {
    let d = std::env::temp_dir().join(format!("neural-sde-{name}-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Asks the sampler to stop after `n` applied steps.
struct StopAfter(usize);
impl SamplerObserver for StopAfter {
    fn on_step(&mut self, _r: &SamplerRecord) -> Result<ControlFlow<()>> {
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
fn the_schedule_drives_each_step_and_an_observer_can_stop() {
    let cfg = small_cfg(12);
    let mut s = Sampler::new(mixture(), cfg.clone()).unwrap();
    s.add_observer(Box::new(StopAfter(5)));
    let rep = s.fit().unwrap();
    assert_eq!(rep.termination, Termination::Requested);
    assert_eq!(rep.steps, 5);
    // Called again, it continues to the planned steps.
    let rep = s.fit().unwrap();
    assert_eq!(rep.termination, Termination::MaxEpochs);
    assert_eq!(rep.steps, 12);
    let h = s.history();
    assert_eq!(h.len(), 12);
    // Linear warm-up over 2 steps, then cosine decay to 0.1 of the peak at step 12
    // (Loshchilov & Hutter, SGDR, ICLR 2017, eq. 5 with one cycle; warm-up: common practice).
    let peak = cfg.optimizer.learning_rate();
    for r in h {
        let k = r.step - 1;
        let want = if k < 2 {
            peak * (k + 1) as f64 / 2.0
        } else {
            let p = (k - 2) as f64 / 10.0;
            0.1 * peak + 0.5 * 0.9 * peak * (1.0 + (std::f64::consts::PI * p).cos())
        };
        assert!(
            (r.learning_rate - want).abs() <= 1e-15 * peak,
            "step {}",
            r.step
        );
    }
}

#[test]
fn save_and_load_continue_training_bit_for_bit() {
    let mut full = Sampler::new(mixture(), small_cfg(12)).unwrap();
    full.fit().unwrap();
    let mut first = Sampler::new(mixture(), small_cfg(12)).unwrap();
    first.add_observer(Box::new(StopAfter(5)));
    first.fit().unwrap();
    let p = dir("sampler-resume").join("s.safetensors");
    first.save(&p).unwrap();
    drop(first);
    let mut resumed = Sampler::load(&p, mixture()).unwrap();
    assert_eq!(resumed.state().step, 5);
    let rep = resumed.fit().unwrap();
    assert_eq!(rep.steps, 12);
    assert_eq!(weights(&resumed), weights(&full));
    assert_eq!(resumed.history(), full.history());
    // A target of another dimension is refused.
    let other: Arc<dyn LogDensity> = Arc::new(GaussianMixture::new(vec![vec![0.0]], 1.0).unwrap());
    let e = Sampler::load(&p, other).unwrap_err().to_string();
    assert!(e.contains("dimension 2"), "{e}");
}

#[test]
fn non_finite_steps_are_recovered_from_then_training_stops_with_the_good_weights() {
    // A target whose log-density is NaN everywhere: every step fails.
    let target: Arc<dyn LogDensity> = Arc::new(FnDensity::new(2, |x: &Tensor| {
        x.sum(1)?.affine(f64::NAN, 0.0)
    }));
    let cfg = SamplerConfig {
        max_failures: 3,
        ..small_cfg(50)
    };
    let mut s = Sampler::new(target, cfg).unwrap();
    let before = weights(&s);
    let e = s.fit().unwrap_err();
    assert!(matches!(e, Error::Training(_)), "{e}");
    assert!(e.to_string().contains("4 non-finite steps"), "{e}");
    let rec = s.state().recovery;
    assert_eq!(rec.failures, 4);
    assert_eq!(rec.lr_scale, 0.5f64.powi(4));
    // Every parameter is back at the last good point (here the initial weights).
    assert_eq!(weights(&s), before);
    assert!(s.history().is_empty());
}

/// `u(x, t) = W [x, t] + b` through candle-nn's `Linear`, starting at zero.
fn linear_control(vm: &VarMap, d: usize) -> Box<dyn Drift> {
    let dev = Device::Cpu;
    let w = vm
        .get((d, d + 1), "control.w", Init::Const(0.0), DType::F32, &dev)
        .unwrap();
    let b = vm
        .get(d, "control.b", Init::Const(0.0), DType::F32, &dev)
        .unwrap();
    Box::new(ModuleDrift::new(Linear::new(w, Some(b)), d, 0))
}

#[test]
fn a_user_control_learns_the_follmer_drift_of_a_shifted_gaussian() {
    // For π = N(m, I), γ = N(0, I) and σ = T = 1, the Föllmer drift
    // u*(x, t) = M_t⁻¹ (m + (S − I) x) with S = I is the constant m, and the minimal
    // control cost is KL(π‖γ) = |m|²/2 (Föllmer 1985; Lehec 2013, Ann. IHP, from memory).
    // A linear control W [x, t] + b can represent it exactly (W = 0, b = m); Euler–Maruyama
    // is then exact, so the importance weights are constant (log Z exact) and the free
    // energy's mean is −log Z.
    let m = [0.8, -0.4];
    let log_z = 0.7;
    let target: Arc<dyn LogDensity> = Arc::new(
        GaussianDensity::new(m.to_vec(), vec![1.0, 0.0, 0.0, 1.0])
            .unwrap()
            .with_log_scale(log_z),
    );
    let vm = VarMap::new();
    let cfg = SamplerConfig {
        batch_size: 128,
        iterations: 400,
        solver: SolverConfig {
            n_steps: 10,
            ..Default::default()
        },
        optimizer: OptimizerConfig {
            final_lr_fraction: 0.05,
            ..OptimizerConfig::constant(3e-2)
        },
        seed: 9,
        ..Default::default()
    };
    let mut s = Sampler::with_control(target.clone(), linear_control(&vm, 2), vm, cfg).unwrap();
    s.fit().unwrap();
    let est = s.estimate(EstimateOptions::new(4096, 1)).unwrap();
    let kl = 0.5 * (m[0] * m[0] + m[1] * m[1]);
    // Monte Carlo error (4 SE) plus 0.005 nats for the remaining distance to the optimum.
    assert_within(
        "free energy",
        est.free_energy,
        -log_z,
        est.free_energy_se,
        4.0,
        0.005,
    );
    assert!((est.control_cost - kl).abs() < 0.02, "{est}");
    assert!(est.ess > 0.99 * est.paths as f64, "{est}");
    assert_within("log Z", est.log_z, log_z, est.log_z_se, 4.0, 0.005);
    let b: Vec<f32> = sorted_vars(s.varmap())
        .unwrap()
        .into_iter()
        .find(|(n, _)| n == "control.b")
        .unwrap()
        .1
        .as_tensor()
        .to_vec1()
        .unwrap();
    for j in 0..2 {
        assert!(
            (f64::from(b[j]) - m[j]).abs() < 0.05,
            "b = {b:?}, m = {m:?}"
        );
    }
    // The same control rebuilt over a fresh VarMap loads the trained weights.
    let p = dir("sampler-user").join("u.safetensors");
    s.save(&p).unwrap();
    let vm2 = VarMap::new();
    let back = Sampler::load_with_control(&p, target, linear_control(&vm2, 2), vm2).unwrap();
    assert_eq!(weights(&back), weights(&s));
    let again = back.estimate(EstimateOptions::new(4096, 1)).unwrap();
    assert_eq!(again.log_z.to_bits(), est.log_z.to_bits());
}

#[test]
fn with_control_refuses_a_control_of_another_shape() {
    let vm = VarMap::new();
    let e = Sampler::with_control(mixture(), linear_control(&vm, 3), vm, small_cfg(1))
        .unwrap_err()
        .to_string();
    assert!(e.contains("control dimension"), "{e}");
}
