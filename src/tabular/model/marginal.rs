//! The Gaussian log-density of the observed cells of rows with missing cells, as one candle
//! operation with a hand-written backward pass.
//!
//! With precision factor `P` (so `Σ = (PᵀP)⁻¹`) and residual `r = y − m`, row `i` with
//! observed cells `o` costs `½ r_oᵀ S⁻¹ r_o + ½ log|S| + (|o|/2) log 2π` with `S = Σ_oo`: the
//! marginal of a Gaussian over a subset of its coordinates is the Gaussian with the
//! sub-covariance (Bishop, *Pattern Recognition and Machine Learning*, 2006, §2.3.2).
//! Gradients: `∂/∂r_o = S⁻¹ r_o`; `∂/∂S = ½ (S⁻¹ − S⁻¹ r_o r_oᵀ S⁻¹)` (Petersen & Pedersen,
//! *The Matrix Cookbook*, 2012, eqs. 57 and 61), embedded in a `D × D` matrix `G`; and
//! through `Σ = (PᵀP)⁻¹`, `∂/∂P = −2 P⁻ᵀ G Σ` (from `dΣ = −Σ d(PᵀP) Σ`).

use candle_core::{bail, CpuStorage, CustomOp2, Layout, Result, Shape, Tensor};

use crate::util::linalg::{block_inverse, lower_triangular_inverse};

/// Per-row cost of the observed cells, `(n)`, for `factor` `P` `(D, D)`, `residual`
/// `(n, D)` and `observed` (row-major `n × D`, `true` for an observed cell). A row with no
/// observed cell costs 0.
pub(crate) fn masked_gaussian_nll(
    factor: &Tensor,
    residual: &Tensor,
    observed: Vec<bool>,
) -> Result<Tensor> {
    factor
        .contiguous()?
        .apply_op2(&residual.contiguous()?, MaskedNll { observed })
}

struct MaskedNll {
    observed: Vec<bool>,
}

fn to_f64(s: &CpuStorage, l: &Layout) -> Result<Vec<f64>> {
    let Some((a, b)) = l.contiguous_offsets() else {
        bail!("masked Gaussian: non-contiguous input")
    };
    Ok(match s {
        CpuStorage::F32(v) => v[a..b].iter().map(|&x| f64::from(x)).collect(),
        CpuStorage::F64(v) => v[a..b].to_vec(),
        _ => bail!("masked Gaussian: f32 or f64 only"),
    })
}

/// `Σ = P⁻¹ P⁻ᵀ` and `P⁻¹` from a lower-triangular precision factor `P` (`d × d`).
pub(super) fn covariance(p: &[f64], d: usize) -> Result<(Vec<f64>, Vec<f64>)> {
    let Some(pinv) = lower_triangular_inverse(p, d) else {
        bail!("masked Gaussian: the precision factor is singular")
    };
    let mut cov = vec![0.0; d * d];
    for i in 0..d {
        for j in 0..d {
            cov[i * d + j] = (0..d).map(|k| pinv[i * d + k] * pinv[j * d + k]).sum();
        }
    }
    Ok((cov, pinv))
}

/// One row's terms: the observed indices, `S⁻¹` over them, `S⁻¹ r_o` and the cost.
struct RowTerms {
    observed: Vec<usize>,
    s_inv: Vec<f64>,
    a: Vec<f64>,
    cost: f64,
}

/// For one row: the observed indices, `S⁻¹` over them, `S⁻¹ r_o` and the cost.
fn row_terms(cov: &[f64], d: usize, r: &[f64], obs: &[bool]) -> Result<RowTerms> {
    let o: Vec<usize> = (0..d).filter(|&j| obs[j]).collect();
    let k = o.len();
    if k == 0 {
        return Ok(RowTerms {
            observed: o,
            s_inv: Vec::new(),
            a: Vec::new(),
            cost: 0.0,
        });
    }
    let Some((sinv, l)) = block_inverse(cov, d, &o) else {
        bail!("masked Gaussian: the observed cells' covariance is not positive definite")
    };
    let ro: Vec<f64> = o.iter().map(|&j| r[j]).collect();
    let a: Vec<f64> = (0..k)
        .map(|x| (0..k).map(|y| sinv[x * k + y] * ro[y]).sum())
        .collect();
    let quad: f64 = ro.iter().zip(&a).map(|(x, y)| x * y).sum();
    let logdet = crate::util::linalg::log_det_from_cholesky(&l, k);
    let cost = 0.5 * quad + 0.5 * logdet + 0.5 * k as f64 * (2.0 * std::f64::consts::PI).ln();
    Ok(RowTerms {
        observed: o,
        s_inv: sinv,
        a,
        cost,
    })
}

