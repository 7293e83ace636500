//! One built-in network ([`crate::TimeMlp`]) inside the fused kernel: its parameter layout in
//! the packed parameter vector, its forward pass on a block of rows, and the pieces of its
//! backward pass.

use super::gemm::{add_column_sums, fill_rows, matmul, Op};
use super::real::{activate, mul_in_place, Real};
use crate::nn::ops::Activation;

/// Shape of a network and where its parameters sit in the packed vector.
///
/// Packed order (each tensor row-major, weights `(out, in)`): first-layer weight `(w, d)`,
/// context weight `(w, c)` (when `c > 0`), first-layer bias `(w)`, time weight `(w)`, then per
/// further hidden layer its weight `(w, w)` and bias `(w)`, then the output weight `(d, w)`
/// and bias `(d)`.
#[derive(Debug, Clone)]
pub(crate) struct NetShape {
    pub d: usize,
    pub c: usize,
    pub w: usize,
    /// Number of hidden layers (≥ 1).
    pub depth: usize,
    pub act: Activation,
    /// Offset of the first parameter in the packed vector.
    pub offset: usize,
}

/// Offsets of each parameter tensor, relative to the packed vector's start.
#[derive(Debug, Clone)]
pub(crate) struct Offsets {
    pub w1: usize,
    pub wc: usize,
    pub b1: usize,
    pub wt: usize,
    /// `(weight, bias)` of hidden layers 2..=depth.
    pub hidden: Vec<(usize, usize)>,
    pub wo: usize,
    pub bo: usize,
    pub end: usize,
}

impl NetShape {
    pub fn offsets(&self) -> Offsets {
        let (d, c, w) = (self.d, self.c, self.w);
        let mut at = self.offset;
        let mut take = |n: usize| {
            let o = at;
            at += n;
            o
        };
        let w1 = take(w * d);
        let wc = take(w * c);
        let b1 = take(w);
        let wt = take(w);
        let hidden = (1..self.depth).map(|_| (take(w * w), take(w))).collect();
        let wo = take(d * w);
        let bo = take(d);
        Offsets {
            w1,
            wc,
            b1,
            wt,
            hidden,
            wo,
            bo,
            end: at,
        }
    }

    /// Number of parameters.
    pub fn len(&self) -> usize {
        self.offsets().end - self.offset
    }
}

/// Views of one network's saved activations for one solver step on a block of `rows` rows:
/// post-activations `h[l]` and activation derivatives `da[l]`, each `(rows, w)`, and a small
/// work buffer (`w·(d + 1)`) reused by every step.
pub(crate) struct StepTape<'a, T> {
    pub h: Vec<&'a mut [T]>,
    pub da: Vec<&'a mut [T]>,
    pub work: &'a mut [T],
}

/// Forward pass at time `t` on `x` `(rows, d)` (and `ctx` `(rows, c)`), writing the hidden
/// activations into `tape` and the output `(rows, d)` into `out`.
#[allow(clippy::too_many_arguments)]
pub(crate) fn forward<T: Real>(
    net: &NetShape,
    o: &Offsets,
    theta: &[T],
    x: &[T],
    ctx: Option<&[T]>,
    t: T,
    rows: usize,
    tape: &mut StepTape<'_, T>,
    out: &mut [T],
) {
    let (d, c, w) = (net.d, net.c, net.w);
    // First layer: pre-activation = b1 + t w_t + x W1ᵀ + ctx Wcᵀ.
    {
        let h = &mut *tape.h[0];
        let (b1, wt) = (&theta[o.b1..o.b1 + w], &theta[o.wt..o.wt + w]);
        let bias = &mut tape.work[..w];
        for ((a, &b), &tw) in bias.iter_mut().zip(b1).zip(wt) {
            *a = b + t * tw;
        }
        fill_rows(h, bias);
        matmul(h, x, Op::N, &theta[o.w1..], Op::T, (rows, w, d), true);
        if let Some(ctx) = ctx {
            if c > 0 {
                matmul(h, ctx, Op::N, &theta[o.wc..], Op::T, (rows, w, c), true);
            }
        }
        activate(net.act, h, tape.da[0]);
    }
    for (l, &(wl, bl)) in o.hidden.iter().enumerate() {
        let (prev, next) = tape.h.split_at_mut(l + 1);
        let (input, h) = (&*prev[l], &mut *next[0]);
        fill_rows(h, &theta[bl..bl + w]);
        matmul(h, input, Op::N, &theta[wl..], Op::T, (rows, w, w), true);
        activate(net.act, h, tape.da[l + 1]);
    }
    fill_rows(out, &theta[o.bo..o.bo + d]);
    let last = &*tape.h[net.depth - 1];
    matmul(out, last, Op::N, &theta[o.wo..], Op::T, (rows, d, w), true);
}

