//! Creating parameters in a candle [`VarMap`] from the library's seeded generator.
//!
//! candle-nn's initialisers draw from an unseeded generator. [`ParamBuilder`] creates each
//! parameter as a `Var` in the user's `VarMap` (so candle's tools keep working) with values
//! drawn from a [`crate::Generator`]. A parameter that already exists under the same name is
//! reused, which is how a model is rebuilt over loaded weights.

use candle_core::{DType, Device, Tensor, Var};
use candle_nn::VarMap;
use rand::{Rng, RngCore};

use crate::error::{Error, Result};

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
    ) -> Result<Tensor> {
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
            return Ok(var.as_tensor().clone());
        }
        let n: usize = shape.iter().product();
        let t = Tensor::from_vec(values(n), shape, &self.device)?.to_dtype(self.dtype)?;
        let var = Var::from_tensor(&t)?;
        let out = var.as_tensor().clone();
        map.insert(full, var);
        Ok(out)
    }

    /// A parameter filled with zeros.
    pub fn zeros(&self, shape: &[usize], name: &str) -> Result<Tensor> {
        self.get_or_init(shape, name, |n| vec![0.0; n])
    }

    /// A parameter filled with one constant.
    pub fn constant(&self, shape: &[usize], name: &str, value: f64) -> Result<Tensor> {
        self.get_or_init(shape, name, |n| vec![value; n])
    }

    /// A parameter drawn uniformly from `[-bound, bound]`.
    pub fn uniform(
        &self,
        shape: &[usize],
        name: &str,
        bound: f64,
        rng: &mut dyn RngCore,
    ) -> Result<Tensor> {
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
