//! Brownian increments on a fixed time grid, drawn from the library's seeded generator.

use candle_core::{DType, Device, Tensor};
use rand::RngCore;

use crate::error::{Error, Result};
use crate::util::rng::standard_normals;

/// The Brownian increments that drive one batch of paths on a grid of `n_steps` steps.
///
/// `dw[k]` holds `ΔW_k = W_{t_{k+1}} − W_{t_k} ~ N(0, h I)`, shape `(batch, d)`. Schemes of
/// strong order 1.5 also need the time integral `ΔZ_k = ∫_{t_k}^{t_{k+1}} (W_s − W_{t_k}) ds`,
/// drawn jointly as `ΔW = √h ξ₁`, `ΔZ = ½ h^{3/2} (ξ₁ + ξ₂/√3)` with independent standard
/// normals ξ₁, ξ₂ (Kloeden & Platen 1992, *Numerical Solution of Stochastic Differential
/// Equations*, §10.4). All ξ₁ are drawn before any ξ₂, so the same seed gives the same `ΔW`
/// whether or not `ΔZ` is requested.
///
/// Keep and pass the same value to several simulations to use common random numbers.
///
/// # Example
/// ```
/// use candle_core::{DType, Device};
/// use neural_sde::{generator, SolverConfig};
/// let grid = SolverConfig { n_steps: 10, ..Default::default() };
/// let noise = grid.sample_noise(&mut generator(7, 0), 4, 2, DType::F64, &Device::Cpu)?;
/// assert_eq!(noise.n_steps(), 10);
/// assert_eq!(noise.dw()[0].dims(), &[4, 2]);
/// # Ok::<(), neural_sde::Error>(())
/// ```
#[derive(Debug, Clone)]
pub struct BrownianIncrements {
    dw: Vec<Tensor>,
    dz: Option<Vec<Tensor>>,
    step: f64,
}

impl BrownianIncrements {
    /// Draws increments for `batch` paths in dimension `dim` over `n_steps` steps of size
    /// `t_end / n_steps`; with `with_area`, also the integrals `ΔZ`. Users draw through
    /// [`crate::SolverConfig::sample_noise`], which supplies the grid and scheme.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn sample(
        rng: &mut dyn RngCore,
        batch: usize,
        dim: usize,
        n_steps: usize,
        t_end: f64,
        with_area: bool,
        dtype: DType,
        dev: &Device,
    ) -> Result<Self> {
        check_grid(batch, dim, n_steps, t_end)?;
        let n = batch * dim;
        let xi1: Vec<Vec<f64>> = (0..n_steps).map(|_| standard_normals(rng, n)).collect();
        let xi2 = with_area.then(|| {
            (0..n_steps)
                .map(|_| standard_normals(rng, n))
                .collect::<Vec<_>>()
        });
        let h = t_end / n_steps as f64;
        let (mut dw, mut dz) = (Vec::with_capacity(n_steps), Vec::new());
        for (k, a) in xi1.iter().enumerate() {
            let (w, z) = step_block(
                a,
                xi2.as_ref().map(|b| b[k].as_slice()),
                h,
                (batch, dim),
                dtype,
                dev,
            )?;
            dw.push(w);
            dz.extend(z);
        }
        Ok(Self {
            dw,
            dz: with_area.then_some(dz),
            step: h,
        })
    }

    /// As [`BrownianIncrements::sample`], with path `i`'s normals drawn from its own
    /// generator `keyed_generator(seed, stream, keys[i])`: a path's increments do not depend
    /// on which other paths share the batch, so a minibatch split between processes (or
    /// evaluated in chunks) draws exactly the noise it would draw whole.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn sample_keyed(
        seed: u64,
        stream: u64,
        keys: &[u64],
        dim: usize,
        n_steps: usize,
        t_end: f64,
        with_area: bool,
        dtype: DType,
        dev: &Device,
    ) -> Result<Self> {
        let batch = keys.len();
        check_grid(batch, dim, n_steps, t_end)?;
        let per = n_steps * dim;
        // Each path's draws depend only on its key, so they are made in parallel, and so is
        // the assembly of each step's (batch, dim) block (on one thread, or for few values,
        // in order: handing small jobs to the pool costs more than it saves).
        use rayon::prelude::*;
        let parallel = rayon::current_num_threads() > 1 && batch * per >= 1 << 14;
        let draw = |&key: &u64| {
            let mut g = crate::util::rng::keyed_generator(seed, stream, key);
            let a = standard_normals(&mut g, per);
            let b = if with_area {
                standard_normals(&mut g, per)
            } else {
                Vec::new()
            };
            (a, b)
        };
        let drawn: Vec<(Vec<f64>, Vec<f64>)> = if parallel {
            keys.par_iter().with_min_len(16).map(draw).collect()
        } else {
            keys.iter().map(draw).collect()
        };
        let h = t_end / n_steps as f64;
        // Step k's block gathers each path's k-th normals, then takes the same formula as
        // `sample`.
        let block = |k: usize| -> Result<(Tensor, Option<Tensor>)> {
            // The k-th block of each path's ξ₁ (`second`: ξ₂).
            let gather = |second: bool| -> Vec<f64> {
                let mut v = Vec::with_capacity(batch * dim);
                for (a, b) in &drawn {
                    let xi = if second { b } else { a };
                    v.extend_from_slice(&xi[k * dim..(k + 1) * dim]);
                }
                v
            };
            let a = gather(false);
            let b = with_area.then(|| gather(true));
            step_block(&a, b.as_deref(), h, (batch, dim), dtype, dev)
        };
        let blocks: Vec<(Tensor, Option<Tensor>)> = if parallel {
            (0..n_steps)
                .into_par_iter()
                .map(block)
                .collect::<Result<_>>()?
        } else {
            (0..n_steps).map(block).collect::<Result<_>>()?
        };
        let (dw, dz): (Vec<Tensor>, Vec<Option<Tensor>>) = blocks.into_iter().unzip();
        Ok(Self {
            dw,
            dz: with_area.then(|| dz.into_iter().flatten().collect()),
            step: h,
        })
    }

    /// Increments supplied by the caller (for instance aggregated from a finer grid).
    ///
    /// # Errors
    /// [`Error::Shape`] if the tensors do not all share one `(batch, d)` shape or `dz` has
    /// another length; [`Error::InvalidConfig`] for an empty list or bad step.
    pub fn from_tensors(dw: Vec<Tensor>, dz: Option<Vec<Tensor>>, step: f64) -> Result<Self> {
        crate::error::check_positive("step", step)?;
        let first = dw
            .first()
            .ok_or_else(|| Error::config("n_steps", 0, "give at least one increment"))?;
        let shape = first.dims().to_vec();
        if shape.len() != 2 {
            return Err(Error::shape("Brownian increment", "(batch, d)", &shape));
        }
        for t in dw.iter().chain(dz.iter().flatten()) {
            if t.dims() != shape.as_slice() {
                return Err(Error::shape("Brownian increment", &shape, t.dims()));
            }
        }
        if let Some(z) = &dz {
            if z.len() != dw.len() {
                return Err(Error::shape("number of ΔZ increments", dw.len(), z.len()));
            }
        }
        Ok(Self { dw, dz, step })
    }

    /// Number of steps.
    pub fn n_steps(&self) -> usize {
        self.dw.len()
    }

    /// The step size `h`.
    pub fn step(&self) -> f64 {
        self.step
    }

    /// `(batch, d)`.
    pub fn shape(&self) -> (usize, usize) {
        let d = self.dw[0].dims();
        (d[0], d[1])
    }

    /// The increments `ΔW_k`.
    pub fn dw(&self) -> &[Tensor] {
        &self.dw
    }

    /// The integrals `ΔZ_k`, when drawn.
    pub fn dz(&self) -> Option<&[Tensor]> {
        self.dz.as_deref()
    }
}

