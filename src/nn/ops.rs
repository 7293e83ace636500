//! Fast CPU kernels with hand-written backward passes for the built-in networks.
//!
//! candle 0.11 evaluates `tanh` and `silu` through libm per element and computes the
//! gradient of a broadcast bias by a reduction over the batch axis, both slow on CPU. These
//! custom ops compute the same functions: f64 uses the exact formulas; f32 uses a rational
//! approximation of tanh (max abs error about 5e-7 against libm on [-20, 20], the
//! odd-degree-13 over even-degree-6 fit used by the Eigen library for float tanh).
//! Tests compare every op and its gradient with candle's own ops.

use candle_core::{bail, CpuStorage, CustomOp1, CustomOp2, Layout, Result, Shape, Tensor};
use serde::{Deserialize, Serialize};

/// Pointwise nonlinearity of the built-in networks.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Activation {
    /// Hyperbolic tangent.
    Tanh,
    /// x·sigmoid(x) (the sigmoid-weighted linear unit).
    #[default]
    Silu,
    /// max(x, 0).
    Relu,
}

impl Activation {
    /// Applies the activation with its fast kernel (differentiable).
    pub fn apply(self, xs: &Tensor) -> Result<Tensor> {
        xs.contiguous()?.apply_op1(ActOp(self))
    }

    /// The activation as a plain f64 function (for reference computations).
    pub fn eval_f64(self, x: f64) -> f64 {
        match self {
            Activation::Tanh => x.tanh(),
            Activation::Silu => x / (1.0 + (-x).exp()),
            Activation::Relu => x.max(0.0),
        }
    }
}

/// Rational approximation of tanh for f32 (branch-free, vectorisable).
#[inline(always)]
pub(crate) fn tanh_f32(x: f32) -> f32 {
    tanh_f32_with::<false>(x)
}

/// The rational tanh with `FMA` choosing fused multiply-adds for the polynomial steps: only
/// for loops compiled with FMA instructions enabled (the fused kernel's run-time dispatch);
/// elsewhere `mul_add` is computed exactly in software, slowly.
#[inline(always)]
#[allow(clippy::excessive_precision)]
pub(crate) fn tanh_f32_with<const FMA: bool>(x: f32) -> f32 {
    let step = |p: f32, x2: f32, c: f32| if FMA { p.mul_add(x2, c) } else { p * x2 + c };
    let x = x.clamp(-7.905_311, 7.905_311);
    let x2 = x * x;
    let mut p = -2.760_768_5e-16f32;
    p = step(p, x2, 2.000_187_9e-13);
    p = step(p, x2, -8.604_671_5e-11);
    p = step(p, x2, 5.122_297e-8);
    p = step(p, x2, 1.485_722_4e-5);
    p = step(p, x2, 6.372_619_3e-4);
    p = step(p, x2, 4.893_524_6e-3);
    let mut q = 1.198_258_4e-6f32;
    q = step(q, x2, 1.185_347e-4);
    q = step(q, x2, 2.268_434_7e-3);
    q = step(q, x2, 4.893_525e-3);
    p * x / q
}

/// sigmoid(x) = (1 + tanh(x/2))/2 for f32.
#[inline(always)]
fn sigmoid_f32(x: f32) -> f32 {
    0.5 + 0.5 * tanh_f32(0.5 * x)
}

pub(crate) fn sigmoid_f64(x: f64) -> f64 {
    0.5 + 0.5 * (0.5 * x).tanh()
}

pub(crate) fn contig<'a, T>(v: &'a [T], l: &Layout, op: &str) -> Result<&'a [T]> {
    match l.contiguous_offsets() {
        Some((a, b)) => Ok(&v[a..b]),
        None => bail!("{op}: input must be contiguous"),
    }
}

struct ActOp(Activation);

