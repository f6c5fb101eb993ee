//! `csgate bench`: this machine's real-time capacity, the long replay check, and the csgate
//! side of the side-by-side harness. The measurements live in `csgate::bench`.

use anyhow::Context;
use clap::Args;
use csgate::bench::{
    long_replay, measure_capacity, solve_window_set, CapacityOptions, CapacityReport,
    LongReplayOptions, LongReplayReport, Phase, Workload,
};
use csgate::pipeline::reconstruct::Precision;
use csgate::pipeline::run::PipelineConfig;
use indicatif::{ProgressBar, ProgressStyle};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

/// Options of `csgate bench`.
#[derive(Debug, Args)]
#[command(
    about = "Measure how many sensor channels this machine reconstructs in real time",
    long_about = "Measures this machine's real-time capacity end to end. The simulator writes a \
packet log of machine-like 25.6 kHz vibration channels (harmonics, gear mesh with sidebands, \
bearing impacts ringing a resonance, noise) into a scratch folder; the replay pipeline \
reconstructs it on all cores (decode, reorder, sparse recovery, overlap-add, HDF5 record), and \
signal seconds per wall second give the number of channels sustained in real time. Also \
measures the single-core reconstruct time per window and the time of one FISTA iteration \
against one synthesis plus one analysis of the basis. Prints the sizing figure, the machine \
and the peak memory; --json prints one JSON object instead. Scratch files are removed.\n\n\
With --long-replay MINUTES: a log of --streams streams of that length is generated and \
replayed, with throughput, real-time factor and the resident memory sampled through the run \
(10 streams for 60 minutes need about 1.3 GiB of log and 3.6 GiB of record in the scratch \
folder).\n\nWith --solve-set MANIFEST.json: solves a window set written by the side-by-side \
harness (bench/python/side_by_side.py; format in the csgate::bench module docs).\n\nWith \
--fuzz N: the mutation fuzzing run instead: N seeded cases for each in-memory target (frame \
decoder, streaming codec, packet-log reader, configuration parser) and --fuzz-records cases of \
the HDF5 record reader; prints cases, wall time and cases/s per target and every failing case \
with the seed that reproduces it (--fuzz-case TARGET:SEED); exit status 1 on any failure. Each \
record case runs in a child process (HDF5 can crash or spin on a damaged file), --fuzz-jobs at \
once, killed after --fuzz-case-limit seconds."
)]
pub struct BenchArgs {
    /// Channels in the capacity run (default: 4 per worker, at least 8; more channels than
    /// workers keep every core busy).
    #[arg(long, value_name = "N")]
    pub channels: Option<usize>,
    /// Seconds of signal per channel in the capacity run.
    #[arg(long, default_value_t = 10.0, value_name = "SECONDS")]
    pub seconds: f64,
    /// Sampling ratio m/n of the simulated nodes.
    #[arg(long, default_value_t = 0.25, value_name = "M/N")]
    pub m_over_n: f64,
    /// Window length n.
    #[arg(long, default_value_t = 4096, value_name = "N")]
    pub n: u32,
    /// Hop between windows (default n/2).
    #[arg(long, value_name = "N")]
    pub hop: Option<u32>,
    /// Solver worker threads (default: the number of cores).
    #[arg(long, value_name = "N")]
    pub workers: Option<usize>,
    /// Windows of one stream solved on one core for the per-window time.
    #[arg(long, default_value_t = 40, value_name = "N")]
    pub solve_windows: usize,
    /// Seed of the simulated workload.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Long replay: minutes of log per stream to generate and replay.
    #[arg(long, value_name = "MINUTES", conflicts_with = "solve_set")]
    pub long_replay: Option<f64>,
    /// Streams of the long replay.
    #[arg(long, default_value_t = 10, value_name = "N")]
    pub streams: usize,
    /// Seconds between memory samples of the long replay.
    #[arg(long, default_value_t = 5.0, value_name = "SECONDS")]
    pub rss_every: f64,
    /// Folder in which to make the scratch folder (default: the system's temporary folder).
    #[arg(long, value_name = "DIR")]
    pub scratch: Option<PathBuf>,
    /// Working precision of the solver in the capacity run (the gateway's default is f32;
    /// f64 is the reference path).
    #[arg(long, value_enum, default_value_t = Precision::F32)]
    pub precision: Precision,
    /// Capacity without the per-window trust figures (no hold-out solve): what the
    /// reconstruction alone costs.
    #[arg(long)]
    pub no_trust: bool,
    /// Trust figures on every N-th window of a stream only (see `csgate replay --trust-every`).
    #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::value_parser!(u32).range(1..))]
    pub trust_every: u32,
    /// Solve the window set of this manifest (side-by-side harness) and write the results
    /// beside it.
    #[arg(long, value_name = "MANIFEST.json")]
    pub solve_set: Option<PathBuf>,
    /// Fuzzing run: cases per in-memory target (frame, codec, log, config).
    #[arg(long, value_name = "N", conflicts_with_all = ["solve_set", "long_replay"])]
    pub fuzz: Option<u64>,
    /// Cases of the HDF5 record target in the fuzzing run (each writes and opens a file;
    /// default: N/100, at least 100).
    #[arg(long, value_name = "N", requires = "fuzz")]
    pub fuzz_records: Option<u64>,
    /// Base seed of the fuzzing run.
    #[arg(long, default_value_t = 1, value_name = "SEED")]
    pub fuzz_seed: u64,
    /// Only these fuzz targets, comma separated (frame, codec, log, config, record).
    #[arg(long, value_name = "LIST", value_delimiter = ',', value_parser = parse_target, requires = "fuzz")]
    pub fuzz_targets: Vec<csgate::fuzz::Target>,
    /// Time limit of one record fuzz case, seconds; a case still running then is killed and
    /// reported as a hang.
    #[arg(
        long,
        default_value_t = 10.0,
        value_name = "SECONDS",
        requires = "fuzz"
    )]
    pub fuzz_case_limit: f64,
    /// Record fuzz cases run at once, each in a child process (default: the number of cores).
    #[arg(long, value_name = "N", requires = "fuzz")]
    pub fuzz_jobs: Option<usize>,
    /// Run one fuzz case again from a failure line: TARGET:SEED.
    #[arg(long, value_name = "TARGET:SEED", value_parser = super::bench_fuzz::parse_case, conflicts_with = "fuzz")]
    pub fuzz_case: Option<(csgate::fuzz::Target, u64)>,
    /// Broker path against direct TCP: windows per second of the same simulated frames
    /// through a standalone gateway and through a NATS JetStream server on loopback with an
    /// ingest-and-record gateway and a worker (uses --channels, --seconds, --n, --hop,
    /// --m-over-n, --workers, --seed).
    #[arg(long, conflicts_with_all = ["solve_set", "long_replay", "fuzz"])]
    pub broker: bool,
    /// The nats-server binary of --broker (default: from PATH, or /usr/sbin/nats-server).
    #[arg(long, value_name = "PATH", requires = "broker")]
    pub nats_server: Option<PathBuf>,
    /// Print one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
}

