//! The whole Euler–Maruyama path of a block of rows through the fused networks: forward with
//! a tape of what the backward pass needs, and the hand-written backward pass.

use super::gemm::{matmul, Op};
use super::net::{self, NetShape, NetTape, Offsets};
use super::real::Real;

/// What the kernel integrates: `dX = (b + u)(X, t) dt + σ dW`, `b` and `u` built-in networks.
#[derive(Debug, Clone)]
pub(crate) struct PathSpec {
    pub prior: Option<NetShape>,
    pub control: Option<NetShape>,
    /// The control's linear feedback term, when it has one.
    pub feedback: Option<FeedbackOffsets>,
    pub d: usize,
    pub n_steps: usize,
    pub h: f64,
    /// σ per dimension.
    pub sigma: Vec<f64>,
    /// Length of the packed parameter vector.
    pub n_params: usize,
}

/// Where the feedback term `G_k ⊙ (C − x A)` sits in the packed vector: `C` `(batch, d)`,
/// `A` `(d, d)`, `G` `(N, d)`, each row-major.
#[derive(Debug, Clone)]
pub(crate) struct FeedbackOffsets {
    pub c: usize,
    pub a: usize,
    pub g: usize,
}

impl PathSpec {
    fn times<T: Real>(&self) -> Vec<T> {
        (0..self.n_steps)
            .map(|k| T::from_f64(k as f64 * self.h))
            .collect()
    }

    /// σ and 1/σ per dimension.
    fn sigmas<T: Real>(&self) -> (Vec<T>, Vec<T>) {
        let of = |f: fn(f64) -> f64| self.sigma.iter().map(|&s| T::from_f64(f(s))).collect();
        (of(|s| s), of(|s| 1.0 / s))
    }
}

/// Saved state of one block for the backward pass.
pub(crate) struct BlockTape<T> {
    /// States `x_0 … x_{N−1}`, `(N·rows, d)`.
    xs: Vec<T>,
    /// Controls `u_k`, `(N·rows, d)`.
    us: Vec<T>,
    /// Feedback residuals `e_k = C − x_k A`, `(N·rows, d)`, when there is feedback.
    es: Vec<T>,
    prior: Option<NetTape<T>>,
    control: Option<NetTape<T>>,
}

/// The inputs of one block: rows `r0 .. r0 + rows` of the batch.
pub(crate) struct Block<'a, T> {
    pub theta: &'a [T],
    pub x0: &'a [T],
    /// The context rows `(rows, c)`, when the control takes one.
    pub ctx: Option<&'a [T]>,
    /// All the noise, `(N, batch, d)`.
    pub noise: &'a [T],
    pub batch: usize,
    pub r0: usize,
    pub rows: usize,
}

impl<T: Real> Block<'_, T> {
    fn dw(&self, spec: &PathSpec, k: usize) -> &[T] {
        let d = spec.d;
        let start = (k * self.batch + self.r0) * d;
        &self.noise[start..start + self.rows * d]
    }
}

