//! Imputation and conditional generation with an [`Ensemble`].
//!
//! Given a row's observed cells `y_o`, the ensemble's conditional is the mixture of the
//! members' conditionals with weights `r_m ∝ w_m p_m(y_o)`, Bayes' rule applied to the
//! mixture (Bishop, *Pattern Recognition and Machine Learning*, 2006, eq. 9.13, the
//! responsibilities). Each member imputes as [`TabularModel::impute`] does and estimates its
//! `log p_m(y_o)` from the same posterior paths (the log of their mean importance weight);
//! each row of each draw is then completed by the member drawn with probability `r_m`.
//! Picking the member by its summed path weights and then a path by its own weight is the
//! self-normalised importance sampling of the pooled paths of every member.

use crate::error::Result;
use crate::tabular::ensemble::Ensemble;
use crate::tabular::fitted::TabularModel;
use crate::tabular::impute::{check_imputed_cells, CellEstimate, Imputation, ImputeOptions};
use crate::tabular::model::{pick, softmax};
use crate::tabular::table::Table;
use crate::util::rng::{key2, keyed_generator, streams, uniform};

impl Ensemble {
    /// Fills every missing cell of `table` by draws from the ensemble's conditional given the
    /// row's observed cells (see the module docs): each member imputes with `options`, and
    /// each row of each draw is taken from the member drawn with its posterior weight
    /// `r_m ∝ w_m p_m(y_o)`. A continuous cell's estimate is the mixture's mean and standard
    /// deviation, a categorical cell's the `r`-weighted level probabilities; a row's
    /// effective sample size is that of the pooled paths, `1 / Σ_m r_m² / ess_m`.
    ///
    /// # Errors
    /// As [`TabularModel::impute`] for each member; [`crate::Error::InvalidConfig`] when the members'
    /// draws together would hold more than [`crate::limits::MAX_IMPUTED_VALUES`] cells.
    pub fn impute(&self, table: &Table, options: ImputeOptions) -> Result<Imputation> {
        let members = self.members();
        if let [one] = members {
            return one.impute(table, options);
        }
        check_imputed_cells(
            options.draws,
            members
                .len()
                .saturating_mul(options.draws)
                .saturating_mul(table.values().len()),
            || format!("the {} members' draws", members.len()),
        )?;
        let parts = members
            .iter()
            .map(|m| m.impute_with_evidence(table, options))
            .collect::<Result<Vec<_>>>()?;
        let log_w: Vec<f64> = self.weights().iter().map(|w| w.ln()).collect();
        let rows = parts[0].1.len();
        // Each row's posterior weight of each member.
        let r: Vec<Vec<f64>> = (0..rows)
            .map(|i| {
                let l: Vec<f64> = parts
                    .iter()
                    .zip(&log_w)
                    .map(|((_, ev), lw)| lw + ev[i])
                    .collect();
                softmax(&l)
            })
            .collect();
        let d = members[0].columns().len();
        let mut tables = Vec::with_capacity(options.draws);
        for draw in 0..options.draws {
            let mut values = parts[0].0.tables[draw].values().to_vec();
            for (i, ri) in r.iter().enumerate() {
                let mut rng = keyed_generator(
                    options.seed,
                    streams::ENSEMBLE_IMPUTE,
                    key2(i as u64, draw as u64),
                );
                let m = pick(ri, uniform(&mut rng));
                let from = parts[m].0.tables[draw].values();
                values[i * d..(i + 1) * d].copy_from_slice(&from[i * d..(i + 1) * d]);
            }
            tables.push(members[0].table_of(values)?);
        }
        let cells = parts[0]
            .0
            .cells
            .iter()
            .enumerate()
            .map(|(c, first)| mixed_estimate(first, &r[first.row], |m| &parts[m].0.cells[c]))
            .collect();
        let ess = (0..rows)
            .map(|i| {
                let s: f64 = parts
                    .iter()
                    .zip(&r[i])
                    .map(|((imp, _), ri)| ri * ri / imp.ess[i])
                    .sum();
                1.0 / s
            })
            .collect();
        Ok(Imputation { tables, cells, ess })
    }

    /// Draws `rows` rows from the ensemble conditioned on the cells `given` (see
    /// [`TabularModel::generate_given`]), by [`Ensemble::impute`].
    ///
    /// # Errors
    /// As [`TabularModel::generate_given`].
    pub fn generate_given(
        &self,
        rows: usize,
        given: &[(String, String)],
        options: ImputeOptions,
    ) -> Result<Imputation> {
        let first: &TabularModel = &self.members()[0];
        self.impute(&first.given_table(rows, given)?, options)
    }
}

/// One cell's estimate under the ensemble: the members' estimates (`of(m)`) mixed with the
/// row's member weights `r` (mean `Σ r μ`, variance `Σ r (σ² + μ²) − mean²`, probabilities
/// `Σ r p`).
fn mixed_estimate<'a>(
    first: &CellEstimate,
    r: &[f64],
    of: impl Fn(usize) -> &'a CellEstimate,
) -> CellEstimate {
    let mut out = CellEstimate {
        row: first.row,
        column: first.column,
        mean: None,
        sd: None,
        probabilities: None,
    };
    if first.mean.is_some() {
        let (mut mean, mut second) = (0.0, 0.0);
        for (m, rm) in r.iter().enumerate() {
            let e = of(m);
            let (mu, sd) = (e.mean.unwrap_or(f64::NAN), e.sd.unwrap_or(f64::NAN));
            mean += rm * mu;
            second += rm * (sd * sd + mu * mu);
        }
        out.mean = Some(mean);
        out.sd = Some((second - mean * mean).max(0.0).sqrt());
    }
    if let Some(p) = &first.probabilities {
        let mut probs = vec![0.0; p.len()];
        for (m, rm) in r.iter().enumerate() {
            for (a, b) in probs.iter_mut().zip(of(m).probabilities.iter().flatten()) {
                *a += rm * b;
            }
        }
        out.probabilities = Some(probs);
    }
    out
}
