//! Importance-weighted `log Z` estimates from simulated paths of any control.

use candle_core::{DType, Device, Tensor};
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::nn::params::frozen;
use crate::sampler::ratio::LogDensityRatio;
use crate::sde::solver::{simulate, Scheme, Sde, SolverConfig};
use crate::sde::terminal::TerminalCost;
use crate::util::rng::{generator, streams};
use crate::util::stack::run_deep;

/// How many paths an estimate simulates and from which seed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct EstimateOptions {
    /// Number of paths `K` (≥ 1).
    pub paths: usize,
    /// Seed of the paths' noise.
    pub seed: u64,
}

impl Default for EstimateOptions {
    fn default() -> Self {
        Self {
            paths: 4096,
            seed: 0,
        }
    }
}

impl EstimateOptions {
    /// `paths` paths from `seed`.
    pub fn new(paths: usize, seed: u64) -> Self {
        Self { paths, seed }
    }
}

/// Estimates from `K` paths of a trained (or any) control.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LogZEstimate {
    /// Number of paths `K`.
    pub paths: usize,
    /// `log((1/K) Σ_i w_i)`: unbiased for `Z` (not for `log Z`), a lower bound in expectation.
    pub log_z: f64,
    /// Delta-method standard error of `log_z`.
    pub log_z_se: f64,
    /// Mean objective `J` (an upper bound on `−log Z` in expectation).
    pub free_energy: f64,
    /// Standard error of `free_energy`.
    pub free_energy_se: f64,
    /// Mean control cost.
    pub control_cost: f64,
    /// Effective sample size `(Σ w)² / Σ w²`.
    pub ess: f64,
    /// End points `X_T`, one row per path.
    pub samples: Vec<Vec<f64>>,
    /// Log importance weights `log w_i = log dP/dQ − g(X_T)`, one per path.
    pub log_weights: Vec<f64>,
}

impl std::fmt::Display for LogZEstimate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "log Z {:.4} ± {:.4} (importance-weighted, {} paths, ESS {:.0}); free energy {:.4} ± {:.4}, control cost {:.4}",
            self.log_z,
            self.log_z_se,
            self.paths,
            self.ess,
            self.free_energy,
            self.free_energy_se,
            self.control_cost
        )
    }
}

/// Importance-weighted `log Z` estimate for any control (see [`crate::Sampler::estimate`]).
///
/// `sde` must have no prior drift and σ matching `terminal`'s reference; the scheme must be
/// Euler–Maruyama.
///
/// # Errors
/// As [`crate::Sampler::estimate`].
pub fn estimate_log_z(
    sde: &Sde<'_>,
    terminal: &LogDensityRatio,
    solver: &SolverConfig,
    dtype: DType,
    options: EstimateOptions,
) -> Result<LogZEstimate> {
    let EstimateOptions { paths, seed } = options;
    if paths == 0 {
        return Err(Error::config("paths", 0, "use at least 1 path"));
    }
    if solver.scheme != Scheme::EulerMaruyama {
        return Err(Error::config(
            "scheme",
            format!("{:?}", solver.scheme),
            "log Z estimates need Euler–Maruyama",
        ));
    }
    let d = terminal.target().dim();
    let dev = Device::Cpu;
    let mut rng = generator(seed, streams::EVAL);
    let mut log_w = Vec::with_capacity(paths);
    let mut objective = Vec::with_capacity(paths);
    let mut cost = Vec::with_capacity(paths);
    let mut samples = Vec::with_capacity(paths);
    let mut done = 0;
    while done < paths {
        let n = (paths - done).min(1024);
        let noise = solver.sample_noise(&mut rng, n, d, dtype, &dev)?;
        let (lw, obj, c, x) = run_deep(|| {
            frozen(|| -> Result<_> {
                let x0 = Tensor::zeros((n, d), dtype, &dev)?;
                let p = simulate(sde, solver, &x0, &noise, None)?;
                let g = terminal.cost(&p.end, None)?;
                let to = |t: &Tensor| -> Result<Vec<f64>> {
                    Ok(t.to_dtype(DType::F64)?.to_vec1::<f64>()?)
                };
                let lw = to(&(&p.log_weight - &g)?)?;
                let obj = to(&(&p.control_cost + &g)?)?;
                let c = to(&p.control_cost)?;
                let x = p.end.to_dtype(DType::F64)?.to_vec2::<f64>()?;
                Ok((lw, obj, c, x))
            })
        })??;
        log_w.extend(lw);
        objective.extend(obj);
        cost.extend(c);
        samples.extend(x);
        done += n;
    }
    summarise(log_w, &objective, &cost, samples)
}

fn mean_se(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = if v.len() > 1 {
        v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)
    } else {
        0.0
    };
    (mean, (var / n).sqrt())
}

fn summarise(
    log_weights: Vec<f64>,
    objective: &[f64],
    cost: &[f64],
    samples: Vec<Vec<f64>>,
) -> Result<LogZEstimate> {
    let k = log_weights.len() as f64;
    let max = log_weights
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max);
    if !max.is_finite() {
        return Err(Error::NonFinite {
            what: "importance weights".into(),
            detail: format!("largest log-weight is {max}; check the target density"),
        });
    }
    // Normalised weights r_i = w_i / max w.
    let r: Vec<f64> = log_weights.iter().map(|l| (l - max).exp()).collect();
    let s1: f64 = r.iter().sum();
    let s2: f64 = r.iter().map(|x| x * x).sum();
    let log_z = max + (s1 / k).ln();
    let mean_r = s1 / k;
    let var_r = if k > 1.0 {
        r.iter().map(|x| (x - mean_r).powi(2)).sum::<f64>() / (k - 1.0)
    } else {
        0.0
    };
    let (free_energy, free_energy_se) = mean_se(objective);
    let (control_cost, _) = mean_se(cost);
    Ok(LogZEstimate {
        paths: log_weights.len(),
        log_z,
        log_z_se: (var_r / k).sqrt() / mean_r,
        free_energy,
        free_energy_se,
        control_cost,
        ess: s1 * s1 / s2,
        samples,
        log_weights,
    })
}