/// Backward pass of one step: given the output gradient `g` `(rows, d)`, turns the saved
/// derivatives `tape.da[l]` into the pre-activation gradients δ_l (in place), adds the input
/// gradient `δ_1 W1` to `gx` and, when asked, `δ_1 Wc` to `gctx`. `scratch` holds `rows·w`.
#[allow(clippy::too_many_arguments)]
fn backward_step<T: Real>(
    net: &NetShape,
    o: &Offsets,
    theta: &[T],
    g: &[T],
    rows: usize,
    tape: &mut StepTape<'_, T>,
    scratch: &mut [T],
    gx: &mut [T],
    gctx: Option<&mut [T]>,
) {
    let (d, c, w) = (net.d, net.c, net.w);
    let top = net.depth - 1;
    matmul(
        scratch,
        g,
        Op::N,
        &theta[o.wo..],
        Op::N,
        (rows, w, d),
        false,
    );
    mul_in_place(tape.da[top], scratch);
    for l in (1..net.depth).rev() {
        let wl = o.hidden[l - 1].0;
        matmul(
            scratch,
            tape.da[l],
            Op::N,
            &theta[wl..],
            Op::N,
            (rows, w, w),
            false,
        );
        mul_in_place(tape.da[l - 1], scratch);
    }
    let delta1 = &*tape.da[0];
    matmul(gx, delta1, Op::N, &theta[o.w1..], Op::N, (rows, d, w), true);
    if let Some(gctx) = gctx {
        if c > 0 {
            matmul(
                gctx,
                delta1,
                Op::N,
                &theta[o.wc..],
                Op::N,
                (rows, c, w),
                true,
            );
        }
    }
}

/// The whole-path saved buffers of one network on a block, `steps` solver steps of `rows`
/// rows: for each hidden layer, post-activations and derivatives (later δ), each
/// `(steps·rows, w)`, and the output gradients `(steps·rows, d)`.
pub(crate) struct NetTape<T> {
    pub h: Vec<Vec<T>>,
    pub da: Vec<Vec<T>>,
    pub g_out: Vec<T>,
    work: Vec<T>,
}

impl<T: Real> NetTape<T> {
    pub fn new(net: &NetShape, steps: usize, rows: usize) -> Self {
        let n = steps * rows * net.w;
        let pool = T::pool();
        Self {
            h: (0..net.depth).map(|_| pool.take(n)).collect(),
            da: (0..net.depth).map(|_| pool.take(n)).collect(),
            g_out: pool.take(steps * rows * net.d),
            work: vec![T::ZERO; net.w * (net.d + 1)],
        }
    }

    /// Hands the buffers back to the pool.
    pub fn release(self) {
        let pool = T::pool();
        for v in self.h.into_iter().chain(self.da).chain([self.g_out]) {
            pool.give(v);
        }
    }