fn parse_target(s: &str) -> Result<csgate::fuzz::Target, String> {
    s.parse()
}

/// Runs the benchmark.
pub fn run(args: BenchArgs) -> anyhow::Result<ExitCode> {
    if let Some((target, seed)) = args.fuzz_case {
        return Ok(super::bench_fuzz::run_one(target, seed));
    }
    if let Some(cases) = args.fuzz {
        return super::bench_fuzz::run(super::bench_fuzz::FuzzRun {
            cases,
            record_cases: args.fuzz_records.unwrap_or((cases / 100).max(100)),
            seed: args.fuzz_seed,
            targets: args.fuzz_targets.clone(),
            quiet: args.quiet,
            json: args.json,
            record_case_limit: Duration::from_secs_f64(if args.fuzz_case_limit.is_finite() {
                args.fuzz_case_limit.clamp(0.1, 3600.0)
            } else {
                10.0
            }),
            jobs: args.fuzz_jobs.unwrap_or_else(|| {
                std::thread::available_parallelism()
                    .map(|n| n.get())
                    .unwrap_or(1)
            }),
        });
    }
    if let Some(manifest) = &args.solve_set {
        let result = solve_window_set(manifest)
            .with_context(|| format!("solve the window set {}", manifest.display()))?;
        if args.json {
            println!("{}", serde_json::to_string(&result)?);
        } else {
            let total_us: f64 = result.solve_us.iter().sum();
            println!(
                "solved {} windows in {:.1} ms (median per window {:.3} ms)",
                result.count,
                total_us / 1e3,
                csgate::bench::median(&mut result.solve_us.clone()) / 1e3
            );
        }
        return Ok(ExitCode::SUCCESS);
    }
    let workers = match args.workers {
        Some(0) => anyhow::bail!("--workers must be at least 1"),
        Some(w) => w,
        None => PipelineConfig::default().workers,
    };
    let hop = args.hop.unwrap_or(args.n / 2);
    let bar = if args.quiet || args.json {
        ProgressBar::hidden()
    } else {
        let b = ProgressBar::new(0);
        b.set_style(
            ProgressStyle::with_template("{spinner} {prefix:>8} [{bar:40}] {pos}/{len}  eta {eta}")
                .expect("valid template")
                .progress_chars("=> "),
        );
        b
    };
    let mut progress = |phase: Phase, done: u64, total: u64| {
        if bar.prefix() != phase.label() {
            bar.set_prefix(phase.label());
            bar.reset();
        }
        bar.set_length(total);
        bar.set_position(done);
    };

    if let Some(minutes) = args.long_replay {
        anyhow::ensure!(
            minutes.is_finite() && minutes > 0.0,
            "--long-replay {minutes}: expected a positive number of minutes"
        );
        anyhow::ensure!(
            args.rss_every.is_finite() && args.rss_every > 0.0,
            "--rss-every {}: expected a positive number of seconds",
            args.rss_every
        );
        let opts = LongReplayOptions {
            workload: Workload {
                channels: args.streams,
                n: args.n,
                hop,
                m_over_n: args.m_over_n,
                seed: args.seed,
            },
            minutes,
            workers,
            rss_every: Duration::from_secs_f64(args.rss_every),
            scratch_in: args.scratch.clone(),
        };
        let report = long_replay(&opts, &mut progress).context("long replay benchmark")?;
        bar.finish_and_clear();
        if args.json {
            println!("{}", serde_json::to_string_pretty(&report)?);
        } else {
            print_long(&report);
        }
        return Ok(ExitCode::SUCCESS);
    }

    let channels = args.channels.unwrap_or((4 * workers).max(8));
    let workload = Workload {
        channels,
        n: args.n,
        hop,
        m_over_n: args.m_over_n,
        seed: args.seed,
    };
    if args.broker {
        let opts = csgate::bench::transport::TransportOptions {
            workload: workload.clone(),
            seconds: args.seconds,
            workers,
            nats_server: args.nats_server.clone(),
            scratch_in: args.scratch.clone(),
        };
        let r = csgate::bench::transport::measure_transport(&opts)
            .context("broker against TCP benchmark")?;
        if args.json {
            println!("{}", serde_json::to_string_pretty(&r)?);
        } else {
            println!(
                "machine     {} ({} cores), load average {} before the runs",
                r.machine.cpu_model,
                r.machine.cores,
                r.load_1m_before
                    .map_or("unknown".to_string(), |l| format!("{l:.2}"))
            );
            println!(
                "workload    {} channels x {} s, n {} hop {} m/n {}, {} frames, {} solver threads",
                r.workload.channels,
                r.seconds,
                r.workload.n,
                r.workload.hop,
                r.workload.m_over_n,
                r.frames,
                r.workers
            );
            println!(
                "direct TCP  {} windows in {:.2} s: {:.1} windows/s",
                r.tcp.windows, r.tcp.wall_s, r.tcp.windows_per_s
            );
            println!(
                "broker      {} windows in {:.2} s: {:.1} windows/s ({:.2} x direct)",
                r.broker.windows, r.broker.wall_s, r.broker.windows_per_s, r.ratio
            );
            if let Some(m) = r.peak_rss_mib {
                println!("peak RSS    {m:.0} MiB (this process; the NATS server not included)");
            }
        }
        return Ok(ExitCode::SUCCESS);
    }
    let opts = CapacityOptions {
        workload,
        seconds: args.seconds,
        workers,
        solve_windows: args.solve_windows,
        scratch_in: args.scratch.clone(),
        pipeline: {
            let mut p = PipelineConfig {
                precision: args.precision,
                ..PipelineConfig::default()
            };
            p.trust.enabled = !args.no_trust;
            p.trust.every = args.trust_every as usize;
            p
        },
        ..CapacityOptions::default()
    };
    let report = measure_capacity(&opts, &mut progress).context("capacity benchmark")?;
    bar.finish_and_clear();
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_capacity(&report);
    }
    Ok(ExitCode::SUCCESS)
}

