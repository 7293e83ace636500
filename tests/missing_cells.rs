//! Missing cells and categorical columns against closed forms: the marginal likelihood of the
//! observed cells, and the conditional mean and covariance of the missing ones, of a
//! linear-Gaussian latent model with known parameters.
#![allow(clippy::needless_range_loop)] // index loops mirror the textbook formulas
mod common;
#[path = "support/dense.rs"]
mod linalg;

use common::*;
use neural_sde::*;

const D: usize = 4;

/// A table drawn from N(μ, Σ) in 4-D with a fixed generator (demo data for the check; the
/// check itself is against the closed forms below).
fn gaussian_table(n: usize) -> Table {
    let l = [
        [1.0, 0.0, 0.0, 0.0],
        [0.6, 0.8, 0.0, 0.0],
        [-0.3, 0.5, 0.7, 0.0],
        [0.4, -0.2, 0.3, 0.6],
    ];
    let mu = [2.0, -1.0, 0.5, 3.0];
    let z = standard_normals(&mut generator(7, 0), n * D);
    let rows = z
        .chunks_exact(D)
        .map(|e| {
            (0..D)
                .map(|i| mu[i] + (0..D).map(|k| l[i][k] * e[k]).sum::<f64>())
                .collect()
        })
        .collect();
    Table::new(vec!["a".into(), "b".into(), "c".into(), "d".into()], rows).unwrap()
}

/// The model's marginal of the continuous cells in the data's units, `N(μ, Σ)`: with zero
/// prior drift Euler–Maruyama is exact, `Z_T ~ N(0, σ²T I)`, so in standardised units
/// `y ~ N(b, σ²T W Wᵀ + (PᵀP)⁻¹)` (Bishop 2006, *Pattern Recognition and Machine Learning*,
/// §2.3.3), mapped by `y = mean + scale ⊙ z`.
fn marginal(m: &TabularModel) -> (Vec<f64>, Vec<f64>) {
    let d = m.latent().layout().continuous;
    let k = m.latent().latent_dim();
    let w = param(m, "decoder.linear.weight");
    let b = param(m, "decoder.linear.bias");
    let lower = param(m, "decoder.precision_lower");
    let logd = param(m, "decoder.precision_log_diag");
    let mut p = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..i {
            p[i * d + j] = lower[i * d + j];
        }
        p[i * d + i] = logd[i].exp();
    }
    let pinv = linalg::lower_triangular_inverse(&p, d).unwrap();
    let s = m.scaler();
    let mut cov = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..d {
            let mut c = 0.0;
            for l in 0..k {
                c += w[i * k + l] * w[j * k + l];
            }
            for l in 0..d {
                c += pinv[i * d + l] * pinv[j * d + l];
            }
            cov[i * d + j] = c * s.scale[i] * s.scale[j];
        }
    }
    let mean = (0..d).map(|i| s.mean[i] + s.scale[i] * b[i]).collect();
    (mean, cov)
}

/// The observed cells of `y` and the inverse of `cov`'s block on them.
fn observed_block_inverse(cov: &[f64], d: usize, y: &[f64]) -> (Vec<usize>, Vec<f64>, Vec<f64>) {
    let o: Vec<usize> = (0..d).filter(|&j| !y[j].is_nan()).collect();
    let k = o.len();
    let mut s = vec![0.0; k * k];
    for a in 0..k {
        for b in 0..k {
            s[a * k + b] = cov[o[a] * d + o[b]];
        }
    }
    let l = linalg::cholesky(&s, k).unwrap();
    let prec = linalg::cholesky_inverse(&l, k);
    (o, prec, l)
}

/// `log N(y_o; μ_o, Σ_oo)`: a Gaussian's marginal over a subset of its coordinates is the
/// Gaussian with the sub-vector and sub-matrix (Bishop 2006, eqs. 2.92–2.93).
fn observed_loglik(mean: &[f64], cov: &[f64], d: usize, y: &[f64]) -> f64 {
    let (o, prec, l) = observed_block_inverse(cov, d, y);
    let k = o.len();
    let r: Vec<f64> = o.iter().map(|&j| y[j] - mean[j]).collect();
    let mut q = 0.0;
    for a in 0..k {
        for b in 0..k {
            q += r[a] * prec[a * k + b] * r[b];
        }
    }
    -0.5 * (q + linalg::log_det_from_cholesky(&l, k) + k as f64 * (2.0 * std::f64::consts::PI).ln())
}

/// Conditional mean and variance of cell `m` given the observed cells of `y`:
/// `μ_m + Σ_mo Σ_oo⁻¹ (y_o − μ_o)` and `Σ_mm − Σ_mo Σ_oo⁻¹ Σ_om` (Bishop 2006, eqs.
/// 2.81–2.82).
fn conditional(mean: &[f64], cov: &[f64], d: usize, y: &[f64], m: usize) -> (f64, f64) {
    let (o, prec, _) = observed_block_inverse(cov, d, y);
    let k = o.len();
    let mut mu = mean[m];
    let mut var = cov[m * d + m];
    for a in 0..k {
        for b in 0..k {
            mu += cov[m * d + o[a]] * prec[a * k + b] * (y[o[b]] - mean[o[b]]);
            var -= cov[m * d + o[a]] * prec[a * k + b] * cov[o[b] * d + m];
        }
    }
    (mu, var)
}