    /// The views of slot `k`: the hidden activations and the output gradient.
    pub fn split(&mut self, k: usize, rows: usize, net: &NetShape) -> (StepTape<'_, T>, &mut [T]) {
        let r = k * rows * net.w..(k + 1) * rows * net.w;
        let tape = StepTape {
            h: self.h.iter_mut().map(|v| &mut v[r.clone()]).collect(),
            da: self.da.iter_mut().map(|v| &mut v[r.clone()]).collect(),
            work: &mut self.work,
        };
        (
            tape,
            &mut self.g_out[k * rows * net.d..(k + 1) * rows * net.d],
        )
    }
}

/// Adds the parameter gradients of one step to `grad`, from the step's tape after
/// [`backward_step`] (δ in `da`), the output gradient `g`, the input `x` and time `t`;
/// the context weight's gradient is left to the caller (δ_1 summed over steps, in
/// `delta1_sum`).
#[allow(clippy::too_many_arguments)]
fn step_param_grads<T: Real>(
    net: &NetShape,
    o: &Offsets,
    tape: &mut StepTape<'_, T>,
    g: &[T],
    x: &[T],
    t: T,
    rows: usize,
    grad: &mut [T],
    delta1_sum: Option<&mut [T]>,
) {
    let (d, w) = (net.d, net.w);
    let top = net.depth - 1;
    matmul(
        &mut grad[o.wo..o.wo + d * w],
        g,
        Op::T,
        &*tape.h[top],
        Op::N,
        (d, w, rows),
        true,
    );
    add_column_sums(&mut grad[o.bo..o.bo + d], g, d);
    for l in (1..net.depth).rev() {
        let (wl, bl) = o.hidden[l - 1];
        matmul(
            &mut grad[wl..wl + w * w],
            &*tape.da[l],
            Op::T,
            &*tape.h[l - 1],
            Op::N,
            (w, w, rows),
            true,
        );
        add_column_sums(&mut grad[bl..bl + w], &*tape.da[l], w);
    }
    let delta1 = &*tape.da[0];
    // dW1 += δ_1ᵀ x, computed as its transpose xᵀ δ_1 (d, w): the same product, measured
    // three times faster in `gemm` for a narrow d, then added transposed.
    let (dw1_t, col) = tape.work.split_at_mut(d * w);
    matmul(dw1_t, x, Op::T, delta1, Op::N, (d, w, rows), false);
    for (j, row) in dw1_t.chunks_exact(w).enumerate() {
        for (i, &v) in row.iter().enumerate() {
            grad[o.w1 + i * d + j] += v;
        }
    }
    col.fill(T::ZERO);
    add_column_sums(col, delta1, w);
    for (j, &v) in col.iter().enumerate() {
        grad[o.b1 + j] += v;
        grad[o.wt + j] += t * v;
    }
    if let Some(sum) = delta1_sum {
        for (a, &b) in sum.iter_mut().zip(delta1) {
            *a += b;
        }
    }
}

/// Where one step's backward pass writes: the state gradient λ (`+= δ_1 W1`), the context
/// gradient when asked for, the packed parameter gradient and the running sum of δ_1 over
/// steps (for the context weight), when kept.
pub(crate) struct StepOutputs<'a, T> {
    pub gx: &'a mut [T],
    pub gctx: Option<&'a mut [T]>,
    pub grad: &'a mut [T],
    pub delta1_sum: Option<&'a mut [T]>,
}

/// The whole backward pass of one network at step `k` (input `x_k`, time `t`), from the
/// output gradient already stored in the tape's slot `k`.
#[allow(clippy::too_many_arguments)]
pub(crate) fn step_backward<T: Real>(
    net: &NetShape,
    o: &Offsets,
    theta: &[T],
    tape: &mut NetTape<T>,
    (k, rows): (usize, usize),
    (x, t): (&[T], T),
    scratch: &mut [T],
    out: StepOutputs<'_, T>,
) {
    let (mut st, g) = tape.split(k, rows, net);
    backward_step(net, o, theta, g, rows, &mut st, scratch, out.gx, out.gctx);
    step_param_grads(net, o, &mut st, g, x, t, rows, out.grad, out.delta1_sum);
}