fn mib(v: Option<f64>) -> String {
    v.map(|v| format!("{v:.1} MiB"))
        .unwrap_or_else(|| "unknown".into())
}

fn machine_line(m: &csgate::bench::MachineInfo) -> String {
    format!(
        "{} cores, {}, {} memory, load average {}",
        m.cores,
        m.cpu_model,
        mib(m.memory_mib),
        m.load_average_1m
            .map(|l| format!("{l:.2}"))
            .unwrap_or_else(|| "unknown".into())
    )
}

fn print_capacity(r: &CapacityReport) {
    println!(
        "capacity    {} channels of {:.1} kHz at m/n = {} (n = {}, hop {}) in real time on {} workers",
        r.channels_realtime,
        r.sample_rate_hz / 1e3,
        r.m_over_n,
        r.n,
        r.hop,
        r.workers
    );
    println!(
        "measured    {} channels x {} s: {} windows in {:.2} s, {:.1} windows/s, real-time factor {:.1}x, {:.1} iterations/window",
        r.channels_tested,
        r.seconds,
        r.windows,
        r.pipeline_s,
        r.windows_per_s,
        r.realtime_factor,
        r.replay_iterations_per_window
    );
    println!(
        "solver      {}, {}",
        match r.precision {
            Precision::F32 => "f32",
            Precision::F64 => "f64",
        },
        match (r.trust, r.trust_every) {
            (true, 1) => "trust figures on every window (one hold-out solve each)".to_string(),
            (true, k) => format!("trust figures on one window in {k} (--trust-every {k})"),
            (false, _) => "no trust figures (--no-trust)".to_string(),
        }
    );
    println!(
        "per window  {:.3} ms on one core (median, warm start, {:.0} iterations)",
        r.ms_per_window, r.iterations_per_window
    );
    println!(
        "iteration   {:.1} us; synthesis + analysis {:.1} us; ratio {:.2}",
        r.fista_iteration_us, r.floor_us, r.iteration_floor_ratio
    );
    println!(
        "memory      peak RSS {}{}",
        mib(r.peak_rss_mib),
        if r.peak_rss_reset {
            ""
        } else {
            " (whole process: peak reset refused)"
        }
    );
    println!("machine     {}", machine_line(&r.machine));
    if r.channels_tested < 2 * r.workers {
        println!(
            "note        fewer than two channels per worker: the cores may idle; use --channels {}",
            4 * r.workers
        );
    }
}

