//! One step of each scheme, with the running control-cost and Girsanov sums.

use candle_core::Tensor;

use super::system::{Paths, Sde};
use crate::error::{Error, Result};
use crate::sde::diffusion::Diffusion;

/// Running state of a batch of paths.
pub(super) struct State {
    x: Tensor,
    path: Option<Vec<Tensor>>,
    /// Σ_k (stage-weighted) |u_k/σ|², elementwise (batch, d); reduced once at the end.
    cost: Option<Tensor>,
    /// Σ_k (u_k/σ) ∘ ΔW_k, elementwise (batch, d).
    stoch: Option<Tensor>,
}

fn accumulate(acc: &mut Option<Tensor>, term: Tensor) -> Result<()> {
    *acc = Some(match acc.take() {
        Some(a) => (a + term)?,
        None => term,
    });
    Ok(())
}

impl State {
    pub(super) fn new(x0: Tensor, keep_path: bool) -> Self {
        let path = keep_path.then(|| vec![x0.clone()]);
        Self {
            x: x0,
            path,
            cost: None,
            stoch: None,
        }
    }

    fn advance(&mut self, x: Tensor) {
        if let Some(p) = &mut self.path {
            p.push(x.clone());
        }
        self.x = x;
    }

    pub(super) fn finish(self, batch: usize, h: f64) -> Result<Paths> {
        let zeros = || Tensor::zeros(batch, self.x.dtype(), self.x.device());
        let control_cost = match &self.cost {
            Some(c) => c.sum(1)?.affine(0.5 * h, 0.0)?,
            None => zeros()?,
        };
        let log_weight = match &self.stoch {
            Some(s) => (s.sum(1)? + &control_cost)?.neg()?,
            None => zeros()?,
        };
        Ok(Paths {
            end: self.x,
            path: self.path,
            control_cost,
            log_weight,
        })
    }
}

/// Evaluates `b + u` at `(x, t)`; returns the drift and `u/σ` (when there is a control).
fn drift_at(
    sde: &Sde<'_>,
    sigma: &Diffusion,
    x: &Tensor,
    t: f64,
    context: Option<&Tensor>,
) -> Result<(Option<Tensor>, Option<Tensor>)> {
    let check = |name: &str, out: Tensor| -> Result<Tensor> {
        if out.dims() != x.dims() {
            return Err(Error::shape(
                format!("{name} output at t = {t}"),
                x.dims(),
                out.dims(),
            ));
        }
        Ok(out)
    };
    let b = match sde.prior() {
        Some(p) => Some(check("prior drift", p.forward(x, t, None)?)?),
        None => None,
    };
    let (u, v) = match sde.control() {
        Some(c) => {
            let u = check("control", c.forward(x, t, context)?)?;
            let v = sigma.unscale(&u)?;
            (Some(u), Some(v))
        }
        None => (None, None),
    };
    let f = match (b, u) {
        (Some(b), Some(u)) => Some((b + u)?),
        (Some(b), None) => Some(b),
        (None, Some(u)) => Some(u),
        (None, None) => None,
    };
    Ok((f, v))
}

/// `X_{k+1} = X_k + h f(X_k, t_k) + σ ΔW_k`.
pub(super) fn euler_maruyama(
    st: &mut State,
    sde: &Sde<'_>,
    sigma: &Diffusion,
    t: f64,
    h: f64,
    dw: &Tensor,
    context: Option<&Tensor>,
) -> Result<()> {
    let (f, v) = drift_at(sde, sigma, &st.x, t, context)?;
    if let Some(v) = v {
        accumulate(&mut st.cost, v.sqr()?)?;
        accumulate(&mut st.stoch, (v * dw)?)?;
    }
    let mut x = (&st.x + sigma.scale(dw)?)?;
    if let Some(f) = f {
        x = (x + f.affine(h, 0.0)?)?;
    }
    st.advance(x);
    Ok(())
}

/// One SRA1 step for constant σ (Rößler 2010, SIAM J. Numer. Anal. 48(3), scheme SRA1;
/// coefficients c⁰ = (0, ¾), A⁰₂₁ = ¾, B⁰₂₁ = 3/2, α = (⅓, ⅔), β⁽¹⁾ = (1, 0), β⁽²⁾ = (−1, 1),
/// c⁽¹⁾ = (1, 0), quoted from memory and checked against the order-1.5 conditions):
/// `H = X + ¾ h f(X, t) + (3/2) σ ΔZ/h`,
/// `X' = X + h (⅓ f(X, t) + ⅔ f(H, t + ¾h)) + σ ΔW`.
/// With σ independent of time the β⁽²⁾ terms cancel.
#[allow(clippy::too_many_arguments)]
pub(super) fn sra1(
    st: &mut State,
    sde: &Sde<'_>,
    sigma: &Diffusion,
    t: f64,
    h: f64,
    dw: &Tensor,
    dz: &Tensor,
    context: Option<&Tensor>,
) -> Result<()> {
    let (f1, v1) = drift_at(sde, sigma, &st.x, t, context)?;
    let mut stage = (&st.x + sigma.scale(dz)?.affine(1.5 / h, 0.0)?)?;
    if let Some(f1) = &f1 {
        stage = (stage + f1.affine(0.75 * h, 0.0)?)?;
    }
    let (f2, v2) = drift_at(sde, sigma, &stage, t + 0.75 * h, context)?;
    if let (Some(v1), Some(v2)) = (&v1, &v2) {
        let c = (v1.sqr()?.affine(1.0 / 3.0, 0.0)? + v2.sqr()?.affine(2.0 / 3.0, 0.0)?)?;
        accumulate(&mut st.cost, c)?;
        accumulate(&mut st.stoch, (v1 * dw)?)?;
    }
    let mut x = (&st.x + sigma.scale(dw)?)?;
    if let (Some(f1), Some(f2)) = (f1, f2) {
        let f = (f1.affine(h / 3.0, 0.0)? + f2.affine(2.0 * h / 3.0, 0.0)?)?;
        x = (x + f)?;
    }
    st.advance(x);
    Ok(())
}