/// The conditional covariance `[Σ_aa, Σ_ab, Σ_bb] − Σ_·O Σ_OO⁻¹ Σ_O·` of missing cells `a`
/// and `b` given the observed cells of `y` (Bishop 2006, eq. 2.82).
fn conditional_cov(cov: &[f64], d: usize, y: &[f64], a: usize, b: usize) -> [f64; 3] {
    let (o, prec, _) = observed_block_inverse(cov, d, y);
    let k = o.len();
    let c = |u: usize, v: usize| {
        let mut x = cov[u * d + v];
        for p in 0..k {
            for q in 0..k {
                x -= cov[u * d + o[p]] * prec[p * k + q] * cov[o[q] * d + v];
            }
        }
        x
    };
    [c(a, a), c(a, b), c(b, b)]
}

/// Held-out rows with one or two cells masked, in a fixed pattern.
fn masked_rows(t: &Table) -> Table {
    let mut cells = Vec::new();
    for i in 0..t.n_rows() {
        cells.push((i, i % D));
        if i % 3 == 0 {
            cells.push((i, (i + 1) % D));
        }
    }
    t.with_missing(&cells).unwrap()
}

fn initial_model(table: &Table) -> TabularModel {
    let cfg = TrainConfig {
        validation_fraction: 0.0,
        batch_size: 32,
        ..Default::default()
    };
    Trainer::new(table, LatentConfig::default(), cfg)
        .unwrap()
        .into_model()
}

#[test]
fn marginal_likelihood_of_observed_cells_matches_closed_form() {
    let table = gaussian_table(500);
    let model = initial_model(&table);
    let (mean, cov) = marginal(&model);
    let held = masked_rows(
        &gaussian_table(560)
            .take_rows(&(500..560).collect::<Vec<_>>())
            .unwrap(),
    );
    let e = model.evaluate(&held, EvalOptions::new(256, 3)).unwrap();
    let cells = held.values().iter().filter(|v| !v.is_nan()).count();
    assert_eq!(e.observed_cells, cells);
    let diffs: Vec<f64> = (0..held.n_rows())
        .map(|i| e.loglik_rows[i] - observed_loglik(&mean, &cov, D, held.row(i)))
        .collect();
    let (m, se) = mean_se(&diffs);
    // The importance-weighted estimate is a lower bound in expectation whose gap shrinks
    // like 1/K (Burda et al. 2016): a small slack on top of the Monte Carlo error.
    assert_within(
        "mean IW − exact log-likelihood of the observed cells",
        m,
        0.0,
        se,
        3.0,
        0.01,
    );
    let worst = diffs.iter().fold(0.0f64, |a, d| a.max(d.abs()));
    eprintln!("IW − exact: mean {m:.5} ± {se:.5}, worst row {worst:.5}");
    assert!(
        worst < 0.05,
        "a row's estimate is {worst} nats from its closed form"
    );
    // The ELBO is a lower bound of the same quantity.
    assert!(e.elbo_per_row <= e.loglik_per_row + 1e-9);
}

