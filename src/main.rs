//! The `csgate` command line: parses arguments, sets up logging and hands off to the library.
//! Each subcommand lives in its own file under `src/commands/`.

#![forbid(unsafe_code)]

use clap::{Parser, Subcommand};
use std::process::ExitCode;

mod commands;

/// csgate: reconstruct compressively sampled vibration and acoustic sensor streams.
#[derive(Debug, Parser)]
#[command(name = "csgate", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Reconstruct a set of generated windows with the engine and print what it did.
    Demo(commands::demo::DemoArgs),
    /// Welch spectrum and peaks of a signal file (text, one value per line; or raw .f32/.f64).
    Spectrum(commands::spectrum::SpectrumArgs),
    /// Reconstruct one window given as JSON and write the coefficients, signal and report.
    Solve(commands::solve::SolveArgs),
    /// Simulate sensor nodes on machines from a scenario file: packet log or TCP, plus truth.
    Simulate(commands::simulate::SimulateArgs),
    /// Reconstruct packet logs into one continuous HDF5 record.
    Replay(commands::replay::ReplayArgs),
    /// Score a record against the simulator's ground truth (SNR per stream).
    Score(commands::score::ScoreArgs),
    /// Run the gateway daemon from a TOML configuration (ingest, records, metrics, feeds).
    Serve(commands::serve::ServeArgs),
    /// Publish the windows of packet logs to a broker's frames stream (broker mode).
    Publish(commands::publish::PublishArgs),
    /// Measure how many sensor channels this machine reconstructs in real time.
    Bench(commands::bench::BenchArgs),
    /// Bounded load test: simulated nodes at real-time pace into a gateway on loopback.
    Loadtest(commands::loadtest::LoadtestArgs),
    /// Plan samples per window from the L1 phase transition, with the radio payload.
    Plan(commands::plan::PlanArgs),
    /// Summarize a record file per stream (table or JSON) and write PNG plots.
    #[cfg(feature = "hdf5-store")]
    Inspect(commands::inspect::InspectArgs),
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    // The daemon chooses its log format from its configuration.
    if !matches!(cli.command, Command::Serve(_)) {
        init_logging();
    }
    let result = match cli.command {
        Command::Demo(args) => commands::demo::run(args),
        Command::Spectrum(args) => commands::spectrum::run(args),
        Command::Solve(args) => commands::solve::run(args),
        Command::Simulate(args) => commands::simulate::run(args),
        Command::Replay(args) => commands::replay::run(args),
        Command::Score(args) => commands::score::run(args),
        Command::Serve(args) => commands::serve::run(args),
        Command::Publish(args) => commands::publish::run(args),
        Command::Bench(args) => commands::bench::run(args),
        Command::Loadtest(args) => commands::loadtest::run(args),
        Command::Plan(args) => commands::plan::run(args),
        #[cfg(feature = "hdf5-store")]
        Command::Inspect(args) => commands::inspect::run(args),
    };
    match result {
        Ok(code) => code,
        Err(err) => {
            if is_broken_pipe(&err) {
                return ExitCode::SUCCESS;
            }
            eprintln!("csgate: error: {err:#}");
            ExitCode::from(2)
        }
    }
}

fn init_logging() {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_env("CSGATE_LOG").unwrap_or_else(|_| EnvFilter::new("info"));
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .try_init();
}

/// A closed stdout (e.g. piping into `head`) is a normal end, not an error.
fn is_broken_pipe(err: &anyhow::Error) -> bool {
    err.chain().any(|e| {
        e.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}
