//! The built-in time-conditioned multilayer perceptron.

use candle_core::Tensor;
use rand::RngCore;
use serde::{Deserialize, Serialize};

use super::base::{Drift, FusedForm, NetworkParts, Sealed};
use crate::error::{Error, Result};
use crate::nn::ops::{self, Activation};
use crate::nn::params::{Param, ParamBuilder};

/// Shape of a [`TimeMlp`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct MlpConfig {
    /// Units in each hidden layer.
    pub width: usize,
    /// Number of hidden layers (at least 1).
    pub depth: usize,
    /// Nonlinearity after each hidden layer.
    pub activation: Activation,
    /// Start the output layer at zero, so the network starts as the zero function (a control
    /// that starts at zero leaves the uncontrolled process unchanged at the first step).
    pub zero_output: bool,
}

impl Default for MlpConfig {
    fn default() -> Self {
        Self {
            width: 64,
            depth: 2,
            activation: Activation::Silu,
            zero_output: true,
        }
    }
}

impl MlpConfig {
    /// Checks the configuration.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a zero width or depth.
    pub fn validate(&self) -> Result<()> {
        if self.width == 0 {
            return Err(Error::config(
                "width",
                self.width,
                "hidden layers need at least 1 unit",
            ));
        }
        if self.depth == 0 {
            return Err(Error::config(
                "depth",
                self.depth,
                "use at least 1 hidden layer",
            ));
        }
        use crate::util::limits::{at_most, MAX_DEPTH, MAX_WIDTH};
        at_most("width", self.width, MAX_WIDTH, "hidden units")?;
        at_most("depth", self.depth, MAX_DEPTH, "hidden layers")
    }

    /// Number of parameters of a [`TimeMlp`] with this shape on states of dimension `dim`
    /// and contexts of dimension `context_dim` (`None` if it overflows).
    pub(crate) fn parameter_count(&self, dim: usize, context_dim: usize) -> Option<u64> {
        let (w, d, c) = (self.width as u64, dim as u64, context_dim as u64);
        let first = w.checked_mul(d + 1 + c)?.checked_add(w)?;
        let hidden = w
            .checked_mul(w)?
            .checked_add(w)?
            .checked_mul(self.depth.saturating_sub(1) as u64)?;
        let out = d.checked_mul(w)?.checked_add(d)?;
        first.checked_add(hidden)?.checked_add(out)
    }
}

#[derive(Clone)]
struct Dense {
    weight: Param,
    bias: Param,
}

impl Dense {}

/// A multilayer perceptron `f(x, t[, context])` with time entering the first layer.
///
/// The first layer computes `W_x x + W_c c + t w_t + b`: time and context are extra inputs
/// of the first affine map (equivalent to concatenating `[x, t, c]`, without the copy).
/// Hidden layers apply [`MlpConfig::activation`]; the output layer is affine.
///
/// Parameter names under the builder's prefix: `layer{i}.weight`, `layer{i}.bias`,
/// `layer0.weight_t`, `layer0.weight_c` (with a context) and `out.weight`, `out.bias`.
/// Weights are stored `(out, in)` as in candle-nn.
///
/// # Example
/// ```
/// use candle_core::{DType, Device, Tensor};
/// use candle_nn::VarMap;
/// use neural_sde::{generator, Drift, MlpConfig, ParamBuilder, TimeMlp};
///
/// let vm = VarMap::new();
/// let pb = ParamBuilder::new(&vm, DType::F32, &Device::Cpu).pp("control");
/// let mut rng = generator(0, 0);
/// let net = TimeMlp::new(&MlpConfig::default(), 3, 0, &pb, &mut rng)?;
/// let x = Tensor::zeros((5, 3), DType::F32, &Device::Cpu)?;
/// assert_eq!(net.forward(&x, 0.5, None)?.dims(), &[5, 3]);
/// # Ok::<(), neural_sde::Error>(())
/// ```
#[derive(Clone)]
pub struct TimeMlp {
    dim: usize,
    context_dim: usize,
    activation: Activation,
    first: Dense,
    weight_t: Param,
    weight_c: Option<Param>,
    hidden: Vec<Dense>,
    out: Dense,
}

impl std::fmt::Debug for TimeMlp {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TimeMlp")
            .field("dim", &self.dim)
            .field("context_dim", &self.context_dim)
            .field("depth", &(self.hidden.len() + 1))
            .finish()
    }
}

