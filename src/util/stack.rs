//! Running deep autodiff graphs on a thread with a large stack.
//!
//! candle's topological sort in `backward` and the drop of a tensor graph are recursive, so
//! a graph with thousands of solver steps overflows a default 2 MiB thread stack (an abort
//! that cannot be caught). Every library entry point that builds, differentiates or drops a
//! whole-path graph runs its work through [`run_deep`]. The stack is virtual memory: only
//! the pages actually touched are committed.

use crate::error::{Error, Result};

/// Stack size for threads that hold whole-path autodiff graphs (512 MiB virtual).
pub const DEEP_STACK_BYTES: usize = 512 << 20;

/// Runs `f` on a scoped thread with a [`DEEP_STACK_BYTES`] stack and returns its result.
///
/// A panic inside `f` is resumed on the calling thread.
pub fn run_deep<T: Send>(f: impl FnOnce() -> T + Send) -> Result<T> {
    std::thread::scope(|scope| {
        let handle = std::thread::Builder::new()
            .name("neural-sde-deep".into())
            .stack_size(DEEP_STACK_BYTES)
            .spawn_scoped(scope, f)
            .map_err(Error::Io)?;
        match handle.join() {
            Ok(v) => Ok(v),
            Err(panic) => std::panic::resume_unwind(panic),
        }
    })
}
