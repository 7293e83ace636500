//! An exponential moving average of the weights, the model that validation scores and
//! training keeps.
//!
//! After each applied optimiser step the average moves a share `1 − β` of the way to the
//! current weights: `w̄ ← β w̄ + (1 − β) w`, starting from the weights after the first step.
//! Averaging the iterates of stochastic gradient descent removes much of their noise
//! (Polyak & Juditsky 1992, "Acceleration of stochastic approximation by averaging", SIAM J.
//! Control Optim. 30(4)); the exponential window, which forgets the early iterates, is
//! common practice, no source. Training itself always continues from the current weights.

use candle_nn::VarMap;

use crate::error::{Error, Result};
use crate::nn::params::sorted_vars;
use crate::nn::recovery::{restore, snapshot, Snapshot};

/// The running average of a `VarMap`'s variables (none before the first step, or when the
/// decay is 0 and the average is the current weights).
#[derive(Debug, Clone)]
pub(crate) struct WeightAverage {
    decay: f64,
    weights: Option<Snapshot>,
}

impl WeightAverage {
    /// An empty average with decay `β` in `[0, 1)` (validated by the caller's config).
    pub(crate) fn new(decay: f64) -> Self {
        Self {
            decay,
            weights: None,
        }
    }

    /// An average read back from a checkpoint (`weights` in name order, or `None`).
    pub(crate) fn from_weights(decay: f64, weights: Option<Snapshot>) -> Self {
        Self { decay, weights }
    }

    /// The averaged weights, when there are any to store (`None` before the first step and
    /// when the decay is 0).
    pub(crate) fn weights(&self) -> Option<&Snapshot> {
        self.weights.as_ref()
    }

    /// Folds the current weights of `varmap` into the average (after an applied step).
    ///
    /// # Errors
    /// [`Error::Training`] if the average holds other variables than `varmap`;
    /// [`Error::Candle`] on tensor errors.
    pub(crate) fn update(&mut self, varmap: &VarMap) -> Result<()> {
        if self.decay == 0.0 {
            return Ok(());
        }
        let Some(avg) = self.weights.take() else {
            self.weights = Some(snapshot(varmap)?);
            return Ok(());
        };
        let vars = sorted_vars(varmap)?;
        if vars.len() != avg.len() {
            return Err(mismatch(avg.len(), vars.len()));
        }
        let (b, a) = (self.decay, 1.0 - self.decay);
        let mut next = Vec::with_capacity(avg.len());
        for ((name, var), (aname, w)) in vars.iter().zip(avg) {
            if *name != aname {
                return Err(Error::Training(format!(
                    "the weight average holds {aname} where the model has {name}"
                )));
            }
            // Detached: computed from a variable, the sum would record the operation and
            // hold the previous average, which holds the one before, so every step's
            // average would stay in memory (a fit of a few hundred rows of 30 columns grew
            // to 14 GB before this).
            let sum = (w.affine(b, 0.0)? + var.as_tensor().affine(a, 0.0)?)?;
            next.push((aname, sum.detach()));
        }
        self.weights = Some(next);
        Ok(())
    }

    /// Runs `f` with the averaged weights in `varmap` and puts the current weights back
    /// afterwards (also when `f` fails). Without an average `f` sees the current weights.
    ///
    /// # Errors
    /// Whatever `f` returns; [`Error::Training`] or [`Error::Candle`] if the weights cannot
    /// be swapped.
    pub(crate) fn with_average<T>(
        &self,
        varmap: &VarMap,
        f: impl FnOnce() -> Result<T>,
    ) -> Result<T> {
        let Some(avg) = &self.weights else {
            return f();
        };
        let current = snapshot(varmap)?;
        restore(varmap, avg)?;
        let out = f();
        restore(varmap, &current)?;
        out
    }
}