/// Forward pass of a block: writes `[x_N, control cost, Σ_k v_k·ΔW_k]` per row into `out`
/// `(rows, d + 2)`; returns the tape when `keep` (for a backward pass).
pub(crate) fn forward<T: Real>(
    spec: &PathSpec,
    blk: &Block<'_, T>,
    keep: bool,
    out: &mut [T],
) -> Option<BlockTape<T>> {
    let (d, rows, n) = (spec.d, blk.rows, spec.n_steps);
    let slots = if keep { n } else { 1 };
    let offs = |s: &Option<NetShape>| s.as_ref().map(NetShape::offsets);
    let (po, co) = (offs(&spec.prior), offs(&spec.control));
    let mut prior_tape = spec.prior.as_ref().map(|s| NetTape::new(s, slots, rows));
    let mut control_tape = spec.control.as_ref().map(|s| NetTape::new(s, slots, rows));
    let pool = T::pool();
    let mut xs = if keep {
        pool.take(n * rows * d)
    } else {
        Vec::new()
    };
    let mut us = if keep && spec.control.is_some() {
        pool.take(n * rows * d)
    } else {
        Vec::new()
    };
    let fb = spec.feedback.as_ref().filter(|_| spec.control.is_some());
    let mut es = if keep && fb.is_some() {
        pool.take(n * rows * d)
    } else {
        Vec::new()
    };
    let mut e = vec![T::ZERO; if fb.is_some() { rows * d } else { 0 }];
    let (sigma, inv_sigma) = spec.sigmas::<T>();
    let times = spec.times::<T>();
    let h = T::from_f64(spec.h);
    let mut x = blk.x0.to_vec();
    let mut b = vec![T::ZERO; rows * d];
    let mut u = vec![T::ZERO; rows * d];
    let mut cost = vec![T::ZERO; rows];
    let mut stoch = vec![T::ZERO; rows];
    for (k, &t) in times.iter().enumerate() {
        let slot = if keep { k } else { 0 };
        if keep {
            xs[k * rows * d..(k + 1) * rows * d].copy_from_slice(&x);
        }
        if let (Some(s), Some(o), Some(tp)) = (&spec.prior, &po, &mut prior_tape) {
            let (mut st, _) = tp.split(slot, rows, s);
            net::forward(s, o, blk.theta, &x, None, t, rows, &mut st, &mut b);
        }
        if let (Some(s), Some(o), Some(tp)) = (&spec.control, &co, &mut control_tape) {
            let (mut st, _) = tp.split(slot, rows, s);
            net::forward(s, o, blk.theta, &x, blk.ctx, t, rows, &mut st, &mut u);
            if let Some(f) = fb {
                feedback_forward(f, blk, d, k, &x, &mut e, &mut u);
                if keep {
                    es[k * rows * d..(k + 1) * rows * d].copy_from_slice(&e);
                }
            }
            if keep {
                us[k * rows * d..(k + 1) * rows * d].copy_from_slice(&u);
            }
        }
        let drift = StepDrift {
            prior: spec.prior.is_some().then_some(&b[..]),
            control: spec.control.is_some().then_some(&u[..]),
        };
        euler_step(
            &mut x,
            drift,
            blk.dw(spec, k),
            (&sigma, &inv_sigma),
            h,
            (&mut cost, &mut stoch),
        );
    }
    let half_h = T::from_f64(0.5 * spec.h);
    for r in 0..rows {
        let o = &mut out[r * (d + 2)..(r + 1) * (d + 2)];
        o[..d].copy_from_slice(&x[r * d..(r + 1) * d]);
        o[d] = half_h * cost[r];
        o[d + 1] = stoch[r];
    }
    let tape = BlockTape {
        xs,
        us,
        es,
        prior: prior_tape,
        control: control_tape,
    };
    if keep {
        Some(tape)
    } else {
        tape.release();
        None
    }
}

/// The feedback term of step `k`: `e = C − x A` (into `e`) and `u += G_k ⊙ e`.
fn feedback_forward<T: Real>(
    f: &FeedbackOffsets,
    blk: &Block<'_, T>,
    d: usize,
    k: usize,
    x: &[T],
    e: &mut [T],
    u: &mut [T],
) {
    let rows = blk.rows;
    matmul(e, x, Op::N, &blk.theta[f.a..], Op::N, (rows, d, d), false);
    let c = &blk.theta[f.c + blk.r0 * d..f.c + (blk.r0 + rows) * d];
    let g = &blk.theta[f.g + k * d..f.g + (k + 1) * d];
    for ((e, u), c) in e
        .chunks_exact_mut(d)
        .zip(u.chunks_exact_mut(d))
        .zip(c.chunks_exact(d))
    {
        for (((e, u), &c), &g) in e.iter_mut().zip(u).zip(c).zip(g) {
            *e = c - *e;
            *u += g * *e;
        }
    }
}

/// The drift parts of one step, `(rows, d)` each, when present.
#[derive(Clone, Copy)]
struct StepDrift<'a, T> {
    prior: Option<&'a [T]>,
    control: Option<&'a [T]>,
}

