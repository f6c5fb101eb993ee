//! `csgate replay`: reconstructs packet logs into one HDF5 record file.

use anyhow::Context;
use clap::Args;
use csgate::basis::BasisKind;
use csgate::packet::{KeyRing, Limits, NodeKey};
use csgate::pipeline::analytics::MachineEntry;
use csgate::pipeline::reconstruct::WarmStart;
use csgate::pipeline::reconstruct::{Method, Precision};
use csgate::pipeline::replay::{replay, ReplayOptions};
use csgate::pipeline::run::PipelineConfig;
use csgate::sim::scenario::Scenario;
use indicatif::{ProgressBar, ProgressStyle};
use std::path::PathBuf;
use std::process::ExitCode;

/// Options of `csgate replay`.
#[derive(Debug, Args)]
#[command(
    about = "Reconstruct recorded packet logs into one continuous HDF5 record",
    long_about = "Reads one or more packet logs (as written by `csgate simulate --out` or by the \
gateway's recording option), reconstructs every window of every stream with the same pipeline \
as the live gateway (reorder, sparse recovery on all cores, overlap-add stitching, trust figures \
per window, features per block), and writes ONE new HDF5 record holding every stream (layout: \
docs/hdf5-layout.md). Prints a summary: streams, windows, gaps, residuals, trust, features, \
throughput and real-time factor. An existing output file is never overwritten. Severity zones \
and fault labels are indicative only: they do not replace a qualified analyst, the machine \
maker's limits, or local codes."
)]
pub struct ReplayArgs {
    /// Packet log files, replayed in the order given.
    #[arg(required = true, value_name = "LOG")]
    pub logs: Vec<PathBuf>,
    /// The record file to create (must not exist).
    #[arg(long, short, value_name = "FILE.h5")]
    pub out: PathBuf,
    /// Sparsity basis: dct, fourier, db1..db10 (optionally db<N>:<levels>).
    #[arg(long, default_value = "dct")]
    pub basis: BasisKind,
    /// Solver worker threads (default: the number of cores).
    #[arg(long)]
    pub workers: Option<usize>,
    /// Start every window's solve from zero instead of from the previous window's solution.
    #[arg(long)]
    pub cold: bool,
    /// Rounds of iterative reweighting of the L1 penalty after each window's LASSO solve
    /// (weights 1 / (|s| + eps)); 0, the default, is plain L1. Costs about one more solve per
    /// round; BENCHMARKS.md has the measured effect.
    #[arg(long, value_name = "ROUNDS", default_value_t = 0)]
    pub reweight: usize,
    /// The eps of the reweighting, as a fraction of the window's largest coefficient.
    #[arg(long, value_name = "FRACTION", default_value_t = 1.0)]
    pub reweight_eps: f64,
    /// The LASSO weight lambda as a fraction of each window's lambda_max = ||A^T y||_inf
    /// (default: the pipeline's, 0.01). Larger keeps fewer coefficients: less noise fitted, and
    /// fewer iterations; smaller follows weak components more closely.
    #[arg(long, value_name = "FRACTION")]
    pub lambda_fraction: Option<f64>,
    /// Do not tune each stream's lambda by the hold-out samples (it is tuned by default when
    /// the trust figures are on; see docs/hdf5-layout.md, `windows.lambda`).
    #[arg(long)]
    pub no_tune: bool,
    /// Working precision of the solver: f32 (default, about twice as fast) or f64.
    #[arg(long, value_enum, default_value = "f32")]
    pub precision: Precision,
    /// Deflate level 1-9 for the samples (default: none; noisy float data compresses little).
    #[arg(long, value_parser = clap::value_parser!(u8).range(1..=9))]
    pub deflate: Option<u8>,
    /// Pre-shared key of a node whose frames carry authentication tags, as NODE=HEX
    /// (repeatable). Tagged frames of a node without a key are rejected and counted.
    #[arg(long = "key", value_name = "NODE=HEX")]
    pub keys: Vec<String>,
    /// Reject every frame without a valid tag (only nodes given with --key are accepted).
    #[arg(long)]
    pub require_auth: bool,
    /// Reconstruction method: `sparse` (the solver) or `linear` (linear interpolation of the
    /// received samples, the baseline to compare with; never used for real records).
    #[arg(long, default_value = "sparse")]
    pub method: Method,
    /// Machine kinematics of the nodes (shaft speed, bearing geometry, gear teeth), so that
    /// peaks get labels (1X, BPFO, GMF+1 ...): a simulator scenario file (its `[[node]]`
    /// machines are used, e.g. configs/demo-site.toml) or a TOML file of
    /// `[[machines]]` entries as in the pipeline configuration (docs/events.md).
    #[arg(long, value_name = "FILE.toml")]
    pub machines: Option<PathBuf>,
    /// Also write one JSON object per analysed block per stream to this new file
    /// (format: docs/events.md). Must not exist.
    #[arg(long, value_name = "FILE.jsonl")]
    pub events: Option<PathBuf>,
    /// Block length of the feature analysis in seconds (rounded to whole hops).
    #[arg(long, default_value_t = 1.0)]
    pub block_s: f64,
    /// No features: leave `peaks` and `indicators` empty.
    #[arg(long)]
    pub no_features: bool,
    /// No trust figures: skip the hold-out solve (`cv_error` NaN, `trust` 0).
    #[arg(long)]
    pub no_trust: bool,
    /// Trust figures on the windows whose sequence number is a multiple of N only (the
    /// others as with --no-trust, at the stream's tuned weight): capacity for fewer figures.
    #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::value_parser!(u32).range(1..))]
    pub trust_every: u32,
    /// Print the summary as one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Runs the replay.
pub fn run(args: ReplayArgs) -> anyhow::Result<ExitCode> {
    for log in &args.logs {
        anyhow::ensure!(log.is_file(), "packet log {} does not exist", log.display());
    }
    let mut pipeline = PipelineConfig {
        basis: args.basis,
        ..PipelineConfig::default()
    };
    if let Some(w) = args.workers {
        anyhow::ensure!(w >= 1, "--workers must be at least 1");
        pipeline.workers = w;
    }
    if args.cold {
        pipeline.warm_start = WarmStart::Cold;
    }
    pipeline.method = args.method;
    pipeline.solver.reweight_rounds = args.reweight;
    pipeline.solver.reweight_eps = args.reweight_eps;
    if let Some(f) = args.lambda_fraction {
        anyhow::ensure!(
            f.is_finite() && f > 0.0 && f < 1.0,
            "--lambda-fraction must be a fraction in (0, 1), got {f}"
        );
        pipeline.solver.form = csgate::solver::Form::Lasso {
            lambda: csgate::solver::LambdaRule::FractionOfMax(f),
        };
    }
    anyhow::ensure!(
        args.block_s.is_finite() && args.block_s > 0.0,
        "--block-s must be a positive number of seconds, got {}",
        args.block_s
    );
    pipeline.analytics.block_s = args.block_s;
    pipeline.analytics.enabled = !args.no_features;
    pipeline.trust.enabled = !args.no_trust;
    pipeline.trust.every = args.trust_every as usize;
    pipeline.trust.tune_lambda = !args.no_tune;
    pipeline.precision = args.precision;
    if let Some(path) = &args.machines {
        pipeline.analytics.machines = load_machines(path)?;
    }
    if let Some(ev) = &args.events {
        anyhow::ensure!(
            !ev.exists(),
            "events file {} already exists; it is never overwritten",
            ev.display()
        );
        anyhow::ensure!(
            !args.no_features,
            "--events needs the features (drop --no-features)"
        );
    }
    let mut keys = KeyRing::new(args.require_auth);
    for spec in &args.keys {
        let (node, hex) = spec
            .split_once('=')
            // The key text is never echoed: it is a secret (and may be a mistyped one).
            .with_context(|| format!("--key with {} characters: expected NODE=HEX", spec.len()))?;
        let node: u32 = node
            .trim()
            .parse()
            .with_context(|| format!("--key {node:?}=...: node id must be a number"))?;
        let key =
            NodeKey::from_hex(hex.trim()).with_context(|| format!("--key for node {node}"))?;
        keys.insert(node, key);
    }
    let digest = super::config_digest(&pipeline);
    let opts = ReplayOptions {
        logs: args.logs.clone(),
        out: args.out.clone(),
        pipeline,
        limits: Limits::default(),
        keys,
        deflate: args.deflate,
        config_digest: digest,
        events: args.events.clone(),
    };
    let bar = if args.quiet || args.json {
        ProgressBar::hidden()
    } else {
        let b = ProgressBar::new(0);
        b.set_style(
            ProgressStyle::with_template(
                "{spinner} replay [{bar:40}] {pos}/{len} windows  {per_sec}  eta {eta}",
            )
            .expect("valid template")
            .progress_chars("=> "),
        );
        b
    };
    let report = replay(&opts, |done, total| {
        bar.set_length(total);
        bar.set_position(done);
    })
    .with_context(|| format!("replay into {}", args.out.display()))?;
    bar.finish_and_clear();
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
        return Ok(ExitCode::SUCCESS);
    }
    let p = &report.pipeline;
    println!("record      {}", report.out.display());
    println!(
        "streams     {}   windows {}   lost {}   failed {}   duplicates {}   late {}",
        p.streams, p.windows, p.lost_windows, p.failed_windows, p.duplicates, p.late
    );
    println!(
        "gaps        {} gap rows   log records {}   rejected {}   garbage skips {}   cut logs {}",
        p.gaps,
        report.log_records,
        report.rejected_records,
        report.log_garbage_skips,
        report.logs_cut
    );
    println!(
        "residual    mean {:.3e}   worst {:.3e} (relative, ||A s - y|| / ||y||)   iterations/window {:.1}",
        p.mean_residual, p.worst_residual, p.mean_iterations
    );
    println!(
        "throughput  {:.1} windows/s   {:.3} Msamples/s   real-time factor {:.1}x ({:.1} s of signal in {:.2} s)",
        report.windows_per_s,
        report.samples_per_s / 1e6,
        report.realtime_factor,
        report.signal_s,
        report.wall_s
    );
    if p.assessed_windows > 0 {
        println!(
            "trust       {} of {} windows low trust   hold-out solve {:.0}% of solve time",
            p.low_trust_windows,
            p.assessed_windows,
            100.0 * p.trust_time_share
        );
    }
    if p.blocks > 0 || p.skipped_blocks > 0 {
        println!(
            "features    {} blocks ({} low trust, {} skipped for gaps)   {} peak rows{}",
            p.blocks,
            p.low_trust_blocks,
            p.skipped_blocks,
            p.peak_rows,
            report
                .events
                .as_ref()
                .map_or(String::new(), |e| format!("   events {}", e.display()))
        );
    }
    println!(
        "file        {:.1} MiB",
        report.record_bytes as f64 / (1024.0 * 1024.0)
    );
    Ok(ExitCode::SUCCESS)
}

/// `[[machines]]` entries of a machines file.
#[derive(Debug, serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct MachinesFile {
    machines: Vec<MachineEntry>,
}

/// Reads machine kinematics from a scenario file (a `[site]` table is present) or a file of
/// `[[machines]]` entries.
fn load_machines(path: &std::path::Path) -> anyhow::Result<Vec<MachineEntry>> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("--machines: cannot read {}", path.display()))?;
    let value: toml::Table = toml::from_str(&text)
        .with_context(|| format!("--machines {}: not a TOML file", path.display()))?;
    if value.contains_key("site") {
        let scenario = Scenario::from_toml_str(&text, path)
            .with_context(|| format!("--machines {}: read as a scenario file", path.display()))?;
        return Ok(scenario
            .machine_kinematics()
            .into_iter()
            .map(|(node, machine)| MachineEntry {
                node,
                channel: None,
                machine,
            })
            .collect());
    }
    let file: MachinesFile = toml::from_str(&text).with_context(|| {
        format!(
            "--machines {}: expected a scenario file (with [site]) or [[machines]] entries",
            path.display()
        )
    })?;
    Ok(file.machines)
}
