//! A process group made of threads, for testing data-parallel training without MPI: each
//! thread plays one process, and sums are taken in rank order, as a fixed-order allreduce.

use std::sync::{Arc, Barrier, Mutex};

use neural_sde::{Collective, Error, Result};

struct Hub {
    barrier: Barrier,
    slots: Mutex<Vec<Vec<f64>>>,
    bytes: Mutex<Vec<u8>>,
}

/// One member of a group of threads.
pub struct ThreadGroup {
    rank: usize,
    size: usize,
    hub: Arc<Hub>,
}

impl std::fmt::Debug for ThreadGroup {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "ThreadGroup({} of {})", self.rank, self.size)
    }
}

/// `size` members, one per thread.
pub fn group(size: usize) -> Vec<ThreadGroup> {
    let hub = Arc::new(Hub {
        barrier: Barrier::new(size),
        slots: Mutex::new(vec![Vec::new(); size]),
        bytes: Mutex::new(Vec::new()),
    });
    (0..size)
        .map(|rank| ThreadGroup {
            rank,
            size,
            hub: hub.clone(),
        })
        .collect()
}

impl ThreadGroup {
    fn sum_with(&self, buf: &[f64], add: impl Fn(f64, f64) -> f64) -> Vec<f64> {
        self.hub.slots.lock().unwrap()[self.rank] = buf.to_vec();
        self.hub.barrier.wait();
        let out = {
            let slots = self.hub.slots.lock().unwrap();
            let mut acc = slots[0].clone();
            for s in &slots[1..] {
                for (a, b) in acc.iter_mut().zip(s) {
                    *a = add(*a, *b);
                }
            }
            acc
        };
        self.hub.barrier.wait();
        out
    }
}

impl Collective for ThreadGroup {
    fn rank(&self) -> usize {
        self.rank
    }

    fn size(&self) -> usize {
        self.size
    }

    fn sum_f32(&self, buf: &mut [f32]) -> Result<()> {
        let wide: Vec<f64> = buf.iter().map(|&x| f64::from(x)).collect();
        let out = self.sum_with(&wide, |a, b| f64::from(a as f32 + b as f32));
        for (b, o) in buf.iter_mut().zip(out) {
            *b = o as f32;
        }
        Ok(())
    }

    fn sum_f64(&self, buf: &mut [f64]) -> Result<()> {
        let out = self.sum_with(buf, |a, b| a + b);
        buf.copy_from_slice(&out);
        Ok(())
    }

    fn broadcast(&self, bytes: &mut Vec<u8>, root: usize) -> Result<()> {
        if root >= self.size {
            return Err(Error::Collective(format!("no process {root}")));
        }
        if self.rank == root {
            *self.hub.bytes.lock().unwrap() = bytes.clone();
        }
        self.hub.barrier.wait();
        if self.rank != root {
            *bytes = self.hub.bytes.lock().unwrap().clone();
        }
        self.hub.barrier.wait();
        Ok(())
    }
}
