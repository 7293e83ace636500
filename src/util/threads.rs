//! How many threads the numerical work uses.

use crate::error::{Error, Result};

/// Sets the number of threads of the numerical work to `n`: candle's matrix products read
/// `RAYON_NUM_THREADS` on every call, and the fused kernel and noise generation run on
/// rayon's global pool, which is built here with `n` threads. Call it once, at the start of
/// the program, before any other thread runs (it sets an environment variable). Results do
/// not depend on `n`: work is split by rows or blocks of paths whose sums are taken in a
/// fixed order.
///
/// # Errors
/// [`Error::InvalidConfig`] for `n == 0`, or when rayon's pool already runs with another
/// number of threads.
pub fn set_threads(n: usize) -> Result<()> {
    if n == 0 {
        return Err(Error::config("threads", 0, "use at least 1 thread"));
    }
    crate::util::limits::at_most("threads", n, 1024, "threads")?;
    std::env::set_var("RAYON_NUM_THREADS", n.to_string());
    if rayon::ThreadPoolBuilder::new()
        .num_threads(n)
        .build_global()
        .is_err()
        && rayon::current_num_threads() != n
    {
        return Err(Error::config(
            "threads",
            n,
            format!(
                "rayon's thread pool already runs {} threads; set the thread count before any parallel work starts",
                rayon::current_num_threads()
            ),
        ));
    }
    Ok(())
}