fn mismatch(have: usize, want: usize) -> Error {
    Error::Training(format!(
        "a weight average of {have} tensors cannot follow {want} variables"
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{DType, Device, Tensor};

    fn one_var(v: f64) -> VarMap {
        let vm = VarMap::new();
        let init = candle_nn::Init::Const(v);
        vm.get(2, "w", init, DType::F64, &Device::Cpu).unwrap();
        vm
    }

    fn set(vm: &VarMap, v: f64) {
        let t = Tensor::new(&[v, -2.0 * v], &Device::Cpu).unwrap();
        sorted_vars(vm).unwrap()[0].1.set(&t).unwrap();
    }

    fn read(vm: &VarMap) -> Vec<f64> {
        sorted_vars(vm).unwrap()[0].1.as_tensor().to_vec1().unwrap()
    }

    #[test]
    fn the_average_is_the_exponentially_weighted_sum_of_the_iterates() {
        // Closed form of the recursion m_1 = w_1, m_k = β m_{k−1} + (1 − β) w_k:
        // m_n = β^{n−1} w_1 + (1 − β) Σ_{k=2..n} β^{n−k} w_k: the exponentially weighted
        // moving average started at the first observation (Hunter 1986, "The exponentially
        // weighted moving average", J. Quality Technology 18(4); from memory).
        let beta: f64 = 0.9;
        let iterates = [1.0, 4.0, -3.0, 0.5, 2.0];
        let vm = one_var(0.0);
        let mut avg = WeightAverage::new(beta);
        for &w in &iterates {
            set(&vm, w);
            avg.update(&vm).unwrap();
        }
        let n = iterates.len();
        let want = beta.powi(n as i32 - 1) * iterates[0]
            + (1.0 - beta)
                * (2..=n)
                    .map(|k| beta.powi((n - k) as i32) * iterates[k - 1])
                    .sum::<f64>();
        let seen = avg.with_average(&vm, || Ok(read(&vm))).unwrap();
        assert!((seen[0] - want).abs() < 1e-12, "{} vs {want}", seen[0]);
        assert!((seen[1] + 2.0 * want).abs() < 1e-12);
        // The current weights are back afterwards, also when the closure fails.
        assert_eq!(read(&vm), vec![2.0, -4.0]);
        let failed: Result<()> = avg.with_average(&vm, || Err(Error::Training("no".into())));
        assert!(failed.is_err());
        assert_eq!(read(&vm), vec![2.0, -4.0]);
    }

    // Common practice, no source: a value kept across steps must not record the
    // operations that made it, or it holds every earlier value through them.
    #[test]
    fn the_average_records_no_operations_and_holds_no_earlier_steps() {
        let vm = one_var(1.0);
        let mut avg = WeightAverage::new(0.9);
        for k in 0..3 {
            set(&vm, k as f64);
            avg.update(&vm).unwrap();
            let weights = avg.weights().unwrap();
            assert!(weights.iter().all(|(_, t)| !t.track_op()), "step {k}");
        }
        assert!(snapshot(&vm).unwrap().iter().all(|(_, t)| !t.track_op()));
    }

    #[test]
    fn decay_zero_keeps_no_average_and_scores_the_current_weights() {
        let vm = one_var(3.0);
        let mut avg = WeightAverage::new(0.0);
        avg.update(&vm).unwrap();
        set(&vm, 5.0);
        avg.update(&vm).unwrap();
        assert!(avg.weights().is_none());
        assert_eq!(
            avg.with_average(&vm, || Ok(read(&vm))).unwrap(),
            vec![5.0, -10.0]
        );
    }

    #[test]
    fn an_average_of_other_variables_is_an_error() {
        let vm = one_var(1.0);
        let other = VarMap::new();
        other
            .get(
                2,
                "v",
                candle_nn::Init::Const(0.0),
                DType::F64,
                &Device::Cpu,
            )
            .unwrap();
        let mut avg = WeightAverage::new(0.5);
        avg.update(&other).unwrap();
        let e = avg.update(&vm).unwrap_err().to_string();
        assert!(e.contains("holds v where the model has w"), "{e}");
    }
}