fn storage(v: Vec<f64>, like: &CpuStorage) -> CpuStorage {
    match like {
        CpuStorage::F32(_) => CpuStorage::F32(v.into_iter().map(|x| x as f32).collect()),
        _ => CpuStorage::F64(v),
    }
}

impl CustomOp2 for MaskedNll {
    fn name(&self) -> &'static str {
        "masked-gaussian-nll"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
    ) -> Result<(CpuStorage, Shape)> {
        let (d, d2) = l1.shape().dims2()?;
        let (n, dr) = l2.shape().dims2()?;
        if d != d2 || d != dr || self.observed.len() != n * d {
            bail!("masked Gaussian: shapes {:?} {:?}", l1.shape(), l2.shape())
        }
        let p = to_f64(s1, l1)?;
        let r = to_f64(s2, l2)?;
        let (cov, _) = covariance(&p, d)?;
        let mut out = Vec::with_capacity(n);
        for i in 0..n {
            let t = row_terms(
                &cov,
                d,
                &r[i * d..(i + 1) * d],
                &self.observed[i * d..(i + 1) * d],
            )?;
            out.push(t.cost);
        }
        Ok((storage(out, s2), Shape::from(n)))
    }

    fn bwd(
        &self,
        factor: &Tensor,
        residual: &Tensor,
        _res: &Tensor,
        grad: &Tensor,
    ) -> Result<(Option<Tensor>, Option<Tensor>)> {
        let dtype = residual.dtype();
        let (n, d) = residual.dims2()?;
        let host = |t: &Tensor| -> Result<Vec<f64>> {
            t.to_dtype(candle_core::DType::F64)?
                .flatten_all()?
                .to_vec1::<f64>()
        };
        let p = host(factor)?;
        let r = host(residual)?;
        let g = host(grad)?;
        let (cov, pinv) = covariance(&p, d)?;
        let mut dr = vec![0.0; n * d];
        let mut gs = vec![0.0; d * d];
        for i in 0..n {
            let RowTerms {
                observed: o,
                s_inv: sinv,
                a,
                ..
            } = row_terms(
                &cov,
                d,
                &r[i * d..(i + 1) * d],
                &self.observed[i * d..(i + 1) * d],
            )?;
            let k = o.len();
            for (x, &ix) in o.iter().enumerate() {
                dr[i * d + ix] = g[i] * a[x];
                for (y, &iy) in o.iter().enumerate() {
                    gs[ix * d + iy] += g[i] * 0.5 * (sinv[x * k + y] - a[x] * a[y]);
                }
            }
        }
        // ∂/∂P = −2 P⁻ᵀ G Σ.
        let mut t = vec![0.0; d * d]; // G Σ
        for i in 0..d {
            for j in 0..d {
                t[i * d + j] = (0..d).map(|k| gs[i * d + k] * cov[k * d + j]).sum();
            }
        }
        let mut dp = vec![0.0; d * d];
        for i in 0..d {
            for j in 0..d {
                dp[i * d + j] = -2.0 * (0..d).map(|k| pinv[k * d + i] * t[k * d + j]).sum::<f64>();
            }
        }
        let dev = residual.device();
        Ok((
            Some(Tensor::from_vec(dp, (d, d), dev)?.to_dtype(dtype)?),
            Some(Tensor::from_vec(dr, (n, d), dev)?.to_dtype(dtype)?),
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::{Device, Var};

    fn factor() -> Vec<f64> {
        // A lower-triangular precision factor with a positive diagonal (arbitrary values).
        vec![1.3, 0.0, 0.0, -0.4, 0.8, 0.0, 0.2, 0.5, 1.1]
    }

    /// With every cell observed the op equals `½|P r|² − Σ log P_jj + (D/2) log 2π`, the
    /// full-covariance Gaussian (closed form; Bishop 2006, eq. 2.43).
    #[test]
    fn complete_rows_match_the_full_gaussian() {
        let dev = Device::Cpu;
        let p = factor();
        let r = [0.3, -1.2, 0.7, 1.5, 0.1, -0.4];
        let pt = Tensor::from_vec(p.clone(), (3, 3), &dev).unwrap();
        let rt = Tensor::from_vec(r.to_vec(), (2, 3), &dev).unwrap();
        let got = masked_gaussian_nll(&pt, &rt, vec![true; 6])
            .unwrap()
            .to_vec1::<f64>()
            .unwrap();
        for i in 0..2 {
            let e: Vec<f64> = (0..3)
                .map(|a| (0..3).map(|b| p[a * 3 + b] * r[i * 3 + b]).sum())
                .collect();
            let want = 0.5 * e.iter().map(|x| x * x).sum::<f64>()
                - (0..3).map(|j| p[j * 3 + j].ln()).sum::<f64>()
                + 1.5 * (2.0 * std::f64::consts::PI).ln();
            assert!((got[i] - want).abs() < 1e-12, "{} vs {want}", got[i]);
        }
    }

    /// The hand-written backward pass against central finite differences (common practice,
    /// no source).
    #[test]
    fn backward_matches_finite_differences() {
        let dev = Device::Cpu;
        let p0 = factor();
        let r0 = vec![0.3, -1.2, 0.7, 1.5, 0.1, -0.4, 0.9, 0.2, -0.8];
        let obs = vec![true, false, true, true, true, false, false, false, true];
        let w = [0.7, -1.3, 2.0];
        let loss = |p: &[f64], r: &[f64]| -> f64 {
            let pt = Tensor::from_vec(p.to_vec(), (3, 3), &dev).unwrap();
            let rt = Tensor::from_vec(r.to_vec(), (3, 3), &dev).unwrap();
            let v = masked_gaussian_nll(&pt, &rt, obs.clone())
                .unwrap()
                .to_vec1::<f64>()
                .unwrap();
            v.iter().zip(&w).map(|(a, b)| a * b).sum()
        };
        let pv = Var::from_vec(p0.clone(), (3, 3), &dev).unwrap();
        let rv = Var::from_vec(r0.clone(), (3, 3), &dev).unwrap();
        let wt = Tensor::from_vec(w.to_vec(), 3, &dev).unwrap();
        let out = masked_gaussian_nll(pv.as_tensor(), rv.as_tensor(), obs.clone()).unwrap();
        let grads = (out * wt).unwrap().sum_all().unwrap().backward().unwrap();
        let gp = grads
            .get(&pv)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1::<f64>()
            .unwrap();
        let gr = grads
            .get(&rv)
            .unwrap()
            .flatten_all()
            .unwrap()
            .to_vec1::<f64>()
            .unwrap();
        let h = 1e-6;
        for k in 0..9 {
            if k % 3 > k / 3 {
                continue; // upper part of P: not used by a lower-triangular factor
            }
            let (mut a, mut b) = (p0.clone(), p0.clone());
            a[k] += h;
            b[k] -= h;
            let fd = (loss(&a, &r0) - loss(&b, &r0)) / (2.0 * h);
            assert!(
                (gp[k] - fd).abs() < 1e-6 * fd.abs().max(1.0),
                "dP[{k}] {} vs {fd}",
                gp[k]
            );
        }
        for k in 0..9 {
            let (mut a, mut b) = (r0.clone(), r0.clone());
            a[k] += h;
            b[k] -= h;
            let fd = (loss(&p0, &a) - loss(&p0, &b)) / (2.0 * h);
            assert!(
                (gr[k] - fd).abs() < 1e-6 * fd.abs().max(1.0),
                "dr[{k}] {} vs {fd}",
                gr[k]
            );
        }
    }
}
