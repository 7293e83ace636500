//! The reduction interface every process group implements.

use crate::error::Result;

/// A group of processes that reduce buffers together. Every process of the group must make
/// the same calls in the same order with buffers of the same length (as with MPI's
/// collective operations); the single-process group returns at once.
///
/// The trait is object safe: trainers hold a `Box<dyn Collective>`.
pub trait Collective: std::fmt::Debug {
    /// This process's index, `0..size()`.
    fn rank(&self) -> usize;
    /// The number of processes.
    fn size(&self) -> usize;
    /// Replaces `buf` on every process by the elementwise sum of every process's `buf`.
    ///
    /// # Errors
    /// [`crate::Error::Collective`] when the reduction fails.
    fn sum_f32(&self, buf: &mut [f32]) -> Result<()>;
    /// As [`Collective::sum_f32`] for `f64` values.
    ///
    /// # Errors
    /// As [`Collective::sum_f32`].
    fn sum_f64(&self, buf: &mut [f64]) -> Result<()>;
    /// Replaces `bytes` on every process by the bytes of process `root` (the lengths may
    /// differ before the call).
    ///
    /// # Errors
    /// [`crate::Error::Collective`] when the broadcast fails or `root` is not a rank.
    fn broadcast(&self, bytes: &mut Vec<u8>, root: usize) -> Result<()>;
}

/// A shared group: the program keeps one handle (to agree on errors, say) while a trainer
/// holds another.
impl<T: Collective + ?Sized> Collective for std::rc::Rc<T> {
    fn rank(&self) -> usize {
        (**self).rank()
    }

    fn size(&self) -> usize {
        (**self).size()
    }

    fn sum_f32(&self, buf: &mut [f32]) -> Result<()> {
        (**self).sum_f32(buf)
    }

    fn sum_f64(&self, buf: &mut [f64]) -> Result<()> {
        (**self).sum_f64(buf)
    }

    fn broadcast(&self, bytes: &mut Vec<u8>, root: usize) -> Result<()> {
        (**self).broadcast(bytes, root)
    }
}
