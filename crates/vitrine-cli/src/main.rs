//! The `vitrine` command line: parses arguments, calls the engine, prints.

mod args;
mod collection;
mod commands;
mod output;
mod progress;
mod reports;
mod session;
mod settings;

use std::io;
use std::process::ExitCode;

use clap::Parser;

use crate::args::Cli;

// The forward pass allocates and frees tensors of megabytes many times per
// image; the system allocator returns them to the kernel each time and pays
// page faults to get them back (a quarter of the run time in profiles).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() -> ExitCode {
    let cli = Cli::parse();
    // The thread count must be set before anything touches the rayon pool;
    // candle's matrix multiplications read it too.
    if let Some(jobs) = cli.global.jobs {
        std::env::set_var("RAYON_NUM_THREADS", jobs.max(1).to_string());
    }
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("VITRINE_LOG")
                // sled logs its own failures at ERROR; vitrine reports them itself.
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("warn,sled=off")),
        )
        .with_writer(io::stderr)
        .init();
    match commands::run(cli) {
        Ok(code) => code,
        Err(err) => {
            // Output piped into `head` closes early: not an error.
            if err
                .chain()
                .filter_map(|cause| cause.downcast_ref::<io::Error>())
                .any(|e| e.kind() == io::ErrorKind::BrokenPipe)
            {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {}", vitrine_engine::error::describe(err.as_ref()));
            ExitCode::from(2)
        }
    }
}