fn print_long(r: &LongReplayReport) {
    let rep = &r.replay;
    println!(
        "long replay {} streams x {} min (n = {}, m/n = {}), {} workers",
        r.streams, r.minutes, r.n, r.m_over_n, r.workers
    );
    println!(
        "log         {:.1} MiB generated in {:.1} s",
        r.log_bytes as f64 / (1024.0 * 1024.0),
        r.generate_s
    );
    println!(
        "replay      {} windows in {:.1} s (first pass {:.1} s), record {:.1} MiB",
        rep.pipeline.windows,
        rep.wall_s,
        rep.scan_s,
        rep.record_bytes as f64 / (1024.0 * 1024.0)
    );
    println!(
        "throughput  {:.1} windows/s   {:.3} Msamples/s   real-time factor {:.1}x   {:.1} iterations/window",
        r.windows_per_s,
        r.samples_per_s / 1e6,
        r.realtime_factor,
        rep.pipeline.mean_iterations
    );
    println!(
        "memory      peak RSS {}{}",
        mib(r.peak_rss_mib),
        if r.peak_rss_reset {
            ""
        } else {
            " (whole process)"
        }
    );
    println!("            log minute   RSS");
    let k = r.rss_samples.len();
    for i in 0..=10 {
        if k == 0 {
            break;
        }
        let s = &r.rss_samples[((k - 1) * i) / 10];
        println!("            {:>10.1}   {:.1} MiB", s.log_minutes, s.rss_mib);
    }
    match r.rss_slope_mib_per_log_hour {
        Some(s) => println!("            slope over the second half: {s:+.2} MiB per hour of log"),
        None => println!("            too few samples for a slope (lower --rss-every)"),
    }
    println!("machine     {}", machine_line(&r.machine));
}
