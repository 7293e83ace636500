//! Reuse of the kernel's large buffers between calls.
//!
//! A training step allocates the tape (tens of MB) and frees it after the backward pass;
//! allocating it afresh every step costs page faults and zero-filling that were measured at
//! a quarter of the step time. Freed buffers wait here for the next call instead, up to
//! [`MAX_POOLED_BYTES`] in all; buffers handed out keep whatever values they held, so every
//! user overwrites its buffer before reading it.

use std::sync::Mutex;

/// Most bytes kept for reuse (larger tapes are freed as usual).
pub(crate) const MAX_POOLED_BYTES: usize = 512 << 20;

/// A pool of buffers of one element type.
pub(crate) struct Pool<T> {
    free: Mutex<Vec<Vec<T>>>,
}

impl<T: Copy + Default> Pool<T> {
    pub const fn new() -> Self {
        Self {
            free: Mutex::new(Vec::new()),
        }
    }

    /// A buffer of `len` elements with unspecified (but initialised) contents.
    pub fn take(&self, len: usize) -> Vec<T> {
        let found = self.free.lock().ok().and_then(|mut free| {
            let best = free
                .iter()
                .enumerate()
                .filter(|(_, v)| v.capacity() >= len)
                .min_by_key(|(_, v)| v.capacity())
                .map(|(i, _)| i)?;
            Some(free.swap_remove(best))
        });
        match found {
            Some(mut v) => {
                v.truncate(len);
                v.resize(len, T::default());
                v
            }
            None => vec![T::default(); len],
        }
    }

    /// Returns a buffer for reuse (or frees it when the pool is full).
    pub fn give(&self, v: Vec<T>) {
        if v.capacity() == 0 {
            return;
        }
        if let Ok(mut free) = self.free.lock() {
            let held: usize = free.iter().map(Vec::capacity).sum();
            if (held + v.capacity()) * std::mem::size_of::<T>() <= MAX_POOLED_BYTES {
                free.push(v);
            }
        }
    }
}