#[test]
fn imputed_moments_match_gaussian_conditioning() {
    let table = gaussian_table(500);
    let model = initial_model(&table);
    let (mean, cov) = marginal(&model);
    let held = masked_rows(
        &gaussian_table(540)
            .take_rows(&(500..540).collect::<Vec<_>>())
            .unwrap(),
    );
    let out = model
        .impute(
            &held,
            ImputeOptions {
                paths: 1024,
                draws: 1,
                seed: 5,
            },
        )
        .unwrap();
    let missing = held.values().iter().filter(|v| v.is_nan()).count();
    assert_eq!(out.cells.len(), missing);
    let mut z_mean = Vec::new();
    let mut sd_ratio = Vec::new();
    for c in &out.cells {
        let (mu, var) = conditional(&mean, &cov, D, held.row(c.row), c.column);
        let sd = var.sqrt();
        z_mean.push((c.mean.unwrap() - mu) / sd);
        sd_ratio.push(c.sd.unwrap() / sd);
    }
    // Self-normalised importance sampling with an effective sample size of n_e has a
    // standard error of about sd/√n_e for the mean (Owen 2013, §9.3): with n_e ≥ 20 every
    // standardised error stays well under 1, and the average under 0.1.
    let min_ess = out.ess.iter().copied().fold(f64::INFINITY, f64::min);
    // The initial control is the exact optimal one for every pattern: nearly every path counts.
    assert!(min_ess >= 512.0, "effective sample size {min_ess} of 1024");
    let (m, _) = mean_se(&z_mean);
    assert!(
        m.abs() < 0.1,
        "mean standardised error of conditional means {m}"
    );
    assert!(
        z_mean.iter().all(|z| z.abs() < 4.0 / min_ess.sqrt()),
        "{z_mean:?}"
    );
    let (r, _) = mean_se(&sd_ratio);
    eprintln!(
        "conditional means: mean standardised error {m:.4}; sd ratio {r:.4}; min ESS {min_ess:.1}"
    );
    assert!((r - 1.0).abs() < 0.05, "conditional sd ratio {r}");
    assert!(
        sd_ratio.iter().all(|r| (r - 1.0).abs() < 0.2),
        "{sd_ratio:?}"
    );
    // The covariance of two cells missing from the same row, from many draws, against
    // Σ_ab − Σ_aO Σ_OO⁻¹ Σ_Ob (Bishop 2006, eq. 2.82), compared as correlations on Fisher's
    // z scale, where a correlation of n independent draws has standard error 1/√(n − 3)
    // (Fisher 1921, Metron 1:3–32).
    let many = model
        .impute(
            &held,
            ImputeOptions {
                paths: 1024,
                draws: 400,
                seed: 6,
            },
        )
        .unwrap();
    let mut zs = Vec::new();
    for i in 0..held.n_rows() {
        let row = held.row(i);
        let miss: Vec<usize> = (0..D).filter(|&j| row[j].is_nan()).collect();
        if miss.len() != 2 {
            continue;
        }
        let (a, b) = (miss[0], miss[1]);
        let xa: Vec<f64> = many.tables.iter().map(|t| t.row(i)[a]).collect();
        let xb: Vec<f64> = many.tables.iter().map(|t| t.row(i)[b]).collect();
        let n = xa.len() as f64;
        let (ma, mb) = (xa.iter().sum::<f64>() / n, xb.iter().sum::<f64>() / n);
        let cab = xa
            .iter()
            .zip(&xb)
            .map(|(x, y)| (x - ma) * (y - mb))
            .sum::<f64>()
            / n;
        let va = xa.iter().map(|x| (x - ma).powi(2)).sum::<f64>() / n;
        let vb = xb.iter().map(|y| (y - mb).powi(2)).sum::<f64>() / n;
        let r = cab / (va * vb).sqrt();
        let exact = conditional_cov(&cov, D, row, a, b);
        let rho = exact[1] / (exact[0] * exact[2]).sqrt();
        zs.push((r.atanh() - rho.atanh()) * (n - 3.0).sqrt());
    }
    assert!(zs.len() >= 10, "{} rows with two missing cells", zs.len());
    let (zm, _) = mean_se(&zs);
    eprintln!(
        "conditional correlations: mean Fisher z error {zm:.3} over {} rows",
        zs.len()
    );
    assert!(
        zm.abs() < 3.0 / (zs.len() as f64).sqrt(),
        "mean z {zm}: {zs:?}"
    );
    assert!(zs.iter().all(|z| z.abs() < 4.0), "{zs:?}");
    // Observed cells are never changed.
    let filled = &out.tables[0];
    for (a, b) in held.values().iter().zip(filled.values()) {
        assert!(a.is_nan() || a == b);
        assert!(b.is_finite());
    }
}

#[test]
fn categorical_start_is_independent_frequencies_times_gaussian() {
    // A categorical column beside the Gaussian ones: at the start its probabilities are the
    // training frequencies with half a count added (Jeffreys), independent of the rest, so
    // each row's log-likelihood is the Gaussian's plus log p(level) (closed form).
    let base = gaussian_table(300);
    let levels = ["lo", "mid", "hi"];
    let dir = std::env::temp_dir().join(format!("nsde-cat-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("t.csv");
    let mut text = String::from("a,b,c,d,group\n");
    for i in 0..base.n_rows() {
        let r = base.row(i);
        let g = levels[(i * 7 % 10).min(9) / 4];
        text += &format!("{},{},{},{},{g}\n", r[0], r[1], r[2], r[3]);
    }
    std::fs::write(&path, text).unwrap();
    let table =
        Table::from_csv_typed(&path, None, HeaderLine::Auto, &ColumnRules::default()).unwrap();
    assert_eq!(table.kinds()[4].levels().unwrap(), ["hi", "lo", "mid"]);
    let model = initial_model(&table);
    let (mean, cov) = marginal(&model);
    let mut counts = [0.0; 3];
    for i in 0..table.n_rows() {
        counts[table.row(i)[4] as usize] += 1.0;
    }
    let n = table.n_rows() as f64;
    let e = model.evaluate(&table, EvalOptions::new(64, 1)).unwrap();
    let diff: Vec<f64> = (0..table.n_rows())
        .map(|i| {
            let r = table.row(i);
            let level = r[4] as usize;
            let want =
                observed_loglik(&mean, &cov, D, &r[..D]) + ((counts[level] + 0.5) / (n + 1.5)).ln();
            e.loglik_rows[i] - want
        })
        .collect();
    // As for complete continuous rows (tests/latent_gaussian.rs): Monte Carlo noise plus the
    // O(1/K) bias of a log of a mean.
    let (m, se) = mean_se(&diff);
    assert_within("IW estimate − exact", m, 0.0, se, 4.0, 0.01);
    assert_eq!(e.observed_cells, 5 * table.n_rows());
    std::fs::remove_dir_all(&dir).ok();
}