impl CustomOp1 for ActOp {
    fn name(&self) -> &'static str {
        "fast-activation"
    }

    fn cpu_fwd(&self, s: &CpuStorage, l: &Layout) -> Result<(CpuStorage, Shape)> {
        let out = match s {
            CpuStorage::F32(v) => {
                let v = contig(v, l, "activation")?;
                CpuStorage::F32(match self.0 {
                    Activation::Tanh => v.iter().map(|&x| tanh_f32(x)).collect(),
                    Activation::Silu => v.iter().map(|&x| x * sigmoid_f32(x)).collect(),
                    Activation::Relu => v.iter().map(|&x| x.max(0.0)).collect(),
                })
            }
            CpuStorage::F64(v) => {
                let v = contig(v, l, "activation")?;
                CpuStorage::F64(v.iter().map(|&x| self.0.eval_f64(x)).collect())
            }
            _ => bail!("activation: only f32 and f64 are supported"),
        };
        Ok((out, l.shape().clone()))
    }

    fn bwd(&self, arg: &Tensor, res: &Tensor, grad: &Tensor) -> Result<Option<Tensor>> {
        let grad = grad.contiguous()?;
        // tanh's derivative needs the output, silu's and relu's the input.
        let saved = match self.0 {
            Activation::Tanh => res,
            Activation::Silu | Activation::Relu => arg,
        };
        Ok(Some(saved.apply_op2_no_bwd(&grad, &ActGrad(self.0))?))
    }
}

/// Gradient kernel: (saved, g) -> g · act'(…).
struct ActGrad(Activation);

fn act_grad_f32(a: Activation, s: f32, g: f32) -> f32 {
    match a {
        Activation::Tanh => g * (1.0 - s * s),
        Activation::Silu => {
            let sg = sigmoid_f32(s);
            g * sg * (1.0 + s * (1.0 - sg))
        }
        Activation::Relu => {
            if s > 0.0 {
                g
            } else {
                0.0
            }
        }
    }
}

fn act_grad_f64(a: Activation, s: f64, g: f64) -> f64 {
    match a {
        Activation::Tanh => g * (1.0 - s * s),
        Activation::Silu => {
            let sg = sigmoid_f64(s);
            g * sg * (1.0 + s * (1.0 - sg))
        }
        Activation::Relu => {
            if s > 0.0 {
                g
            } else {
                0.0
            }
        }
    }
}

impl CustomOp2 for ActGrad {
    fn name(&self) -> &'static str {
        "fast-activation-grad"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
    ) -> Result<(CpuStorage, Shape)> {
        let out = match (s1, s2) {
            (CpuStorage::F32(a), CpuStorage::F32(g)) => {
                let (a, g) = (contig(a, l1, "activation")?, contig(g, l2, "activation")?);
                CpuStorage::F32(
                    a.iter()
                        .zip(g)
                        .map(|(&s, &g)| act_grad_f32(self.0, s, g))
                        .collect(),
                )
            }
            (CpuStorage::F64(a), CpuStorage::F64(g)) => {
                let (a, g) = (contig(a, l1, "activation")?, contig(g, l2, "activation")?);
                CpuStorage::F64(
                    a.iter()
                        .zip(g)
                        .map(|(&s, &g)| act_grad_f64(self.0, s, g))
                        .collect(),
                )
            }
            _ => bail!("activation gradient: dtype mismatch"),
        };
        Ok((out, l1.shape().clone()))
    }
}

/// `xs + bias` for xs of shape (batch, n) and bias of shape (n), differentiable in both.
///
/// The bias gradient is computed as `ones(1, batch) · g`, a matrix product, instead of a
/// reduction over the batch axis.
pub fn bias_add(xs: &Tensor, bias: &Tensor) -> Result<Tensor> {
    xs.contiguous()?.apply_op2(&bias.contiguous()?, BiasAdd)
}

struct BiasAdd;

/// `f(x_ij, b_j)` for every row of a contiguous `(batch, n)` storage and a bias `(n)`, in f32
/// or f64: the forward pass shared by the bias kernels.
fn map_rows_with_bias(
    op: &str,
    (s1, l1): (&CpuStorage, &Layout),
    (s2, l2): (&CpuStorage, &Layout),
    f32_fn: impl Fn(f32, f32) -> f32,
    f64_fn: impl Fn(f64, f64) -> f64,
) -> Result<(CpuStorage, Shape)> {
    fn rows<T: Copy>(x: &[T], b: &[T], f: impl Fn(T, T) -> T) -> Vec<T> {
        let mut out = Vec::with_capacity(x.len());
        for row in x.chunks_exact(b.len()) {
            out.extend(row.iter().zip(b).map(|(&x, &b)| f(x, b)));
        }
        out
    }
    let dims = l1.dims();
    if dims.len() != 2 || l2.dims() != [dims[1]] {
        bail!(
            "{op}: expected xs (batch, n) and bias (n), got {:?} and {:?}",
            dims,
            l2.dims()
        )
    }
    let out = match (s1, s2) {
        (CpuStorage::F32(x), CpuStorage::F32(b)) => {
            CpuStorage::F32(rows(contig(x, l1, op)?, contig(b, l2, op)?, f32_fn))
        }
        (CpuStorage::F64(x), CpuStorage::F64(b)) => {
            CpuStorage::F64(rows(contig(x, l1, op)?, contig(b, l2, op)?, f64_fn))
        }
        _ => bail!("{op}: dtype mismatch or unsupported dtype"),
    };
    Ok((out, l1.shape().clone()))
}

