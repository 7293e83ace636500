//! The bottom layer: seeded generators, the deep-stack runner, file helpers, small dense
//! linear algebra and the precision setting. Nothing here knows tensors of the SDE.

pub(crate) mod fs;
pub(crate) mod hash;
pub mod limits;
pub(crate) mod linalg;
pub(crate) mod precision;
pub(crate) mod rng;
pub(crate) mod stack;
pub(crate) mod text;
pub(crate) mod threads;
