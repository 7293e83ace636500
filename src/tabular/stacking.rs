//! Weighing two fitted densities by their likelihood on held-out rows: the weight `w` of
//! `w p + (1 − w) q` that maximises the held-out log-likelihood (linear stacking of density
//! estimators; Smyth & Wolpert 1999, "Linearly combining density estimators via stacking",
//! Machine Learning 36).

/// Bisection steps: the bracket `[0, 1]` shrinks to `2^-60`, below `f64`'s resolution of
/// a weight.
const STEPS: usize = 60;

/// The weight `w ∈ [0, 1]` of the first density in `w p + (1 − w) q` that maximises
/// `Σ_r log(w p(r) + (1 − w) q(r))`, given each held-out row's `log p(r)` in `first` and
/// `log q(r)` in `second` (the same rows, in the same order). 1 when every row prefers the
/// first, 0 when every row prefers the second, and 1 for no rows.
///
/// The objective is concave in `w`, so its maximiser is the root of its derivative
/// `Σ_r (p − q) / (w p + (1 − w) q)`, which decreases in `w`; it is found by bisection
/// (an endpoint when the derivative keeps one sign), with each term scaled by the larger
/// density so that no exponential overflows. A row that one density gives no mass
/// (`log = −∞`) counts fully against it; a row without a difference (both `−∞`, or a NaN)
/// is skipped.
///
/// ```
/// use neural_sde::stacking_weight;
///
/// // Every row is far likelier under the first density, and the weight goes all to it.
/// assert_eq!(stacking_weight(&[0.0, -1.0], &[-50.0, -60.0]), 1.0);
/// // Equal densities on every row leave the weight undetermined; any is a maximiser.
/// let w = stacking_weight(&[-1.0; 3], &[-1.0; 3]);
/// assert!((0.0..=1.0).contains(&w));
/// ```
pub fn stacking_weight(first: &[f64], second: &[f64]) -> f64 {
    // Per row, `d = log p − log q`; the derivative's term is `(e^d − 1) / (w e^d + 1 − w)`,
    // or, divided through by `e^d` where `d > 0`, `(1 − e^−d) / (w + (1 − w) e^−d)`.
    let diffs: Vec<f64> = first
        .iter()
        .zip(second)
        .map(|(p, q)| p - q)
        .filter(|d| !d.is_nan())
        .collect();
    let slope = |w: f64| -> f64 {
        diffs
            .iter()
            .map(|&d| {
                if d > 0.0 {
                    let e = (-d).exp();
                    (1.0 - e) / (w + (1.0 - w) * e)
                } else {
                    let e = d.exp();
                    (e - 1.0) / (w * e + 1.0 - w)
                }
            })
            .sum()
    };
    if diffs.is_empty() || slope(1.0) >= 0.0 {
        return 1.0;
    }
    if slope(0.0) <= 0.0 {
        return 0.0;
    }
    let (mut lo, mut hi) = (0.0_f64, 1.0_f64);
    for _ in 0..STEPS {
        let mid = 0.5 * (lo + hi);
        if slope(mid) > 0.0 {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

#[cfg(test)]
mod tests {
    use super::stacking_weight;

    /// Two densities with disjoint supports, a fraction `q` of the rows in the first's: the
    /// likelihood of the weight is then `w^{nq} (1 − w)^{n(1−q)}`, maximised at `w = q`, the
    /// mixing weight's maximum-likelihood estimate with known components (Bishop 2006,
    /// "Pattern Recognition and Machine Learning", eq. 9.22, responsibilities 0 or 1).
    #[test]
    fn separated_densities_give_the_share_of_rows() {
        let n = 10;
        for k in 1..n {
            let first: Vec<f64> = (0..n).map(|r| if r < k { 0.0 } else { -800.0 }).collect();
            let second: Vec<f64> = (0..n).map(|r| if r < k { -800.0 } else { 0.0 }).collect();
            let w = stacking_weight(&first, &second);
            assert!((w - k as f64 / n as f64).abs() < 1e-12, "k = {k}: w = {w}");
        }
    }

    /// A closed form with overlapping densities: two kinds of rows, with density ratios
    /// `p/q = a` (a share `s` of the rows) and `b`. Setting the derivative
    /// `s (a − 1)/(w(a − 1) + 1) + (1 − s)(b − 1)/(w(b − 1) + 1)` to zero gives
    /// `w = −(s/(b − 1) + (1 − s)/(a − 1))` (solved by hand here: common practice, no source).
    #[test]
    fn two_kinds_of_rows_match_the_closed_form() {
        let (a, b) = (4.0_f64, 0.25_f64);
        // Three rows of the first kind, one of the second: s = 3/4.
        let first = [a.ln(), a.ln(), a.ln(), b.ln()];
        let second = [0.0; 4];
        let s = 0.75;
        let want = -(s / (b - 1.0) + (1.0 - s) / (a - 1.0));
        assert!((0.0..1.0).contains(&want), "{want}");
        let w = stacking_weight(&first, &second);
        assert!((w - want).abs() < 1e-12, "{w} against {want}");
        // Swapping the densities swaps the weight.
        let back = stacking_weight(&second, &first);
        assert!((back - (1.0 - want)).abs() < 1e-12, "{back}");
    }

    #[test]
    fn one_sided_rows_give_an_endpoint_and_large_logs_do_not_overflow() {
        assert_eq!(stacking_weight(&[1e4, 2e4], &[0.0, 0.0]), 1.0);
        assert_eq!(stacking_weight(&[-1e4, 0.0], &[0.0, 1e-9]), 0.0);
        assert_eq!(stacking_weight(&[], &[]), 1.0);
        assert_eq!(stacking_weight(&[f64::NAN], &[0.0]), 1.0);
        assert_eq!(
            stacking_weight(&[f64::NEG_INFINITY], &[f64::NEG_INFINITY]),
            1.0
        );
    }

    /// A row one density gives no mass is a row of the other's support: with one such row
    /// each way, the share of rows (Bishop 2006, eq. 9.22) is ½.
    #[test]
    fn rows_without_mass_count_against_their_density() {
        let ninf = f64::NEG_INFINITY;
        let w = stacking_weight(&[ninf, 0.0], &[0.0, ninf]);
        assert!((w - 0.5).abs() < 1e-12, "{w}");
        assert_eq!(stacking_weight(&[ninf, 0.0], &[0.0, 0.0]), 0.0);
        assert_eq!(stacking_weight(&[0.0, 0.0], &[0.0, ninf]), 1.0);
    }
}
