//! The `kiln` command line: parses arguments and calls the library.

mod cli;

use std::process::ExitCode;

use clap::Parser;

/// Freed buffers are kept for reuse instead of being returned to the system at once: training
/// and decoding allocate megabyte tensors every layer, and with the system allocator each one
/// came back as fresh pages, page-faulted on first touch (measured: ~20% of a GDN backward pass).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() -> ExitCode {
    // Like other Unix tools, end quietly when the reader of our output goes away
    // (`kiln inspect default | head`) instead of panicking on the failed write.
    #[cfg(unix)]
    // SAFETY: restoring the default disposition of SIGPIPE before any thread exists.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    kiln::allocator::keep_freed_memory();
    let args = cli::Cli::parse();
    match std::env::var("KILN_CONV").as_deref() {
        Ok("candle") => kiln::kernels::conv::set_backend(kiln::kernels::conv::ConvBackend::Candle),
        Ok("gemm") => kiln::kernels::conv::set_backend(kiln::kernels::conv::ConvBackend::GemmOnly),
        _ => {}
    }
    match cli::run(args) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