/// Gradient of a bias broadcast over rows: `ones(1, batch) · g`, shape `(n)`.
fn bias_grad(g: &Tensor) -> Result<Tensor> {
    let (batch, n) = g.dims2()?;
    Tensor::ones((1, batch), g.dtype(), g.device())?
        .matmul(g)?
        .reshape(n)
}

impl CustomOp2 for BiasAdd {
    fn name(&self) -> &'static str {
        "bias-add"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
    ) -> Result<(CpuStorage, Shape)> {
        map_rows_with_bias("bias-add", (s1, l1), (s2, l2), |x, b| x + b, |x, b| x + b)
    }

    fn bwd(
        &self,
        _xs: &Tensor,
        _bias: &Tensor,
        _res: &Tensor,
        grad: &Tensor,
    ) -> Result<(Option<Tensor>, Option<Tensor>)> {
        Ok((Some(grad.clone()), Some(bias_grad(grad)?)))
    }
}

/// `act(xs + bias)` for xs of shape (batch, n) and bias of shape (n), in one node.
///
/// The pre-activation is not stored: the backward pass recomputes it from `xs` and `bias`
/// (one add), so a dense layer keeps two `(batch, n)` tensors for backpropagation instead of
/// three. The bias gradient is `ones(1, batch) · g'` as in [`bias_add`].
pub fn bias_act(xs: &Tensor, bias: &Tensor, act: Activation) -> Result<Tensor> {
    xs.contiguous()?
        .apply_op2(&bias.contiguous()?, BiasAct(act))
}

struct BiasAct(Activation);

impl CustomOp2 for BiasAct {
    fn name(&self) -> &'static str {
        "bias-activation"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
    ) -> Result<(CpuStorage, Shape)> {
        let a = self.0;
        let f64_fn = move |x: f64, b: f64| a.eval_f64(x + b);
        let args = ("bias-activation", (s1, l1), (s2, l2));
        match a {
            Activation::Tanh => {
                map_rows_with_bias(args.0, args.1, args.2, |x, b| tanh_f32(x + b), f64_fn)
            }
            Activation::Silu => map_rows_with_bias(
                args.0,
                args.1,
                args.2,
                |x, b| (x + b) * sigmoid_f32(x + b),
                f64_fn,
            ),
            Activation::Relu => {
                map_rows_with_bias(args.0, args.1, args.2, |x, b| (x + b).max(0.0), f64_fn)
            }
        }
    }

    fn bwd(
        &self,
        xs: &Tensor,
        bias: &Tensor,
        res: &Tensor,
        grad: &Tensor,
    ) -> Result<(Option<Tensor>, Option<Tensor>)> {
        let grad = grad.contiguous()?;
        // tanh's derivative needs the output; silu's and relu's the pre-activation, which
        // is recomputed here rather than stored.
        let g_pre = match self.0 {
            Activation::Tanh => res.apply_op2_no_bwd(&grad, &ActGrad(self.0))?,
            Activation::Silu | Activation::Relu => xs
                .apply_op2_no_bwd(bias, &BiasAdd)?
                .apply_op2_no_bwd(&grad, &ActGrad(self.0))?,
        };
        let db = bias_grad(&g_pre)?;
        Ok((Some(g_pre), Some(db)))
    }
}

/// `act(xs · wᵀ + bias)`: a dense layer followed by an activation, with the fused
/// [`bias_act`].
pub fn dense(xs: &Tensor, weight: &Tensor, bias: &Tensor, act: Activation) -> Result<Tensor> {
    bias_act(&xs.matmul(&weight.t()?)?, bias, act)
}

/// `xs · wᵀ + bias` (a dense layer), with the fast bias gradient.
pub fn linear(xs: &Tensor, weight: &Tensor, bias: Option<&Tensor>) -> Result<Tensor> {
    let y = xs.matmul(&weight.t()?)?;
    match bias {
        Some(b) => bias_add(&y, b),
        None => Ok(y),
    }
}
