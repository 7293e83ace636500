//! A prior drift architecture of your own, trained through the crate's trainer: a residual
//! network with a sinusoidal time embedding.
//!
//! Run with `cargo run --release --example custom_drift`.

use std::sync::Arc;

use candle_core::{Tensor, D};
use neural_sde::ops::linear;
use neural_sde::{
    builtin_demo, Activation, Drift, EvalOptions, LatentConfig, Param, ParamBuilder, PriorFactory,
    TabularModel, TrainConfig, Trainer,
};
use rand::RngCore;

/// `b(z, t) = W_out h_K`, `h_0 = W_in [z, e(t)]`, `h_{k+1} = h_k + W_k silu(h_k)`, where
/// `e(t) = (sin(ω_j t), cos(ω_j t))_j` with frequencies ω_j = π·2^j. Parameters are
/// [`Param`]s from the builder, so evaluation and generation build no autodiff graph.
struct ResidualDrift {
    dim: usize,
    freqs: Vec<f64>,
    w_in: Param,
    b_in: Param,
    blocks: Vec<(Param, Param)>,
    w_out: Param,
    b_out: Param,
}

impl ResidualDrift {
    fn new(pb: &ParamBuilder, dim: usize, rng: &mut dyn RngCore) -> neural_sde::Result<Self> {
        let (width, blocks, n_freq) = (64usize, 3usize, 4usize);
        let freqs = (0..n_freq)
            .map(|j| std::f64::consts::PI * 2f64.powi(j as i32))
            .collect();
        let fan_in = dim + 2 * n_freq;
        let b = 1.0 / (fan_in as f64).sqrt();
        let w_in = pb.uniform(&[width, fan_in], "in.weight", b, rng)?;
        let b_in = pb.zeros(&[width], "in.bias")?;
        let b = 1.0 / (width as f64).sqrt();
        let blocks = (0..blocks)
            .map(|k| {
                let p = pb.pp(&format!("block{k}"));
                // Small residual branches keep the network close to linear at the start.
                Ok((
                    p.uniform(&[width, width], "weight", 0.1 * b, rng)?,
                    p.zeros(&[width], "bias")?,
                ))
            })
            .collect::<neural_sde::Result<_>>()?;
        // Zero output: the drift starts at zero, so the model starts at its Gaussian fit.
        let w_out = pb.zeros(&[dim, width], "out.weight")?;
        let b_out = pb.zeros(&[dim], "out.bias")?;
        Ok(Self {
            dim,
            freqs,
            w_in,
            b_in,
            blocks,
            w_out,
            b_out,
        })
    }

    fn embed(&self, t: f64, batch: usize, like: &Tensor) -> candle_core::Result<Tensor> {
        let e: Vec<f64> = self
            .freqs
            .iter()
            .flat_map(|w| [(w * t).sin(), (w * t).cos()])
            .collect();
        let n = e.len();
        Tensor::from_vec(e, (1, n), like.device())?
            .to_dtype(like.dtype())?
            .broadcast_as((batch, n))?
            .contiguous()
    }
}

impl Drift for ResidualDrift {
    fn dim(&self) -> usize {
        self.dim
    }

    fn forward(
        &self,
        z: &Tensor,
        t: f64,
        _context: Option<&Tensor>,
    ) -> candle_core::Result<Tensor> {
        let input = Tensor::cat(&[z, &self.embed(t, z.dim(0)?, z)?], D::Minus1)?;
        let mut h = linear(&input, &self.w_in, Some(self.b_in.tensor()))?;
        for (w, b) in &self.blocks {
            h = (&h + linear(&Activation::Silu.apply(&h)?, w, Some(b.tensor()))?)?;
        }
        linear(&h, &self.w_out, Some(self.b_out.tensor()))
    }
}

fn main() -> neural_sde::Result<()> {
    let table = builtin_demo()?;
    let factory: PriorFactory =
        Arc::new(|pb, dim, rng| Ok(Box::new(ResidualDrift::new(pb, dim, rng)?) as Box<dyn Drift>));
    let train = TrainConfig {
        epochs: 40,
        ..TrainConfig::default()
    };
    let mut trainer = Trainer::with_prior(&table, LatentConfig::default(), train, factory.clone())?;
    let report = trainer.fit()?;
    println!(
        "trained {} epochs ({:?}), kept epoch {}",
        report.epochs, report.termination, report.best_epoch
    );
    let path = std::env::temp_dir().join("custom_drift.safetensors");
    trainer.save(&path)?;
    let model = TabularModel::load_with_prior(&path, &factory)?;
    let e = model.evaluate(&table, EvalOptions::new(32, 0))?;
    println!(
        "log-likelihood per dimension on the demo table: {:.4} (ELBO {:.4})",
        e.loglik_per_dim, e.elbo_per_dim
    );
    Ok(())
}
