//! The fused whole-path kernel for the built-in networks.
//!
//! When every drift of an [`Sde`] is a built-in [`crate::TimeMlp`] (the tabular model's
//! control also adds a linear feedback term `G(t) ⊙ (C − x A)`, see
//! [`crate::FusedForm`]), σ is fixed and the scheme is
//! Euler–Maruyama, [`crate::simulate`] runs the whole path as **one** candle operation: the
//! forward pass works in preallocated buffers with the `gemm` kernels, keeps the hidden
//! activations and their derivatives on a tape, and the backward pass is written by hand
//! (the adjoint recursion `λ_k = λ_{k+1} + (∂f/∂x)ᵀ h λ_{k+1}` of the Euler–Maruyama map,
//! with each step's weight gradients added while its activations are still in cache). The
//! generic path records several autodiff nodes per layer and step instead; the values and
//! gradients are the same up to rounding (tests compare the two).
//!
//! The batch is cut into fixed blocks of rows that run independently (in parallel on the
//! rayon pool), so results do not depend on the thread count.
//! [`crate::Kernel`] chooses it or the generic path.

mod gemm;
mod net;
pub(crate) use net::NetShape;
mod op;
mod path;
mod pool;
mod real;

use std::sync::{Arc, Mutex};

use candle_core::{DType, Tensor};

use super::config::{Scheme, SolverConfig};
use super::system::{Paths, Sde};
use crate::error::Result;
use crate::sde::drift::{Drift, FusedForm, Sealed};
use crate::sde::noise::BrownianIncrements;

use op::PathOp;
use path::{FeedbackOffsets, PathSpec};

/// `Some(None)` for no drift, `Some(Some(form))` for a drift the kernel runs, `None`
/// otherwise.
fn form_of<'a>(d: Option<&'a dyn Drift>) -> Option<Option<FusedForm<'a>>> {
    match d {
        None => Some(None),
        Some(d) => d.fused_form(Sealed(())).map(Some),
    }
}

/// All the increments `ΔW` as one `(N, batch, d)` buffer.
fn noise_values<T: real::Real>(noise: &BrownianIncrements) -> candle_core::Result<Vec<T>> {
    let (batch, d) = noise.shape();
    let mut out = Vec::with_capacity(noise.n_steps() * batch * d);
    for dw in noise.dw() {
        op::append_values(&mut out, dw)?;
    }
    Ok(out)
}

/// Runs `simulate` through the fused kernel, or says why it does not apply (a custom drift,
/// learned σ, SRA1, a kept path, another dtype or device).
pub(crate) fn try_simulate(
    sde: &Sde<'_>,
    cfg: &SolverConfig,
    x0: &Tensor,
    noise: &BrownianIncrements,
    context: Option<&Tensor>,
) -> Result<std::result::Result<Paths, &'static str>> {
    if cfg.scheme != Scheme::EulerMaruyama {
        return Ok(Err("it runs Euler–Maruyama only"));
    }
    if cfg.keep_path {
        return Ok(Err("it does not keep the states of the path (keep_path)"));
    }
    let dtype = x0.dtype();
    if !x0.device().is_cpu() || !matches!(dtype, DType::F32 | DType::F64) {
        return Ok(Err("it runs f32 or f64 tensors on the CPU only"));
    }
    if sde.diffusion().is_learned() {
        return Ok(Err("it needs a fixed σ, not a learned one"));
    }
    let (Some(prior), Some(control)) = (form_of(sde.prior()), form_of(sde.control())) else {
        return Ok(Err(
            "every drift must be a built-in network (a custom drift runs on the generic path)",
        ));
    };
    if prior.is_none() && control.is_none() {
        return Ok(Err("the SDE has no drift to fuse"));
    }
    if prior
        .as_ref()
        .is_some_and(|p| p.network.context_dim > 0 || p.feedback.is_some())
    {
        // The prior never sees a context; the generic path reports the error.
        return Ok(Err("the prior drift must not take a context"));
    }
    let (batch, d) = x0.dims2()?;
    let has_ctx = control.as_ref().is_some_and(|c| c.network.context_dim > 0);
    let ctx = match (has_ctx, context) {
        (true, Some(c)) => c.contiguous()?,
        (true, None) => return Ok(Err("the control needs a context and none was given")),
        (false, _) => Tensor::zeros(1, dtype, x0.device())?,
    };
    let mut parts = Vec::new();
    let mut offset = 0;
    let mut shape_of = |m: Option<FusedForm<'_>>| -> Option<NetShape> {
        m.map(|m| {
            let n = m.network;
            let s = NetShape {
                d: n.dim,
                c: n.context_dim,
                w: n.width,
                depth: n.depth,
                act: n.activation,
                offset,
            };
            let p = n.params;
            offset += s.len();
            parts.extend(p);
            s
        })
    };
    let control_feedback = control.as_ref().and_then(|c| c.feedback);
    let prior_shape = shape_of(prior);
    let control_shape = shape_of(control);
    let feedback = match control_feedback {
        Some(fb) if has_ctx => {
            let times: Vec<f64> = (0..cfg.n_steps).map(|k| k as f64 * cfg.step()).collect();
            let (c, a, g) = fb.terms(&ctx, &times)?;
            let want = [(batch, d), (d, d), (cfg.n_steps, d)];
            for (t, want) in [&c, &a, &g].into_iter().zip(want) {
                if t.dims2()? != want {
                    return Err(crate::error::Error::shape("feedback term", want, t.dims()));
                }
            }
            let fo = FeedbackOffsets {
                c: offset,
                a: offset + batch * d,
                g: offset + batch * d + d * d,
            };
            offset = fo.g + cfg.n_steps * d;
            parts.extend([c, a, g]);
            Some(fo)
        }
        Some(_) => return Ok(Err("a feedback term needs a context")),
        None => None,
    };
    if parts
        .iter()
        .any(|p| p.dtype() != dtype || !p.device().is_cpu())
    {
        return Ok(Err(
            "every parameter must have the state's dtype and live on the CPU",
        ));
    }
    let flat: Vec<Tensor> = parts
        .iter()
        .map(Tensor::flatten_all)
        .collect::<candle_core::Result<_>>()?;
    let theta = Tensor::cat(&flat, 0)?;
    let x0 = x0.contiguous()?;
    let noise_data = match dtype {
        DType::F32 => candle_core::CpuStorage::F32(noise_values(noise)?),
        _ => candle_core::CpuStorage::F64(noise_values(noise)?),
    };
    let spec = PathSpec {
        prior: prior_shape,
        control: control_shape,
        feedback,
        d,
        n_steps: cfg.n_steps,
        h: cfg.step(),
        sigma: sde.diffusion().values(d)?,
        n_params: offset,
    };
    let keep = theta.track_op() || x0.track_op() || ctx.track_op();
    let op = PathOp {
        spec: Arc::new(spec),
        noise: noise_data,
        batch,
        has_ctx,
        keep,
        saved: Mutex::new(None),
    };
    let out = theta.apply_op3(&x0, &ctx, op)?;
    let end = out.narrow(1, 0, d)?;
    let control_cost = out.narrow(1, d, 1)?.squeeze(1)?;
    let stoch = out.narrow(1, d + 1, 1)?.squeeze(1)?;
    let log_weight = (stoch + &control_cost)?.neg()?;
    Ok(Ok(Paths {
        end,
        path: None,
        control_cost,
        log_weight,
    }))
}
