//! The fused path as one candle operation: inputs are the packed parameters, `x_0` and the
//! context; the output is `[x_N, control cost, Σ_k v_k·ΔW_k]` per path, and its backward
//! pass is the hand-written one of [`super::path`].

use std::any::Any;
use std::sync::{Arc, Mutex};

use candle_core::{bail, CpuStorage, CustomOp3, Layout, Result, Shape, Storage, Tensor};
use rayon::prelude::*;

use super::path::{self, Block, BlockGrads, BlockTape, PathSpec};
use super::real::Real;

/// Rows per block. Blocks are independent along the whole path (they run in parallel) and
/// their parameter gradients are summed in block order, so results do not depend on the
/// number of threads.
pub(crate) const BLOCK_ROWS: usize = 128;

pub(crate) struct PathOp {
    pub spec: Arc<PathSpec>,
    /// `ΔW` as `(N, batch, d)`, in the dtype of the inputs.
    pub noise: CpuStorage,
    pub batch: usize,
    /// Whether the control takes the third input as context.
    pub has_ctx: bool,
    /// Keep the tape for a backward pass.
    pub keep: bool,
    /// The tapes of the last forward pass (`Vec<BlockTape<T>>`).
    pub saved: Mutex<Option<Box<dyn Any + Send>>>,
}

fn blocks(batch: usize) -> Vec<(usize, usize)> {
    (0..batch)
        .step_by(BLOCK_ROWS)
        .map(|r0| (r0, BLOCK_ROWS.min(batch - r0)))
        .collect()
}

fn contig<'a, T: Real>(s: &'a CpuStorage, l: &Layout, what: &str) -> Result<&'a [T]> {
    match T::slice(s) {
        Some(v) => crate::nn::ops::contig(v, l, what),
        None => bail!("fused path: {what} has another dtype than the parameters"),
    }
}

/// Appends the values of the CPU tensor `t` (any layout) to `out`, in one copy.
pub(crate) fn append_values<T: Real>(out: &mut Vec<T>, t: &Tensor) -> Result<()> {
    let t = t.contiguous()?;
    let (s, l) = t.storage_and_layout();
    let Storage::Cpu(s) = &*s else {
        bail!("fused path: runs on the CPU only")
    };
    out.extend_from_slice(contig::<T>(s, l, "the noise")?);
    Ok(())
}

impl PathOp {
    fn noise<T: Real>(&self) -> Result<&[T]> {
        match T::slice(&self.noise) {
            Some(v) => Ok(v),
            None => bail!("fused path: the noise has another dtype than the parameters"),
        }
    }

