//! Creating parameters in a candle [`VarMap`] from the library's seeded generator, and the
//! frozen mode in which they build no autodiff graph.
//!
//! candle-nn's initialisers draw from an unseeded generator. [`ParamBuilder`] creates each
//! parameter as a `Var` in the user's `VarMap` (so candle's tools keep working) with values
//! drawn from a [`crate::Generator`]. A parameter that already exists under the same name is
//! reused, which is how a model is rebuilt over loaded weights.
//!
//! Each parameter is handed out as a [`Param`]: it dereferences to the variable's tensor, or,
//! inside [`frozen`], to a detached view of the same storage, so inference (evaluation,
//! generation, `log Z` estimates) records no autodiff graph for any drift whose parameters
//! come from a builder, built-in or custom, and always reads the current values.

use std::cell::Cell;

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarMap;
use rand::{Rng, RngCore};

use crate::error::{Error, Result};

thread_local! {
    static FROZEN_DEPTH: Cell<usize> = const { Cell::new(0) };
}

/// Runs `f` with every [`Param`] read as a tensor without autodiff history (on this thread;
/// calls nest). The crate's inference entry points run inside it.
///
/// # Example
/// ```
/// use candle_core::{DType, Device};
/// use candle_nn::VarMap;
/// use neural_sde::{frozen, ParamBuilder};
///
/// let vm = VarMap::new();
/// let w = ParamBuilder::new(&vm, DType::F32, &Device::Cpu).zeros(&[2], "w")?;
/// assert!(w.track_op()); // a variable: operations on it are recorded
/// assert!(!frozen(|| w.track_op())); // inside `frozen`: a detached view
/// # Ok::<(), neural_sde::Error>(())
/// ```
pub fn frozen<T>(f: impl FnOnce() -> T) -> T {
    struct Restore;
    impl Drop for Restore {
        fn drop(&mut self) {
            FROZEN_DEPTH.with(|d| d.set(d.get().saturating_sub(1)));
        }
    }
    FROZEN_DEPTH.with(|d| d.set(d.get() + 1));
    let _restore = Restore;
    f()
}

/// Whether this thread is inside [`frozen`].
pub fn is_frozen() -> bool {
    FROZEN_DEPTH.with(|d| d.get() > 0)
}

/// A trainable parameter: the tensor of a `Var`, read without autodiff history inside
/// [`frozen`]. It dereferences to a [`Tensor`], so it is used like one.
#[derive(Clone)]
pub struct Param {
    tracked: Tensor,
    detached: Tensor,
}

impl Param {
    /// Wraps a tensor (a variable's, or a constant that never needs gradients).
    pub(crate) fn new(tracked: Tensor) -> Self {
        let detached = tracked.detach();
        Self { tracked, detached }
    }

    /// The tensor in the current mode (the same as dereferencing).
    pub fn tensor(&self) -> &Tensor {
        if is_frozen() {
            &self.detached
        } else {
            &self.tracked
        }
    }
}

impl std::ops::Deref for Param {
    type Target = Tensor;
    fn deref(&self) -> &Tensor {
        self.tensor()
    }
}

impl std::fmt::Debug for Param {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Param({:?})", self.tracked.dims())
    }
}

/// Hands out named parameters from a [`VarMap`], with dotted name prefixes.
#[derive(Clone)]
pub struct ParamBuilder {
    varmap: VarMap,
    prefix: String,
    dtype: DType,
    device: Device,
}

impl std::fmt::Debug for ParamBuilder {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ParamBuilder")
            .field("prefix", &self.prefix)
            .field("dtype", &self.dtype)
            .finish()
    }
}

impl ParamBuilder {
    /// A builder over `varmap` (cloning a `VarMap` shares it) creating `dtype` parameters.
    pub fn new(varmap: &VarMap, dtype: DType, device: &Device) -> Self {
        Self {
            varmap: varmap.clone(),
            prefix: String::new(),
            dtype,
            device: device.clone(),
        }
    }

    /// A builder whose names are prefixed by `name.` (push prefix).
    pub fn pp(&self, name: &str) -> Self {
        let prefix = if self.prefix.is_empty() {
            name.to_string()
        } else {
            format!("{}.{name}", self.prefix)
        };
        Self {
            prefix,
            ..self.clone()
        }
    }

    /// The parameter dtype.
    pub fn dtype(&self) -> DType {
        self.dtype
    }

    /// The device parameters live on.
    pub fn device(&self) -> &Device {
        &self.device
    }

    /// The shared `VarMap`.
    pub fn varmap(&self) -> &VarMap {
        &self.varmap
    }

    /// The full dotted name of `name` under this builder's prefix.
    pub fn full_name(&self, name: &str) -> String {
        if self.prefix.is_empty() {
            name.to_string()
        } else {
            format!("{}.{name}", self.prefix)
        }
    }

    /// Returns the parameter `name`, creating it with `values()` if it does not exist yet.
    ///
    /// # Errors
    /// [`Error::Shape`] if a parameter of that name exists with another shape.
    pub fn get_or_init(
        &self,
        shape: &[usize],
        name: &str,
        values: impl FnOnce(usize) -> Vec<f64>,
    ) -> Result<Param> {
        let full = self.full_name(name);
        let mut map = self
            .varmap
            .data()
            .lock()
            .map_err(|_| Error::Training("parameter map lock poisoned by a panic".into()))?;
        if let Some(var) = map.get(&full) {
            if var.dims() != shape {
                return Err(Error::shape(format!("parameter {full}"), shape, var.dims()));
            }
            return Ok(Param::new(var.as_tensor().clone()));
        }
        let n: usize = shape.iter().product();
        let t = Tensor::from_vec(values(n), shape, &self.device)?.to_dtype(self.dtype)?;
        let var = Var::from_tensor(&t)?;
        let out = Param::new(var.as_tensor().clone());
        map.insert(full, var);
        Ok(out)
    }

    /// A parameter filled with zeros.
    pub fn zeros(&self, shape: &[usize], name: &str) -> Result<Param> {
        self.get_or_init(shape, name, |n| vec![0.0; n])
    }

    /// A parameter filled with one constant.
    pub fn constant(&self, shape: &[usize], name: &str, value: f64) -> Result<Param> {
        self.get_or_init(shape, name, |n| vec![value; n])
    }

    /// A parameter drawn uniformly from `[-bound, bound]`.
    pub fn uniform(
        &self,
        shape: &[usize],
        name: &str,
        bound: f64,
        rng: &mut dyn RngCore,
    ) -> Result<Param> {
        self.get_or_init(shape, name, |n| {
            (0..n).map(|_| rng.random_range(-bound..=bound)).collect()
        })
    }
}

/// All variables of `varmap` sorted by name (candle's own order is a random hash order).
pub fn sorted_vars(varmap: &VarMap) -> Result<Vec<(String, Var)>> {
    let map = varmap
        .data()
        .lock()
        .map_err(|_| Error::Training("parameter map lock poisoned by a panic".into()))?;
    let mut vars: Vec<(String, Var)> = map.iter().map(|(k, v)| (k.clone(), v.clone())).collect();
    vars.sort_by(|a, b| a.0.cmp(&b.0));
    Ok(vars)
}
