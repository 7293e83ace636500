//! The group of one process.

use super::reduce::Collective;
use crate::error::{Error, Result};

/// One process alone: sums and broadcasts leave the buffers as they are.
#[derive(Debug, Clone, Copy, Default)]
pub struct SingleProcess;

impl Collective for SingleProcess {
    fn rank(&self) -> usize {
        0
    }

    fn size(&self) -> usize {
        1
    }

    fn sum_f32(&self, _buf: &mut [f32]) -> Result<()> {
        Ok(())
    }

    fn sum_f64(&self, _buf: &mut [f64]) -> Result<()> {
        Ok(())
    }

    fn broadcast(&self, _bytes: &mut Vec<u8>, root: usize) -> Result<()> {
        if root == 0 {
            Ok(())
        } else {
            Err(Error::Collective(format!(
                "broadcast from process {root} in a group of one process"
            )))
        }
    }
}
