//! The `neural-sde` command-line tool: fit, evaluate, sample and inspect latent-diffusion
//! models of CSV tables.

// A small, fast allocator: glibc malloc returns memory to the OS and page-faults on the
// solver's many short-lived tensors.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

mod cli;

fn main() {
    // The thread count (`--threads`, else `RAYON_NUM_THREADS`, else a default by workload)
    // is set in `cli::run` before any numerical work.
    std::process::exit(cli::run());
}
