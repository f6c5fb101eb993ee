//! `csgate simulate`: runs a scenario's nodes and writes their frames to a packet log or sends
//! them to a gateway over TCP, optionally with the noise-free truth as an HDF5 file.

use anyhow::{bail, Context};
use clap::{ArgGroup, Args};
use csgate::sim::run::{self, FilePace, RunSummary};
use csgate::sim::{Scenario, SimError, SimWindow, Simulation};
use csgate::sources::inject::Pace;
use indicatif::{ProgressBar, ProgressStyle};
use std::net::{SocketAddr, ToSocketAddrs};
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::{Arc, Mutex};

/// Options of `csgate simulate`.
#[derive(Debug, Args)]
#[command(group(ArgGroup::new("output").required(true).args(["out", "target"])))]
pub struct SimulateArgs {
    /// Scenario file (TOML): site, nodes, channels, machines.
    #[arg(long, value_name = "FILE.toml")]
    pub scenario: PathBuf,
    /// Packet log to write (replaced if it exists).
    #[arg(long, value_name = "LOG")]
    pub out: Option<PathBuf>,
    /// Gateway to send to, one TCP connection per node.
    #[arg(long, value_name = "HOST:PORT")]
    pub target: Option<String>,
    /// Also write the full-rate noise-free truth to this HDF5 file (replaced if it exists).
    #[arg(long, value_name = "TRUTH.h5")]
    pub truth: Option<PathBuf>,
    /// Seconds of signal per node.
    #[arg(long, default_value_t = 10.0, value_name = "SECONDS")]
    pub duration: f64,
    /// Seed of every random choice (default: the scenario's `site.seed`).
    #[arg(long, value_name = "N")]
    pub seed: Option<u64>,
    /// Sampling ratio m/n for every node, replacing the scenario's.
    #[arg(long, value_name = "M/N")]
    pub ratio: Option<f64>,
    /// `fast`, `realtime`, or a speed-up such as `10x`.
    #[arg(long, default_value = "fast", value_name = "PACE")]
    pub pace: String,
    /// Faults to inject on the TCP link, e.g.
    /// `drop=0.01,dup=0.01,reorder=0.01,corrupt=0.001,disconnect=0.001,reboot=0.0005`
    /// (probabilities per frame; also `distance=N`, `seed=N`).
    #[arg(long, value_name = "LIST")]
    pub faults: Option<String>,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Runs the simulation.
pub fn run(args: SimulateArgs) -> anyhow::Result<ExitCode> {
    if !(args.duration.is_finite() && args.duration > 0.0) {
        bail!(
            "--duration {}: must be a positive number of seconds",
            args.duration
        );
    }
    if args.faults.is_some() && args.target.is_none() {
        bail!("--faults: faults are injected on the TCP link, so they need --target");
    }
    let mut scenario = Scenario::load(&args.scenario)?;
    if let Some(seed) = args.seed {
        scenario.site.seed = seed;
    }
    if let Some(ratio) = args.ratio {
        scenario.override_ratio(ratio).map_err(anyhow::Error::msg)?;
    }
    let speed = run::parse_pace(&args.pace).map_err(anyhow::Error::msg)?;
    let sim = Simulation::new(&scenario, args.duration, args.truth.is_some());
    let total: u64 = sim.remaining();
    if total == 0 {
        bail!(
            "--duration {} s is shorter than one window of every node",
            args.duration
        );
    }
    let bar = progress_bar(total, args.quiet);
    let truth = Arc::new(Mutex::new(match &args.truth {
        Some(path) => Some(truth::open(path, &scenario, &sim)?),
        None => None,
    }));
    let mut on_window = {
        let bar = bar.clone();
        let truth = truth.clone();
        move |w: &SimWindow| -> Result<(), SimError> {
            if let Some(t) = truth.lock().expect("truth writer poisoned").as_mut() {
                truth::append(t, w)?;
            }
            bar.inc(1);
            Ok(())
        }
    };
    let summary = if let Some(out) = &args.out {
        let pace = match speed {
            None => FilePace::Fast,
            Some(speed) => FilePace::RealTime { speed },
        };
        let s = run::write_log(sim, &scenario, out, pace, &mut on_window)
            .with_context(|| format!("simulating into {}", out.display()))?;
        drop(on_window);
        s
    } else {
        let target = args
            .target
            .as_deref()
            .expect("clap requires --out or --target");
        let addr = resolve(target)?;
        let plan = run::parse_faults(args.faults.as_deref().unwrap_or(""), scenario.site.seed)
            .map_err(anyhow::Error::msg)?;
        let pace = match speed {
            None => Pace::AsFastAsPossible,
            Some(speed) => Pace::RealTime { speed },
        };
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()
            .context("starting the async runtime")?;
        runtime
            .block_on(run::send_to_target(
                sim, &scenario, addr, &plan, pace, on_window,
            ))
            .with_context(|| format!("simulating to {target}"))?
    };
    bar.finish_and_clear();
    if let Some(t) = truth.lock().expect("truth writer poisoned").take() {
        truth::finish(t)?;
    }
    print_summary(&scenario, &summary, args.duration, &args);
    Ok(ExitCode::SUCCESS)
}

fn resolve(target: &str) -> anyhow::Result<SocketAddr> {
    target
        .to_socket_addrs()
        .with_context(|| format!("--target {target}: expected HOST:PORT"))?
        .next()
        .with_context(|| format!("--target {target}: no address"))
}

fn progress_bar(total: u64, quiet: bool) -> ProgressBar {
    if quiet {
        return ProgressBar::hidden();
    }
    // Drawn on stderr and hidden by indicatif when stderr is not a terminal.
    let bar = ProgressBar::new(total);
    bar.set_style(
        ProgressStyle::with_template("{spinner} windows {pos}/{len} [{bar:40}] {eta} left")
            .expect("valid template")
            .progress_chars("=> "),
    );
    bar
}

fn print_summary(scenario: &Scenario, s: &RunSummary, duration: f64, args: &SimulateArgs) {
    let dest = match (&args.out, &args.target) {
        (Some(out), _) => out.display().to_string(),
        (None, Some(t)) => format!("tcp {t}"),
        (None, None) => String::new(),
    };
    println!(
        "simulated {:?}: {} nodes, {} streams, {duration} s each, seed {}",
        scenario.site.name, s.nodes, s.streams, scenario.site.seed
    );
    println!(
        "  {} windows, {} frames, {} bytes -> {dest}",
        s.windows, s.frames, s.bytes
    );
    if s.clipped > 0 {
        println!("  {} values clipped at ADC full scale", s.clipped);
    }
    if let Some(truth) = &args.truth {
        println!("  truth -> {}", truth.display());
    }
    if let Some(f) = &s.faults {
        println!(
            "  faults: {} dropped, {} duplicated, {} reordered, {} corrupted ({} bit flips), \
             {} reconnects, {} reboots; {} windows delivered intact, {} acks",
            f.dropped.len(),
            f.duplicated,
            f.reordered,
            f.corrupted.len(),
            f.bit_flips,
            f.reconnects,
            f.reboots,
            f.delivered.len(),
            f.acks_received
        );
    }
}

/// Truth output through the store's writer when built with HDF5, an error otherwise.
#[cfg(feature = "hdf5-store")]
mod truth {
    use super::*;
    pub use csgate::sim::truth::TruthWriter as Writer;

    pub fn open(
        path: &std::path::Path,
        scenario: &Scenario,
        sim: &Simulation,
    ) -> anyhow::Result<Writer> {
        Writer::create(path, scenario, sim).with_context(|| format!("--truth {}", path.display()))
    }

    pub fn append(t: &mut Writer, w: &SimWindow) -> Result<(), SimError> {
        t.append(w)
            .map_err(|e| SimError::Option(format!("writing truth: {e}")))
    }

    pub fn finish(t: Writer) -> anyhow::Result<()> {
        t.finish().context("closing the truth file")
    }
}

#[cfg(not(feature = "hdf5-store"))]
mod truth {
    use super::*;

    /// Never built: `open` refuses.
    pub enum Writer {}

    pub fn open(path: &std::path::Path, _: &Scenario, _: &Simulation) -> anyhow::Result<Writer> {
        bail!(
            "--truth {}: this csgate was built without the hdf5-store feature",
            path.display()
        )
    }

    pub fn append(t: &mut Writer, _: &SimWindow) -> Result<(), SimError> {
        match *t {}
    }

    pub fn finish(t: Writer) -> anyhow::Result<()> {
        match t {}
    }
}
