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
        solver: SolverConfig {
            n_steps: 1000,
            ..Default::default()
        },
        ..Default::default()
    };
    let mut s = Sampler::new(target, cfg).unwrap();
    let losses = s.train(3).unwrap();
    assert!(losses.iter().all(|l| l.loss.is_finite()));
    let est = s.estimate(64, 0).unwrap();
    assert!(est.log_z.is_finite());
}
