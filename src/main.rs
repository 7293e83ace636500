//! The `neural-sde` command-line tool: fit, evaluate, sample and inspect latent-diffusion
//! models of CSV tables.

// A small, fast allocator: glibc malloc returns memory to the OS and page-faults on the
// solver's many short-lived tensors.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

mod cli;

fn main() {
    // candle re-reads the CPU count on every matrix product unless this is set; one thread
    // suits the small networks used here.
    if std::env::var_os("RAYON_NUM_THREADS").is_none() {
        std::env::set_var("RAYON_NUM_THREADS", "1");
    }
    std::process::exit(cli::run());
}