    fn block<'a, T: Real>(
        &self,
        theta: &'a [T],
        x0: &'a [T],
        ctx: &'a [T],
        noise: &'a [T],
        (r0, rows): (usize, usize),
    ) -> Block<'a, T> {
        let d = self.spec.d;
        let c = self.spec.control.as_ref().map_or(0, |s| s.c);
        Block {
            theta,
            x0: &x0[r0 * d..(r0 + rows) * d],
            ctx: (self.has_ctx && c > 0).then(|| &ctx[r0 * c..(r0 + rows) * c]),
            noise,
            batch: self.batch,
            r0,
            rows,
        }
    }

    fn forward<T: Real>(
        &self,
        theta: &[T],
        x0: &[T],
        ctx: &[T],
        keep: bool,
    ) -> Result<(Vec<T>, Vec<BlockTape<T>>)> {
        let noise = self.noise::<T>()?;
        let d = self.spec.d;
        let mut out = vec![T::ZERO; self.batch * (d + 2)];
        let tapes: Vec<Option<BlockTape<T>>> = out
            .par_chunks_mut(BLOCK_ROWS * (d + 2))
            .zip(blocks(self.batch))
            .map(|(o, b)| {
                let blk = self.block(theta, x0, ctx, noise, b);
                path::forward(&self.spec, &blk, keep, o)
            })
            .collect();
        Ok((out, tapes.into_iter().flatten().collect()))
    }

    fn typed_fwd<T: Real>(
        &self,
        (s1, l1): (&CpuStorage, &Layout),
        (s2, l2): (&CpuStorage, &Layout),
        (s3, l3): (&CpuStorage, &Layout),
    ) -> Result<(CpuStorage, Shape)> {
        let theta = contig::<T>(s1, l1, "the parameters")?;
        let x0 = contig::<T>(s2, l2, "x0")?;
        let ctx = contig::<T>(s3, l3, "the context")?;
        let (out, tapes) = self.forward(theta, x0, ctx, self.keep)?;
        if self.keep {
            let mut saved = match self.saved.lock() {
                Ok(s) => s,
                Err(_) => bail!("fused path: tape lock poisoned"),
            };
            *saved = Some(Box::new(tapes));
        }
        Ok((T::storage(out), Shape::from((self.batch, self.spec.d + 2))))
    }

    fn typed_bwd<T: Real>(
        &self,
        args: [&Tensor; 3],
        grad: &Tensor,
    ) -> Result<(Option<Tensor>, Option<Tensor>, Option<Tensor>)> {
        let [theta_t, x0_t, ctx_t] = args;
        let theta_t = theta_t.contiguous()?;
        let (x0_t, ctx_t) = (x0_t.contiguous()?, ctx_t.contiguous()?);
        let grad = grad.contiguous()?;
        let saved = match self.saved.lock() {
            Ok(mut s) => s.take(),
            Err(_) => bail!("fused path: tape lock poisoned"),
        };
        let (s1, l1) = theta_t.storage_and_layout();
        let (s2, l2) = x0_t.storage_and_layout();
        let (s3, l3) = ctx_t.storage_and_layout();
        let (sg, lg) = grad.storage_and_layout();
        let (Storage::Cpu(s1), Storage::Cpu(s2), Storage::Cpu(s3), Storage::Cpu(sg)) =
            (&*s1, &*s2, &*s3, &*sg)
        else {
            bail!("fused path: runs on the CPU only")
        };
        let theta = contig::<T>(s1, l1, "the parameters")?;
        let x0 = contig::<T>(s2, l2, "x0")?;
        let ctx = contig::<T>(s3, l3, "the context")?;
        let g = contig::<T>(sg, lg, "the output gradient")?;
        // The tape is consumed by the backward pass; a second backward pass recomputes it.
        let tapes: Vec<BlockTape<T>> = match saved.and_then(|b| b.downcast().ok()) {
            Some(t) => *t,
            None => self.forward(theta, x0, ctx, true)?.1,
        };
        let want_ctx = self.has_ctx && ctx_t.track_op();
        let noise = self.noise::<T>()?;
        let d = self.spec.d;
        let parts: Vec<BlockGrads<T>> = tapes
            .into_par_iter()
            .zip(blocks(self.batch))
            .map(|(tape, b)| {
                let blk = self.block(theta, x0, ctx, noise, b);
                let gb = &g[b.0 * (d + 2)..(b.0 + b.1) * (d + 2)];
                path::backward(&self.spec, &blk, tape, gb, want_ctx)
            })
            .collect();
        let mut g_theta = vec![T::ZERO; self.spec.n_params];
        let mut g_x0 = Vec::with_capacity(self.batch * d);
        let mut g_ctx = Vec::new();
        for p in parts {
            for (a, &b) in g_theta.iter_mut().zip(&p.theta) {
                *a += b;
            }
            g_x0.extend_from_slice(&p.x0);
            if let Some(c) = p.ctx {
                g_ctx.extend_from_slice(&c);
            }
        }
        let dev = theta_t.device();
        let to_tensor =
            |v: Vec<T>, shape: &[usize]| -> Result<Tensor> { Tensor::from_vec(v, shape, dev) };
        let g_theta = to_tensor(g_theta, theta_t.dims())?;
        let g_x0 = if x0_t.track_op() {
            Some(to_tensor(g_x0, x0_t.dims())?)
        } else {
            None
        };
        let g_ctx = if want_ctx {
            Some(to_tensor(g_ctx, ctx_t.dims())?)
        } else {
            None
        };
        Ok((Some(g_theta), g_x0, g_ctx))
    }
}

impl CustomOp3 for PathOp {
    fn name(&self) -> &'static str {
        "fused-euler-maruyama-path"
    }

    fn cpu_fwd(
        &self,
        s1: &CpuStorage,
        l1: &Layout,
        s2: &CpuStorage,
        l2: &Layout,
        s3: &CpuStorage,
        l3: &Layout,
    ) -> Result<(CpuStorage, Shape)> {
        match s1 {
            CpuStorage::F32(_) => self.typed_fwd::<f32>((s1, l1), (s2, l2), (s3, l3)),
            CpuStorage::F64(_) => self.typed_fwd::<f64>((s1, l1), (s2, l2), (s3, l3)),
            _ => bail!("fused path: only f32 and f64 are supported"),
        }
    }

    fn bwd(
        &self,
        arg1: &Tensor,
        arg2: &Tensor,
        arg3: &Tensor,
        _res: &Tensor,
        grad: &Tensor,
    ) -> Result<(Option<Tensor>, Option<Tensor>, Option<Tensor>)> {
        match arg1.dtype() {
            candle_core::DType::F32 => self.typed_bwd::<f32>([arg1, arg2, arg3], grad),
            candle_core::DType::F64 => self.typed_bwd::<f64>([arg1, arg2, arg3], grad),
            other => bail!("fused path: dtype {other:?} is not supported"),
        }
    }
}