/// Refuses an empty batch, state or grid, and a non-positive horizon.
fn check_grid(batch: usize, dim: usize, n_steps: usize, t_end: f64) -> Result<()> {
    if batch == 0 {
        return Err(Error::config("batch", batch, "simulate at least 1 path"));
    }
    if dim == 0 {
        return Err(Error::config(
            "dim",
            dim,
            "the state needs at least 1 dimension",
        ));
    }
    if n_steps == 0 {
        return Err(Error::config(
            "n_steps",
            n_steps,
            "use at least 1 solver step",
        ));
    }
    crate::error::check_positive("t_end", t_end)
}

/// One step's increments from its `(batch, dim)` block of normals: `ΔW = √h ξ₁` and, given
/// `ξ₂`, `ΔZ = ½ h^{3/2} (ξ₁ + ξ₂/√3)` (Kloeden & Platen 1992, §10.4), as tensors of `dtype`
/// (f32 built directly, with the rounding of a cast).
fn step_block(
    xi1: &[f64],
    xi2: Option<&[f64]>,
    h: f64,
    shape: (usize, usize),
    dtype: DType,
    dev: &Device,
) -> Result<(Tensor, Option<Tensor>)> {
    let tensor = |v: Vec<f64>| -> Result<Tensor> {
        Ok(if dtype == DType::F32 {
            let v: Vec<f32> = v.iter().map(|&x| x as f32).collect();
            Tensor::from_vec(v, shape, dev)?
        } else {
            Tensor::from_vec(v, shape, dev)?.to_dtype(dtype)?
        })
    };
    let sh = h.sqrt();
    let dw = tensor(xi1.iter().map(|z| sh * z).collect())?;
    let dz = match xi2 {
        Some(xi2) => {
            let (c, r3) = (0.5 * h * sh, 1.0 / 3f64.sqrt());
            Some(tensor(
                xi1.iter().zip(xi2).map(|(a, b)| c * (a + b * r3)).collect(),
            )?)
        }
        None => None,
    };
    Ok((dw, dz))
}