/// `x += h (b + u) + σ ΔW`, with `v = u/σ` adding `|v|²` to `cost` and `v·ΔW` to `stoch`
/// per row.
fn euler_step<T: Real>(
    x: &mut [T],
    drift: StepDrift<'_, T>,
    dw: &[T],
    (sigma, inv_sigma): (&[T], &[T]),
    h: T,
    (cost, stoch): (&mut [T], &mut [T]),
) {
    let d = sigma.len();
    for (r, (x, dw)) in x.chunks_exact_mut(d).zip(dw.chunks_exact(d)).enumerate() {
        let span = r * d..(r + 1) * d;
        let (mut c2, mut s1) = (T::ZERO, T::ZERO);
        for j in 0..d {
            let mut f = T::ZERO;
            if let Some(b) = drift.prior {
                f += b[span.start + j];
            }
            if let Some(u) = drift.control {
                let u = u[span.start + j];
                let v = u * inv_sigma[j];
                c2 += v * v;
                s1 += v * dw[j];
                f += u;
            }
            x[j] += h * f + sigma[j] * dw[j];
        }
        cost[r] += c2;
        stoch[r] += s1;
    }
}

impl<T: Real> BlockTape<T> {
    /// Hands the buffers back to the pool.
    fn release(self) {
        let pool = T::pool();
        pool.give(self.xs);
        pool.give(self.us);
        pool.give(self.es);
        for t in [self.prior, self.control].into_iter().flatten() {
            t.release();
        }
    }
}

/// Gradients of one block.
pub(crate) struct BlockGrads<T> {
    /// Packed parameter gradient (length `n_params`).
    pub theta: Vec<T>,
    /// Gradient for `x_0`, `(rows, d)`.
    pub x0: Vec<T>,
    /// Gradient for the context rows, `(rows, c)`, when asked for.
    pub ctx: Option<Vec<T>>,
}