impl TimeMlp {
    /// Builds (or reuses, when the names already exist in the `VarMap`) the parameters of a
    /// network on states of dimension `dim` with a context of dimension `context_dim`
    /// (0 for none). New weights are drawn uniformly in ±1/√fan_in from `rng`.
    ///
    /// # Errors
    /// [`Error::InvalidConfig`] for a bad config or `dim == 0`; [`Error::Shape`] if existing
    /// parameters have other shapes.
    pub fn new(
        cfg: &MlpConfig,
        dim: usize,
        context_dim: usize,
        pb: &ParamBuilder,
        rng: &mut dyn RngCore,
    ) -> Result<Self> {
        cfg.validate()?;
        if dim == 0 {
            return Err(Error::config(
                "dim",
                dim,
                "the state needs at least 1 dimension",
            ));
        }
        let w = cfg.width;
        let fan_in = (dim + 1 + context_dim) as f64;
        let bound = 1.0 / fan_in.sqrt();
        let l0 = pb.pp("layer0");
        let first = Dense {
            weight: l0.uniform(&[w, dim], "weight", bound, rng)?,
            bias: l0.uniform(&[w], "bias", bound, rng)?,
        };
        let weight_t = l0.uniform(&[w], "weight_t", bound, rng)?;
        let weight_c = if context_dim > 0 {
            Some(l0.uniform(&[w, context_dim], "weight_c", bound, rng)?)
        } else {
            None
        };
        let bound = 1.0 / (w as f64).sqrt();
        let mut hidden = Vec::with_capacity(cfg.depth - 1);
        for i in 1..cfg.depth {
            let li = pb.pp(&format!("layer{i}"));
            hidden.push(Dense {
                weight: li.uniform(&[w, w], "weight", bound, rng)?,
                bias: li.uniform(&[w], "bias", bound, rng)?,
            });
        }
        let lo = pb.pp("out");
        let out = if cfg.zero_output {
            Dense {
                weight: lo.zeros(&[dim, w], "weight")?,
                bias: lo.zeros(&[dim], "bias")?,
            }
        } else {
            Dense {
                weight: lo.uniform(&[dim, w], "weight", bound, rng)?,
                bias: lo.uniform(&[dim], "bias", bound, rng)?,
            }
        };
        Ok(Self {
            dim,
            context_dim,
            activation: cfg.activation,
            first,
            weight_t,
            weight_c,
            hidden,
            out,
        })
    }
}

impl TimeMlp {
    /// The network's shape and parameters in the fused kernel's packing order.
    pub(crate) fn parts(&self) -> NetworkParts {
        let mut params = vec![self.first.weight.tensor().clone()];
        params.extend(self.weight_c.iter().map(|w| w.tensor().clone()));
        params.push(self.first.bias.tensor().clone());
        params.push(self.weight_t.tensor().clone());
        for l in &self.hidden {
            params.push(l.weight.tensor().clone());
            params.push(l.bias.tensor().clone());
        }
        params.push(self.out.weight.tensor().clone());
        params.push(self.out.bias.tensor().clone());
        NetworkParts {
            dim: self.dim,
            context_dim: self.context_dim,
            width: self.first.bias.dims1().unwrap_or(0),
            depth: self.hidden.len() + 1,
            activation: self.activation,
            params,
        }
    }
}

impl Drift for TimeMlp {
    fn fused_form(&self, _token: Sealed) -> Option<FusedForm<'_>> {
        Some(FusedForm {
            network: self.parts(),
            feedback: None,
        })
    }

    fn dim(&self) -> usize {
        self.dim
    }

    fn context_dim(&self) -> usize {
        self.context_dim
    }

    fn forward(&self, x: &Tensor, t: f64, context: Option<&Tensor>) -> candle_core::Result<Tensor> {
        // The time enters as a bias shift b + t·w_t: one tiny op on (width,) per call.
        let bias = (self.first.bias.tensor() + self.weight_t.affine(t, 0.0)?)?;
        let mut h = x.matmul(&self.first.weight.t()?)?;
        match (&self.weight_c, context) {
            (Some(wc), Some(c)) => h = (h + c.matmul(&wc.t()?)?)?,
            (Some(_), None) => candle_core::bail!(
                "this network expects a context of dimension {} per path, none was given",
                self.context_dim
            ),
            (None, _) => {}
        }
        h = ops::bias_act(&h, &bias, self.activation)?;
        for layer in &self.hidden {
            h = ops::dense(&h, &layer.weight, &layer.bias, self.activation)?;
        }
        ops::linear(&h, &self.out.weight, Some(&self.out.bias))
    }
}
