//! `csgate demo`: runs the reconstruction engine on generated windows and prints the figures.

use clap::Args;
use std::process::ExitCode;

/// Options of `csgate demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Number of windows to reconstruct.
    #[arg(long, default_value_t = 20)]
    pub windows: usize,
}

/// Runs the demo.
pub fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    println!("demo: {} windows (engine not wired yet)", args.windows);
    Ok(ExitCode::SUCCESS)
}