/// Backward pass of a block from the output gradient `g` `(rows, d + 2)`.
pub(crate) fn backward<T: Real>(
    spec: &PathSpec,
    blk: &Block<'_, T>,
    mut tape: BlockTape<T>,
    g: &[T],
    want_ctx: bool,
) -> BlockGrads<T> {
    let (d, rows, n) = (spec.d, blk.rows, spec.n_steps);
    let offs = |s: &Option<NetShape>| s.as_ref().map(NetShape::offsets);
    let (po, co): (Option<Offsets>, Option<Offsets>) = (offs(&spec.prior), offs(&spec.control));
    let (_, inv_sigma) = spec.sigmas::<T>();
    let h = T::from_f64(spec.h);
    let mut lambda = vec![T::ZERO; rows * d];
    let mut g_cost = vec![T::ZERO; rows];
    let mut g_stoch = vec![T::ZERO; rows];
    for r in 0..rows {
        let gr = &g[r * (d + 2)..(r + 1) * (d + 2)];
        lambda[r * d..(r + 1) * d].copy_from_slice(&gr[..d]);
        g_cost[r] = gr[d];
        g_stoch[r] = gr[d + 1];
    }
    let c = spec.control.as_ref().map_or(0, |s| s.c);
    let mut g_ctx = (want_ctx && c > 0 && blk.ctx.is_some()).then(|| vec![T::ZERO; rows * c]);
    let w_max = [&spec.prior, &spec.control]
        .iter()
        .filter_map(|s| s.as_ref().map(|s| s.w))
        .max()
        .unwrap_or(0);
    let mut scratch = vec![T::ZERO; rows * w_max];
    let times = spec.times::<T>();
    let mut grad = vec![T::ZERO; spec.n_params];
    let mut delta1_sum = match (&spec.control, blk.ctx) {
        (Some(s), Some(_)) if s.c > 0 => vec![T::ZERO; rows * s.w],
        _ => Vec::new(),
    };
    let fb = spec.feedback.as_ref().filter(|_| spec.control.is_some());
    let mut neg_gg = vec![T::ZERO; if fb.is_some() { rows * d } else { 0 }];
    for k in (0..n).rev() {
        let dw = blk.dw(spec, k);
        let span = k * rows * d..(k + 1) * rows * d;
        // Output gradients of both networks from λ_{k+1}, before λ moves to step k.
        if let Some(tp) = &mut tape.control {
            let gu = &mut tp.g_out[span.clone()];
            let u = &tape.us[span.clone()];
            let per_row = gu
                .chunks_exact_mut(d)
                .zip(u.chunks_exact(d))
                .zip(lambda.chunks_exact(d).zip(dw.chunks_exact(d)));
            for (r, ((gu, u), (l, w))) in per_row.enumerate() {
                // d cost/d v = h v (cost = ½ h Σ v²); d stoch/d v = ΔW.
                let (gc, gs) = (g_cost[r] * h, g_stoch[r]);
                let it = u.iter().zip(l).zip(w).zip(&inv_sigma);
                for (g, (((&u, &l), &w), &is)) in gu.iter_mut().zip(it) {
                    let v = u * is;
                    *g = h * l + (gc * v + gs * w) * is;
                }
            }
        }
        if let Some(tp) = &mut tape.prior {
            for (gb, &l) in tp.g_out[span.clone()].iter_mut().zip(&lambda) {
                *gb = h * l;
            }
        }
        if let (Some(f), Some(tp)) = (fb, &tape.control) {
            // Through u = … + G_k ⊙ (C − x A): gradients for C, G_k, A and x.
            let gu = &tp.g_out[span.clone()];
            let e = &tape.es[span.clone()];
            let g = &blk.theta[f.g + k * d..f.g + (k + 1) * d];
            let x = &tape.xs[span.clone()];
            for r in 0..rows {
                for j in 0..d {
                    let i = r * d + j;
                    let gg = gu[i] * g[j];
                    grad[f.c + (blk.r0 + r) * d + j] += gg;
                    grad[f.g + k * d + j] += gu[i] * e[i];
                    neg_gg[i] = T::ZERO - gg;
                }
            }
            matmul(
                &mut grad[f.a..f.a + d * d],
                x,
                Op::T,
                &neg_gg,
                Op::N,
                (d, d, rows),
                true,
            );
            matmul(
                &mut lambda,
                &neg_gg,
                Op::N,
                &blk.theta[f.a..],
                Op::T,
                (rows, d, d),
                true,
            );
        }
        let x_k = &tape.xs[span.clone()];
        if let (Some(s), Some(o), Some(tp)) = (&spec.control, &co, &mut tape.control) {
            let out = net::StepOutputs {
                gx: &mut lambda,
                gctx: g_ctx.as_deref_mut(),
                grad: &mut grad,
                delta1_sum: (!delta1_sum.is_empty()).then_some(&mut delta1_sum[..]),
            };
            let (x, t) = (x_k, times[k]);
            net::step_backward(s, o, blk.theta, tp, (k, rows), (x, t), &mut scratch, out);
        }
        if let (Some(s), Some(o), Some(tp)) = (&spec.prior, &po, &mut tape.prior) {
            let out = net::StepOutputs {
                gx: &mut lambda,
                gctx: None,
                grad: &mut grad,
                delta1_sum: None,
            };
            let (x, t) = (x_k, times[k]);
            net::step_backward(s, o, blk.theta, tp, (k, rows), (x, t), &mut scratch, out);
        }
    }
    if let (Some(s), Some(o), Some(ctx)) = (&spec.control, &co, blk.ctx) {
        if !delta1_sum.is_empty() {
            let (w, c) = (s.w, s.c);
            matmul(
                &mut grad[o.wc..o.wc + w * c],
                &delta1_sum,
                Op::T,
                ctx,
                Op::N,
                (w, c, rows),
                true,
            );
        }
    }
    tape.release();
    BlockGrads {
        theta: grad,
        x0: lambda,
        ctx: g_ctx,
    }
}
