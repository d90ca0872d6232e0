//! The `kiln` command line: parses arguments and calls the library.

mod cli;

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let args = cli::Cli::parse();
    if std::env::var("KILN_CONV").is_ok_and(|v| v == "candle") {
        kiln::kernels::conv::set_backend(kiln::kernels::conv::ConvBackend::Candle);
    }
    match cli::run(args) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
