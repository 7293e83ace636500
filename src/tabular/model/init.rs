//! Closed-form starting points from coded rows: the Gaussian of the continuous cells (by EM
//! when cells are missing) and each categorical column's frequencies.

use super::layout::RowLayout;
use crate::util::linalg::block_inverse;

/// Rows the EM start uses at most (the first ones of the shuffled training rows).
const EM_ROWS: usize = 20_000;
/// EM iterations at most.
const EM_ITERATIONS: usize = 100;

/// The regression `B = Σ_mo Σ_oo⁻¹` (`|m| × |o|`) and the conditional covariance
/// `Σ_mm − Σ_mo Σ_oo⁻¹ Σ_om` of the cells `m` given the cells `o` of a Gaussian with
/// covariance `cov` (`D × D`, row-major), so `E[y_m | y_o] = μ_m + B (y_o − μ_o)` (Bishop,
/// *Pattern Recognition and Machine Learning*, 2006, eqs. 2.81–2.82). `None` if `Σ_oo` is not
/// positive definite.
pub(crate) fn conditional_map(
    cov: &[f64],
    d: usize,
    o: &[usize],
    m: &[usize],
) -> Option<(Vec<f64>, Vec<f64>)> {
    let (k, q) = (o.len(), m.len());
    let sinv = if k == 0 {
        Vec::new()
    } else {
        block_inverse(cov, d, o)?.0
    };
    let mut bm = vec![0.0; q * k];
    for (a, &i) in m.iter().enumerate() {
        for b in 0..k {
            bm[a * k + b] = o
                .iter()
                .enumerate()
                .map(|(c, &j)| cov[i * d + j] * sinv[c * k + b])
                .sum();
        }
    }
    let mut c = vec![0.0; q * q];
    for (a, &i) in m.iter().enumerate() {
        for (b, &j) in m.iter().enumerate() {
            let fix: f64 = o
                .iter()
                .enumerate()
                .map(|(e, &l)| bm[a * k + e] * cov[l * d + j])
                .sum();
            c[a * q + b] = cov[i * d + j] - fix;
        }
    }
    Some((bm, c))
}

/// The conditional mean and covariance of the cells `m` given values `x_o` of the cells `o`
/// of `N(mean, cov)` (see [`conditional_map`]).
fn condition(
    mean: &[f64],
    cov: &[f64],
    d: usize,
    o: &[usize],
    m: &[usize],
    x_o: &[f64],
) -> Option<(Vec<f64>, Vec<f64>)> {
    let (bm, c) = conditional_map(cov, d, o, m)?;
    let k = o.len();
    let r: Vec<f64> = o.iter().zip(x_o).map(|(&i, x)| x - mean[i]).collect();
    let mu = m
        .iter()
        .enumerate()
        .map(|(a, &i)| mean[i] + (0..k).map(|b| bm[a * k + b] * r[b]).sum::<f64>())
        .collect();
    Some((mu, c))
}

