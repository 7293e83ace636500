//! The free-energy objective: control cost plus terminal cost.

use candle_core::{DType, Tensor};

use crate::error::{Error, Result};
use crate::sde::solver::Paths;
use crate::sde::terminal::TerminalCost;

/// The free-energy objective `J(u) = E[½ Σ_k |u_k/σ|² h + g(X_T)]` on one batch, with its
/// parts. By the variational (Boué–Dupuis) formula `J(u) ≥ −log E[exp(−g(X_T))]` under the
/// uncontrolled process, with equality at the optimal control; with `g = −log p(y|·)` it is
/// the negative ELBO.
#[derive(Debug, Clone)]
pub struct FreeEnergy {
    /// Batch mean of the per-path objective: a scalar that carries the autodiff graph.
    pub loss: Tensor,
    /// Per-path objective `C + g`, shape `(batch,)`.
    pub per_path: Tensor,
    /// Per-path control cost `C`, shape `(batch,)`.
    pub control_cost: Tensor,
    /// Per-path terminal cost `g(X_T)`, shape `(batch,)`.
    pub terminal_cost: Tensor,
}

/// Plain-number summary of a [`FreeEnergy`] (batch means).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FreeEnergyValues {
    /// Mean objective.
    pub loss: f64,
    /// Mean control cost.
    pub control_cost: f64,
    /// Mean terminal cost.
    pub terminal_cost: f64,
}

impl FreeEnergy {
    /// Combines simulated paths with a terminal cost.
    ///
    /// # Errors
    /// [`Error::Shape`] if the terminal cost does not return one value per path.
    pub fn new(
        paths: &Paths,
        terminal: &dyn TerminalCost,
        observation: Option<&Tensor>,
    ) -> Result<Self> {
        let batch = paths.end.dim(0)?;
        let g = terminal.cost(&paths.end, observation)?;
        if g.dims() != [batch] {
            return Err(Error::shape(
                "terminal cost (one value per path)",
                [batch],
                g.dims(),
            ));
        }
        let per_path = (&paths.control_cost + &g)?;
        let loss = per_path.mean_all()?;
        Ok(Self {
            loss,
            per_path,
            control_cost: paths.control_cost.clone(),
            terminal_cost: g,
        })
    }

    /// The batch means as plain numbers.
    ///
    /// # Errors
    /// [`Error::NonFinite`] if the objective is NaN or infinite.
    pub fn values(&self) -> Result<FreeEnergyValues> {
        let mean = |t: &Tensor| -> Result<f64> {
            Ok(t.mean_all()?.to_dtype(DType::F64)?.to_scalar::<f64>()?)
        };
        let v = FreeEnergyValues {
            loss: mean(&self.loss)?,
            control_cost: mean(&self.control_cost)?,
            terminal_cost: mean(&self.terminal_cost)?,
        };
        if !v.loss.is_finite() {
            return Err(Error::NonFinite {
                what: "free energy".into(),
                detail: format!(
                    "control cost {} and terminal cost {}; lower the learning rate or check the terminal cost",
                    v.control_cost, v.terminal_cost
                ),
            });
        }
        Ok(v)
    }

    /// This batch's part of a minibatch split between processes: the loss scaled by `part`
    /// (this batch's share of the minibatch's rows, so that the parts sum to the minibatch
    /// mean; exactly the loss when `part` is 1) and the figures of [`FreeEnergy::values`]
    /// scaled alike, as the flat list `[loss, control cost, terminal cost]` that is summed
    /// over the processes and read back with [`FreeEnergyValues::from_parts`].
    ///
    /// # Errors
    /// As [`FreeEnergy::values`].
    pub(crate) fn share(self, part: f64) -> Result<(Tensor, Vec<f64>)> {
        let v = self.values()?;
        let loss = if part == 1.0 {
            self.loss
        } else {
            self.loss.affine(part, 0.0)?
        };
        Ok((
            loss,
            vec![v.loss * part, v.control_cost * part, v.terminal_cost * part],
        ))
    }
}

impl FreeEnergyValues {
    /// Number of figures [`FreeEnergy::share`] gives.
    pub(crate) const PARTS: usize = 3;

    /// The minibatch's values from the summed figures of [`FreeEnergy::share`].
    pub(crate) fn from_parts(f: &[f64]) -> Self {
        let at = |i: usize| f.get(i).copied().unwrap_or(f64::NAN);
        Self {
            loss: at(0),
            control_cost: at(1),
            terminal_cost: at(2),
        }
    }
}
