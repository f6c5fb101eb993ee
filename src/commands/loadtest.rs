//! `csgate loadtest`: the bounded load test (`csgate::loadtest`) from the command line.

use anyhow::Context;
use clap::Args;
use csgate::loadtest::{self, LoadOptions};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

/// Options of `csgate loadtest`.
#[derive(Debug, Args)]
#[command(
    about = "Bounded load test: simulated nodes at real-time pace into a gateway on loopback",
    long_about = "Runs a gateway in this process on loopback (127.0.0.1, ports chosen by the \
system; records in a scratch folder) and plays --nodes sensor nodes against it at real-time pace \
for --duration seconds, then stops the nodes, drains the gateway, reads the records back and \
balances the books: frames sent = frames accepted + frames rejected (by reason); windows accepted \
= window rows in the records + failed + duplicates + late + discarded at shutdown; windows \
generated = windows sent + windows the nodes dropped because their send buffer was full. While it \
runs it scrapes /metrics every second for the queue depths and samples the resident set; prints \
them with the peak RSS (--json: one JSON object). Each node keeps at most --in-flight frames \
unacknowledged and --buffer windows waiting; a node that cannot send drops its oldest windows and \
counts them. --corrupt flips one bit in that share of frames (the gateway must reject them and \
close the connection; the node reconnects). Exit status 1 when a book does not balance.\n\n\
The defaults (100 nodes of 1280 Hz, n = 1024, hop 512, m = 256: 250 windows/s) fit the \
shared 2-core development machine with room to spare (BENCHMARKS.md section 9); full-rate nodes \
(--sample-rate 25600 --n 4096: 1250 windows/s for 100 nodes) exceed it several times over and show \
back-pressure at work instead: the queues fill to their bounds, the nodes' buffers overflow, and \
every window they drop is counted."
)]
pub struct LoadtestArgs {
    /// Simulated nodes (one connection and one channel each).
    #[arg(long, default_value_t = 100, value_name = "N")]
    pub nodes: usize,
    /// Seconds of load at real-time pace (at most 3600).
    #[arg(long, default_value_t = 60.0, value_name = "SECONDS")]
    pub duration: f64,
    /// Sample rate of each node's ADC grid, Hz.
    #[arg(long, default_value_t = 1280.0, value_name = "HZ")]
    pub sample_rate: f64,
    /// Window length n.
    #[arg(long, default_value_t = 1024, value_name = "N")]
    pub n: u32,
    /// Hop between windows (default n/2).
    #[arg(long, value_name = "N")]
    pub hop: Option<u32>,
    /// Samples per window m (default n/4).
    #[arg(long, value_name = "M")]
    pub m: Option<u32>,
    /// Solver worker threads of the gateway (default: the number of cores).
    #[arg(long, value_name = "N")]
    pub workers: Option<usize>,
    /// Frames a node may have unacknowledged.
    #[arg(long, default_value_t = 8, value_name = "N")]
    pub in_flight: usize,
    /// Windows a node holds while it cannot send; older ones are dropped (and counted).
    #[arg(long = "buffer", default_value_t = 64, value_name = "WINDOWS")]
    pub buffer_windows: u64,
    /// Share of frames sent with one bit flipped.
    #[arg(long, default_value_t = 0.001, value_name = "P")]
    pub corrupt: f64,
    /// Seed of the node signals and the corruption.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Keep the records in this folder (created; must not hold records) instead of a scratch
    /// folder that is removed.
    #[arg(long, value_name = "DIR")]
    pub records: Option<PathBuf>,
    /// Print one JSON object instead of the text report.
    #[arg(long)]
    pub json: bool,
}

/// Runs the load test.
pub fn run(args: LoadtestArgs) -> anyhow::Result<ExitCode> {
    if !(args.duration.is_finite() && args.duration > 0.0) {
        anyhow::bail!("--duration must be a positive number of seconds");
    }
    let scratch = tempfile::Builder::new()
        .prefix("csgate-loadtest-")
        .tempdir()
        .context("cannot make a scratch folder")?;
    let folder = match &args.records {
        Some(dir) => {
            if dir.join(csgate::store::INDEX_FILE).exists() {
                anyhow::bail!(
                    "{} already holds a record series; give a new folder",
                    dir.display()
                );
            }
            dir.clone()
        }
        None => scratch.path().join("records"),
    };
    let opts = LoadOptions {
        nodes: args.nodes,
        duration: Duration::from_secs_f64(args.duration.min(1e6)),
        sample_rate_hz: args.sample_rate,
        window_len: args.n,
        hop_len: args.hop.unwrap_or(args.n / 2),
        m: args.m.unwrap_or(args.n / 4),
        workers: args.workers.unwrap_or_else(|| {
            std::thread::available_parallelism()
                .map(|n| n.get())
                .unwrap_or(1)
        }),
        in_flight: args.in_flight,
        buffer_windows: args.buffer_windows,
        corrupt_p: args.corrupt,
        seed: args.seed,
        sample_every: Duration::from_secs(1),
        folder,
    };
    opts.check().map_err(anyhow::Error::msg)?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    let report = runtime.block_on(loadtest::run(opts)).context("load test")?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", loadtest::render(&report));
    }
    Ok(if report.balanced() {
        ExitCode::SUCCESS
    } else {
        eprintln!("csgate loadtest: a book does not balance (see above)");
        ExitCode::FAILURE
    })
}
