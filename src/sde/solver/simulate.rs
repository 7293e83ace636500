//! The entry point: integrate an SDE on a fixed grid, generic or fused.

use candle_core::Tensor;

use super::config::{Kernel, Scheme, SolverConfig};
use super::fused;
use super::step;
use super::system::{Paths, Sde};
use crate::error::{Error, Result};
use crate::sde::noise::BrownianIncrements;

/// Integrates `sde` from `x0` (shape `(batch, d)`) with the given noise, keeping the graph.
///
/// `context` (shape `(batch, c)`) is passed to the control only.
///
/// # Errors
/// [`Error::Shape`] when the noise, `x0`, the context or a drift's output disagree in shape;
/// [`Error::InvalidConfig`] for a bad config, a noise grid that differs from the config, or
/// SRA1 without `ΔZ`; [`Error::Candle`] for errors raised by a drift.
///
/// # Example
/// ```
/// use candle_core::{DType, Device, Tensor};
/// use neural_sde::{generator, simulate, Diffusion, FnDrift, Sde, SolverConfig};
///
/// let dev = Device::Cpu;
/// let cfg = SolverConfig { n_steps: 20, ..Default::default() };
/// let sigma = Diffusion::constant(1.0)?;
/// let control = FnDrift::new(2, |x, _t, _c| x.affine(0.0, 0.5)); // u = 0.5
/// let sde = Sde::new(&sigma).with_control(&control);
/// let noise = cfg.sample_noise(&mut generator(1, 0), 1000, 2, DType::F64, &dev)?;
/// let x0 = Tensor::zeros((1000, 2), DType::F64, &dev)?;
/// let paths = neural_sde::simulate(&sde, &cfg, &x0, &noise, None)?;
/// // The control cost of a constant u is ½ |u|² T per path.
/// let cost = paths.control_cost.mean_all()?.to_scalar::<f64>()?;
/// assert!((cost - 0.25).abs() < 1e-12);
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub fn simulate(
    sde: &Sde<'_>,
    cfg: &SolverConfig,
    x0: &Tensor,
    noise: &BrownianIncrements,
    context: Option<&Tensor>,
) -> Result<Paths> {
    cfg.validate()?;
    let (batch, dim) = x0
        .dims2()
        .map_err(|_| Error::shape("x0", "(batch, d)", x0.dims()))?;
    check_inputs(sde, cfg, batch, dim, noise, context)?;
    sde.diffusion().check_dim(dim)?;
    match (cfg.kernel, fused::try_simulate(sde, cfg, x0, noise, context)?) {
        (Kernel::Generic, _) => {}
        (_, Ok(paths)) => return Ok(paths),
        (Kernel::Fused, Err(why)) => {
            return Err(Error::config(
                "kernel",
                "fused",
                format!("the fused kernel cannot run this simulation: {why}; use Kernel::Auto or Kernel::Generic"),
            ))
        }
        (Kernel::Auto, Err(_)) => {}
    }
    let sigma = sde.diffusion();
    let mut st = step::State::new(x0.clone(), cfg.keep_path);
    let h = cfg.step();
    for k in 0..cfg.n_steps {
        let t = k as f64 * h;
        let dw = &noise.dw()[k];
        match cfg.scheme {
            Scheme::EulerMaruyama => step::euler_maruyama(&mut st, sde, sigma, t, h, dw, context)?,
            Scheme::Sra1 => {
                let dz = noise
                    .dz()
                    .ok_or_else(|| {
                        Error::config(
                            "scheme",
                            "sra1",
                            "SRA1 needs noise drawn with ΔZ (with_area = true)",
                        )
                    })?
                    .get(k)
                    .ok_or_else(|| Error::shape("number of ΔZ increments", cfg.n_steps, k))?;
                step::sra1(&mut st, sde, sigma, t, h, dw, dz, context)?
            }
        }
    }
    st.finish(batch, h)
}

fn check_inputs(
    sde: &Sde<'_>,
    cfg: &SolverConfig,
    batch: usize,
    dim: usize,
    noise: &BrownianIncrements,
    context: Option<&Tensor>,
) -> Result<()> {
    if noise.shape() != (batch, dim) {
        return Err(Error::shape(
            "noise vs x0 (batch, d)",
            (batch, dim),
            noise.shape(),
        ));
    }
    if noise.n_steps() != cfg.n_steps {
        return Err(Error::config(
            "n_steps",
            cfg.n_steps,
            format!(
                "the noise has {} steps; draw it with the same config",
                noise.n_steps()
            ),
        ));
    }
    let h = cfg.step();
    if (noise.step() - h).abs() > 1e-12 * h.max(1.0) {
        return Err(Error::config(
            "t_end",
            cfg.t_end,
            format!(
                "the noise was drawn with step {} but the grid step is {h}",
                noise.step()
            ),
        ));
    }
    for (name, d) in [("prior drift", sde.prior()), ("control", sde.control())] {
        if let Some(d) = d {
            if d.dim() != dim {
                return Err(Error::shape(
                    format!("{name} dimension vs state"),
                    dim,
                    d.dim(),
                ));
            }
        }
    }
    if let Some(u) = sde.control() {
        match context {
            Some(c) => {
                let want = (batch, u.context_dim());
                if c.dims2().ok() != Some(want) {
                    return Err(Error::shape("context (batch, context_dim)", want, c.dims()));
                }
            }
            None if u.context_dim() > 0 => {
                return Err(Error::shape(
                    "context (batch, context_dim): the control needs a context",
                    (batch, u.context_dim()),
                    "none",
                ))
            }
            None => {}
        }
    }
    Ok(())
}