/// Mean and covariance of the continuous cells of full coded rows (see [`RowLayout`]):
/// the sample moments (`1/n`) when every cell is observed, otherwise the maximum-likelihood
/// Gaussian under ignorable missingness, by EM (Dempster, Laird & Rubin 1977; Little &
/// Rubin, *Statistical Analysis with Missing Data*, 2nd ed. 2002, §11.2.1) on at most the
/// first 20,000 rows with an observed continuous cell.
pub(crate) fn gaussian_moments(rows: &[f64], layout: &RowLayout) -> (Vec<f64>, Vec<f64>) {
    let dc = layout.continuous;
    let w = layout.coded_width();
    let at_mask = layout.output_width();
    let mut data: Vec<(Vec<f64>, Vec<bool>)> = Vec::new();
    for r in rows.chunks_exact(w) {
        let obs: Vec<bool> = r[at_mask..at_mask + dc].iter().map(|&m| m > 0.5).collect();
        if obs.iter().any(|&o| o) {
            data.push((r[..dc].to_vec(), obs));
        }
        if data.len() == EM_ROWS {
            break;
        }
    }
    let n = data.len().max(1) as f64;
    let complete = data.iter().all(|(_, o)| o.iter().all(|&b| b));
    if complete {
        // The sample moments, summed as x / n (the order every complete fit has used).
        let mut mean = vec![0.0; dc];
        for (x, _) in &data {
            for (m, v) in mean.iter_mut().zip(x) {
                *m += v / n;
            }
        }
        let mut cov = vec![0.0; dc * dc];
        for (x, _) in &data {
            for i in 0..dc {
                for j in 0..dc {
                    cov[i * dc + j] += (x[i] - mean[i]) * (x[j] - mean[j]) / n;
                }
            }
        }
        return (mean, cov);
    }
    // EM starts from the observed cells' means and variances.
    let mut mean = vec![0.0; dc];
    let mut cov = vec![0.0; dc * dc];
    for j in 0..dc {
        let col: Vec<f64> = data
            .iter()
            .filter(|(_, o)| o[j])
            .map(|(x, _)| x[j])
            .collect();
        let c = col.len().max(1) as f64;
        mean[j] = col.iter().sum::<f64>() / c;
        cov[j * dc + j] = (col.iter().map(|x| (x - mean[j]).powi(2)).sum::<f64>() / c).max(1e-6);
    }
    for _ in 0..EM_ITERATIONS {
        let mut t1 = vec![0.0; dc];
        let mut t2 = vec![0.0; dc * dc];
        let mut ridge = cov.clone();
        for j in 0..dc {
            ridge[j * dc + j] += 1e-9;
        }
        for (x, obs) in &data {
            let o: Vec<usize> = (0..dc).filter(|&j| obs[j]).collect();
            let m: Vec<usize> = (0..dc).filter(|&j| !obs[j]).collect();
            let x_o: Vec<f64> = o.iter().map(|&j| x[j]).collect();
            let mut xh = x.clone();
            let mut cmm = Vec::new();
            if !m.is_empty() {
                let Some((mu, c)) = condition(&mean, &ridge, dc, &o, &m, &x_o) else {
                    return (mean, cov);
                };
                for (a, &i) in m.iter().enumerate() {
                    xh[i] = mu[a];
                }
                cmm = c;
            }
            for i in 0..dc {
                t1[i] += xh[i];
                for j in 0..dc {
                    t2[i * dc + j] += xh[i] * xh[j];
                }
            }
            for (a, &i) in m.iter().enumerate() {
                for (b, &j) in m.iter().enumerate() {
                    t2[i * dc + j] += cmm[a * m.len() + b];
                }
            }
        }
        let new_mean: Vec<f64> = t1.iter().map(|v| v / n).collect();
        let mut new_cov = vec![0.0; dc * dc];
        for i in 0..dc {
            for j in 0..dc {
                new_cov[i * dc + j] = t2[i * dc + j] / n - new_mean[i] * new_mean[j];
            }
        }
        let change = new_mean
            .iter()
            .zip(&mean)
            .chain(new_cov.iter().zip(&cov))
            .map(|(a, b)| (a - b).abs())
            .fold(0.0, f64::max);
        mean = new_mean;
        cov = new_cov;
        if change < 1e-10 {
            break;
        }
    }
    (mean, cov)
}

/// Log-frequencies of each categorical column's levels in full coded rows, with half a count
/// added to every level (the Jeffreys prior, so unseen levels keep a finite probability).
pub(crate) fn log_frequencies(rows: &[f64], layout: &RowLayout) -> Vec<f64> {
    let w = layout.coded_width();
    let start = layout.continuous;
    let mut counts = vec![0.0; layout.one_hot_width()];
    for r in rows.chunks_exact(w) {
        for (c, v) in counts
            .iter_mut()
            .zip(&r[start..start + layout.one_hot_width()])
        {
            *c += v;
        }
    }
    let mut out = Vec::with_capacity(counts.len());
    let mut at = 0;
    for &k in &layout.levels {
        let block = &counts[at..at + k];
        let total: f64 = block.iter().sum::<f64>() + 0.5 * k as f64;
        out.extend(block.iter().map(|c| ((c + 0.5) / total).ln()));
        at += k;
    }
    out
}
