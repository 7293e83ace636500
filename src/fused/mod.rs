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
//! [`SolverConfig::fused_networks`] switches the kernel off.

mod gemm;
mod net;
pub(crate) use net::NetShape;
mod op;
mod path;
mod pool;
mod real;

use std::sync::{Arc, Mutex};

use candle_core::{DType, Tensor};

use crate::drift::{Drift, FusedForm};
use crate::error::Result;
use crate::noise::BrownianIncrements;
use crate::solver::{Paths, Scheme, Sde, SolverConfig};

use op::PathOp;
use path::{FeedbackOffsets, PathSpec};

/// `Some(None)` for no drift, `Some(Some(form))` for a drift the kernel runs, `None`
/// otherwise.
fn form_of<'a>(d: Option<&'a dyn Drift>) -> Option<Option<FusedForm<'a>>> {
    match d {
        None => Some(None),
        Some(d) => d.fused_form().map(Some),
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

/// Runs `simulate` through the fused kernel, or returns `None` when it does not apply (a
/// custom drift, learned σ, SRA1, a kept path, another dtype or device).
pub(crate) fn try_simulate(
    sde: &Sde<'_>,
    cfg: &SolverConfig,
    x0: &Tensor,
    noise: &BrownianIncrements,
    context: Option<&Tensor>,
) -> Result<Option<Paths>> {
    if !cfg.fused_networks || cfg.scheme != Scheme::EulerMaruyama || cfg.keep_path {
        return Ok(None);
    }
    let dtype = x0.dtype();
    if !x0.device().is_cpu() || !matches!(dtype, DType::F32 | DType::F64) {
        return Ok(None);
    }
    if sde.diffusion().is_learned() {
        return Ok(None);
    }
    let (Some(prior), Some(control)) = (form_of(sde.prior()), form_of(sde.control())) else {
        return Ok(None);
    };
    if prior.is_none() && control.is_none() {
        return Ok(None);
    }
    if prior.is_some_and(|p| p.network.context_dim() > 0 || p.feedback.is_some()) {
        // The prior never sees a context; the generic path reports the error.
        return Ok(None);
    }
    let (batch, d) = x0.dims2()?;
    let has_ctx = control.is_some_and(|c| c.network.context_dim() > 0);
    let ctx = match (has_ctx, context) {
        (true, Some(c)) => c.contiguous()?,
        (true, None) => return Ok(None),
        (false, _) => Tensor::zeros(1, dtype, x0.device())?,
    };
    let mut parts = Vec::new();
    let mut offset = 0;
    let mut shape_of = |m: Option<FusedForm<'_>>| -> Option<NetShape> {
        m.map(|m| {
            let (s, p) = m.network.fused_parts(offset);
            offset += s.len();
            parts.extend(p);
            s
        })
    };
    let prior_shape = shape_of(prior);
    let control_shape = shape_of(control);
    let feedback = match control.and_then(|c| c.feedback) {
        Some(fb) if has_ctx => {
            let times: Vec<f64> = (0..cfg.n_steps).map(|k| k as f64 * cfg.step()).collect();
            let (c, a, g) = fb.terms(&ctx, &times)?;
            let want = [(batch, d), (d, d), (cfg.n_steps, d)];
            for (t, want) in [&c, &a, &g].into_iter().zip(want) {
                if t.dims2()? != want {
                    return Err(crate::Error::shape("feedback term", want, t.dims()));
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
        Some(_) => return Ok(None),
        None => None,
    };
    if parts
        .iter()
        .any(|p| p.dtype() != dtype || !p.device().is_cpu())
    {
        return Ok(None);
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
    Ok(Some(Paths {
        end,
        path: None,
        control_cost,
        log_weight,
    }))
}
