//! Measurements behind `csgate bench`: how much this machine can reconstruct, measured through
//! the same code as a replay.
//!
//! Three measurements, each a plain function the command calls:
//!
//! - [`measure_capacity`]: the sizing figure. The simulator writes a packet log of
//!   `channels` machine-like 25.6 kHz channels into a scratch folder; [`replay`] reconstructs it
//!   into an HDF5 record on all workers (decode, reorder, sparse recovery, overlap-add, record
//!   writer: the pipeline of `csgate replay` and of the live gateway). Signal seconds per wall
//!   second of the pipeline is the number of such channels the machine sustains in real time.
//!   The same report carries the single-core cost of the reconstruct stage per window
//!   ([`measure_window_cost`]) and the cost of one FISTA iteration against its floor
//!   ([`measure_iteration_floor`]).
//! - [`long_replay`]: the long-run check: a log of many streams over a long stretch (10
//!   streams, one hour by default in the command), replayed with the resident set size sampled
//!   through the run, so a leak or a buffer that grows with the log shows as a slope.
//! - [`solve_window_set`]: the csgate side of the side-by-side harness (`bench/python/`):
//!   solves a set of windows written by the harness at the harness's `lambda`, warm-started
//!   window to window, and writes coefficients and per-window figures back (format below).
//!
//! Peak memory is the kernel's high-water mark of the resident set (`VmHWM` in
//! `/proc/self/status`). Before a replay it is reset (`5` written to `/proc/self/clear_refs`,
//! Linux 4.0 or later) so that the figure belongs to the replay, not to generating its input;
//! where the reset is refused the figure covers the whole process.
//!
//! # Window-set exchange format (version 1)
//! A folder holding `manifest.json`:
//! ```json
//! { "version": 1, "n": 4096, "m": 1024, "count": 24, "lambdas": [0.01, ...],
//!   "gap_tol": 1e-4, "max_iter": 3000, "warm_start": true, "debias": false, "restart": true,
//!   "repeats": 3, "indices_file": "idx.u32", "values_file": "y.f64", "output": "csgate",
//!   "precision": "f64" }
//! ```
//! `precision` (optional, `"f64"` by default, or `"f32"`): the solver's working precision
//! (the gateway's default is f32); inputs and outputs stay `f64` on disk.
//! `indices_file`: `count * m` little-endian `u32`, window after window, each window's `m`
//! indices strictly increasing in `[0, n)`. `values_file`: `count * m` little-endian `f64`, the
//! sampled values in the same order. csgate writes `<output>.json` ([`WindowSetResult`]) and
//! `<output>.coef.f64` (`count * n` little-endian `f64`, the DCT coefficients of each window:
//! the LASSO solution, or its refit on the support when `debias` is true).

use crate::basis::{BasisKind, BasisPlanner, BasisScratch, SharedBasis};
use crate::packet::{KeyRing, Limits, Packet};
use crate::pipeline::reconstruct::{
    Method, Precision, ReconstructJob, WarmStart, WarmState, WorkerState,
};
use crate::pipeline::replay::{replay, ReplayError, ReplayOptions, ReplayReport};
use crate::pipeline::run::{PipelineConfig, PipelineSummary};
use crate::sim::run::{write_log, FilePace};
use crate::sim::{Scenario, ScenarioError, SimError, Simulation};
use crate::solver::{
    fista, FistaOptions, FistaWork, Form, LambdaRule, LinearOperator, SampledBasis, SolveSettings,
    Solver,
};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// The grid rate every benchmark channel samples at, hertz.
pub const SAMPLE_RATE_HZ: f64 = 25_600.0;

/// Errors of a benchmark run. Each says what was wrong and where.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum BenchError {
    /// A bad option value.
    #[error("{0}")]
    Option(String),
    /// The scratch folder could not be made or used.
    #[error("scratch folder {path}: {source}")]
    Scratch {
        /// The folder.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The generated scenario was refused (a bug in [`workload_scenario`]).
    #[error(transparent)]
    Scenario(#[from] ScenarioError),
    /// The simulator failed.
    #[error(transparent)]
    Sim(#[from] SimError),
    /// The replay failed.
    #[error(transparent)]
    Replay(#[from] ReplayError),
    /// A window set could not be read or written.
    #[error("window set {path}: {message}")]
    WindowSet {
        /// The file.
        path: PathBuf,
        /// What is wrong, and what was expected.
        message: String,
    },
}

/// What is being measured, for progress reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Phase {
    /// The simulator writes the packet log (windows written / total).
    Generate,
    /// The replay reconstructs it (windows taken / total).
    Replay,
    /// Single-core solves of one stream's windows (windows / total).
    Solve,
    /// FISTA iteration against the transform floor (repeats / total).
    Floor,
}

impl Phase {
    /// A short label.
    pub fn label(self) -> &'static str {
        match self {
            Phase::Generate => "generate",
            Phase::Replay => "replay",
            Phase::Solve => "solve",
            Phase::Floor => "floor",
        }
    }
}

/// The machine a figure was measured on.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MachineInfo {
    /// Cores available to this process.
    pub cores: usize,
    /// The first `model name` of `/proc/cpuinfo` ("unknown" where there is none).
    pub cpu_model: String,
    /// `MemTotal` of `/proc/meminfo`, MiB.
    pub memory_mib: Option<f64>,
    /// One-minute load average at the time of reading (other work on the machine skews every
    /// timing; this says how much there was).
    pub load_average_1m: Option<f64>,
}

/// Reads the machine description from `/proc`.
pub fn machine_info() -> MachineInfo {
    let cpuinfo = std::fs::read_to_string("/proc/cpuinfo").unwrap_or_default();
    let cpu_model = cpuinfo
        .lines()
        .find_map(|l| {
            let (k, v) = l.split_once(':')?;
            (k.trim() == "model name").then(|| v.trim().to_string())
        })
        .unwrap_or_else(|| "unknown".to_string());
    let meminfo = std::fs::read_to_string("/proc/meminfo").unwrap_or_default();
    MachineInfo {
        cores: std::thread::available_parallelism()
            .map(|n| n.get())
            .unwrap_or(1),
        cpu_model,
        memory_mib: parse_kib_field(&meminfo, "MemTotal").map(|k| k / 1024.0),
        load_average_1m: load_average_1m(),
    }
}

/// The one-minute load average from `/proc/loadavg`.
pub fn load_average_1m() -> Option<f64> {
    std::fs::read_to_string("/proc/loadavg")
        .ok()?
        .split_whitespace()
        .next()?
        .parse()
        .ok()
}

/// The value in KiB of a `Field:   1234 kB` line of a `/proc` status-like text.
pub fn parse_kib_field(text: &str, field: &str) -> Option<f64> {
    text.lines().find_map(|l| {
        let (k, v) = l.split_once(':')?;
        if k.trim() != field {
            return None;
        }
        let mut parts = v.split_whitespace();
        let value: f64 = parts.next()?.parse().ok()?;
        match parts.next() {
            Some("kB") | None => Some(value),
            Some(_) => None,
        }
    })
}

fn status_mib(field: &str) -> Option<f64> {
    let text = std::fs::read_to_string("/proc/self/status").ok()?;
    parse_kib_field(&text, field).map(|k| k / 1024.0)
}

/// Peak resident set size of this process (`VmHWM`), MiB; `None` where `/proc` has none.
pub fn peak_rss_mib() -> Option<f64> {
    status_mib("VmHWM")
}

/// Resident set size of this process now (`VmRSS`), MiB.
pub fn rss_mib() -> Option<f64> {
    status_mib("VmRSS")
}

/// Resets the peak resident set size to the current one (Linux 4.0+); false if refused.
pub fn reset_peak_rss() -> bool {
    std::fs::write("/proc/self/clear_refs", "5").is_ok()
}

/// The shape of a benchmark workload.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Workload {
    /// Channels (one simulated node and machine each).
    pub channels: usize,
    /// Window length `n`.
    pub n: u32,
    /// Hop between windows.
    pub hop: u32,
    /// Sampling ratio `m / n`.
    pub m_over_n: f64,
    /// Seed of the simulation.
    pub seed: u64,
}

impl Default for Workload {
    fn default() -> Self {
        Self {
            channels: 8,
            n: 4096,
            hop: 2048,
            m_over_n: 0.25,
            seed: 1,
        }
    }
}

impl Workload {
    fn check(&self) -> Result<(), BenchError> {
        let bad = |m: String| Err(BenchError::Option(m));
        if self.channels == 0 {
            return bad("channels: need at least one".into());
        }
        if self.channels > 4096 {
            return bad(format!("channels: {} is more than 4096", self.channels));
        }
        if !(self.m_over_n.is_finite() && self.m_over_n > 0.0 && self.m_over_n <= 1.0) {
            return bad(format!(
                "m/n: {} must be within (0, 1] (a fraction of the window's instants)",
                self.m_over_n
            ));
        }
        if self.hop == 0 || self.n % self.hop != 0 || self.n / self.hop < 2 {
            return bad(format!(
                "hop {}: must divide n = {} into at least two overlapping windows \
                 (n / hop an integer >= 2, as the overlap-add stitcher needs)",
                self.hop, self.n
            ));
        }
        Ok(())
    }

    /// Windows per channel in `seconds` of signal.
    pub fn windows_per_channel(&self, seconds: f64) -> u64 {
        let total = (seconds * SAMPLE_RATE_HZ).floor() as u64;
        if total < u64::from(self.n) {
            0
        } else {
            (total - u64::from(self.n)) / u64::from(self.hop) + 1
        }
    }
}

/// The simulator scenario of a workload: `channels` invented machines, one node and channel
/// each, 25.6 kHz, rotating through three machine models so that the windows differ as a real
/// site's do:
///
/// - a gearbox: shaft harmonics, gear mesh (23 teeth) with two orders of sidebands, an
///   outer-race bearing defect ringing a 3.4 kHz resonance;
/// - a pump: shaft harmonics, vane pass (6 vanes) with a harmonic, an inner-race defect
///   ringing 4.1 kHz, modulated by the shaft;
/// - a fan: harmonics, blade pass (8 blades), a healthy bearing.
///
/// Each has broadband machine noise and white sensor noise; shaft speeds differ by channel.
pub fn workload_scenario(w: &Workload) -> Result<Scenario, BenchError> {
    w.check()?;
    let mut text = format!(
        "[site]\nname = \"csgate bench rig (invented)\"\nstart_time = \"2026-01-05T06:00:00Z\"\n\
         seed = {}\n",
        w.seed
    );
    for i in 0..w.channels {
        // Speeds spread over +/-6 % so that no two channels are the same signal.
        let spread = 1.0 + 0.12 * ((i as f64 * 0.618_034).fract() - 0.5);
        let (kind, machine) = match i % 3 {
            0 => (
                "gearbox",
                format!(
                    "shaft_hz = {:.4}\nharmonics = [{{ order = 1, amplitude = 0.6 }}, \
                     {{ order = 2, amplitude = 0.2, phase_deg = 40.0 }}]\nbroadband_rms = 0.05\n\
                     [node.machine.gear]\nteeth = 23\namplitude = 1.5\nharmonics = [0.5]\n\
                     sidebands = [{{ order = 1, amplitude = 0.4 }}, {{ order = 2, amplitude = 0.12 }}]\n\
                     [node.machine.bearing]\nrolling_elements = 9\nelement_diameter_mm = 7.94\n\
                     pitch_diameter_mm = 39.04\ncontact_angle_deg = 0.0\n\
                     [node.machine.bearing.defect]\nkind = \"outer_race\"\namplitude = 3.0\n\
                     resonance_hz = 3400.0\ndecay_ms = 0.6\njitter = 0.015\n",
                    24.6 * spread
                ),
            ),
            1 => (
                "pump",
                format!(
                    "shaft_hz = {:.4}\nharmonics = [{{ order = 1, amplitude = 0.9 }}, \
                     {{ order = 2, amplitude = 0.35, phase_deg = 40.0 }}, \
                     {{ order = 3, amplitude = 0.1, phase_deg = 75.0 }}]\nbroadband_rms = 0.05\n\
                     [node.machine.blade_pass]\nblades = 6\namplitude = 0.6\nharmonics = [0.2]\n\
                     [node.machine.bearing]\nrolling_elements = 12\nelement_diameter_mm = 9.5\n\
                     pitch_diameter_mm = 52.0\ncontact_angle_deg = 0.0\n\
                     [node.machine.bearing.defect]\nkind = \"inner_race\"\namplitude = 2.0\n\
                     resonance_hz = 4100.0\ndecay_ms = 0.5\njitter = 0.02\nmodulation_depth = 0.5\n",
                    29.9 * spread
                ),
            ),
            _ => (
                "fan",
                format!(
                    "shaft_hz = {:.4}\nharmonics = [{{ order = 1, amplitude = 1.1 }}]\n\
                     broadband_rms = 0.04\n[node.machine.blade_pass]\nblades = 8\n\
                     amplitude = 0.4\n",
                    16.2 * spread
                ),
            ),
        };
        text.push_str(&format!(
            "\n[[node]]\nid = {id}\nname = \"bench {kind} {i}\"\nsample_rate_hz = {SAMPLE_RATE_HZ:.1}\n\
             window_len = {n}\nhop_len = {hop}\nratio = {ratio}\nindex_encoding = \"seed\"\n\
             value_encoding = \"i16\"\nadc_bits = 16\n\
             [[node.channel]]\nchannel = 0\nkind = \"vibration\"\nunits = \"m/s^2\"\n\
             full_scale = 100.0\nnoise_rms = 0.01\n[node.machine]\nkind = \"{kind}\"\n{machine}",
            id = 1000 + i,
            n = w.n,
            hop = w.hop,
            ratio = w.m_over_n,
        ));
    }
    Ok(Scenario::from_toml_str(
        &text,
        Path::new("<bench workload>"),
    )?)
}

fn scratch_dir(under: Option<&Path>) -> Result<tempfile::TempDir, BenchError> {
    let mut b = tempfile::Builder::new();
    b.prefix("csgate-bench-");
    let made = match under {
        Some(p) => b.tempdir_in(p),
        None => b.tempdir(),
    };
    made.map_err(|source| BenchError::Scratch {
        path: under
            .map(Path::to_path_buf)
            .unwrap_or_else(std::env::temp_dir),
        source,
    })
}

/// Writes the workload's packet log for `seconds` to `path`; returns (windows, bytes).
fn generate_log(
    w: &Workload,
    seconds: f64,
    path: &Path,
    progress: &mut dyn FnMut(Phase, u64, u64),
) -> Result<(u64, u64), BenchError> {
    let scenario = workload_scenario(w)?;
    let sim = Simulation::new(&scenario, seconds, false);
    let total = sim.remaining();
    if total == 0 {
        return Err(BenchError::Option(format!(
            "{seconds} s of signal hold no whole window of n = {} at {SAMPLE_RATE_HZ} Hz",
            w.n
        )));
    }
    let mut done = 0u64;
    let summary = write_log(sim, &scenario, path, FilePace::Fast, |_| {
        done += 1;
        if done % 64 == 0 || done == total {
            progress(Phase::Generate, done, total);
        }
        Ok(())
    })?;
    Ok((summary.windows, summary.bytes))
}

fn replay_options(log: &Path, out: &Path, workers: usize, base: &PipelineConfig) -> ReplayOptions {
    let pipeline = PipelineConfig {
        workers,
        ..base.clone()
    };
    ReplayOptions {
        logs: vec![log.to_path_buf()],
        out: out.to_path_buf(),
        pipeline,
        limits: Limits::default(),
        keys: KeyRing::new(false),
        deflate: None,
        config_digest: "csgate bench".into(),
        events: None,
    }
}

/// Options of [`measure_capacity`].
#[derive(Debug, Clone)]
pub struct CapacityOptions {
    /// The workload (channels of the capacity run).
    pub workload: Workload,
    /// Seconds of signal per channel.
    pub seconds: f64,
    /// Solver workers.
    pub workers: usize,
    /// Windows of one stream solved on one core for [`CapacityReport::ms_per_window`].
    pub solve_windows: usize,
    /// FISTA iterations per repeat of the floor measurement.
    pub floor_iterations: usize,
    /// Where to make the scratch folder (default: the system's temporary folder).
    pub scratch_in: Option<PathBuf>,
    /// The pipeline settings measured (its `workers` is replaced by `workers`); the
    /// iteration floor is measured in its `precision`.
    pub pipeline: PipelineConfig,
}

impl Default for CapacityOptions {
    fn default() -> Self {
        Self {
            workload: Workload::default(),
            seconds: 10.0,
            workers: PipelineConfig::default().workers,
            solve_windows: 40,
            floor_iterations: 200,
            scratch_in: None,
            pipeline: PipelineConfig::default(),
        }
    }
}

/// The sizing figure and what it was measured with.
#[derive(Debug, Clone, Serialize)]
pub struct CapacityReport {
    /// Window length.
    pub n: u32,
    /// Hop between windows.
    pub hop: u32,
    /// Sampling ratio `m / n`.
    pub m_over_n: f64,
    /// Grid rate of every channel, hertz.
    pub sample_rate_hz: f64,
    /// Solver workers of the replay.
    pub workers: usize,
    /// Working precision of the solver.
    pub precision: Precision,
    /// Whether windows also had their trust figures (the hold-out solve).
    pub trust: bool,
    /// The hold-out solve ran on every this many windows of a stream (1: every window).
    pub trust_every: usize,
    /// Channels in the measured log.
    pub channels_tested: usize,
    /// Seconds of signal per channel.
    pub seconds: f64,
    /// Windows reconstructed by the replay.
    pub windows: u64,
    /// Wall seconds of the pipeline (the replay without its first pass over the log).
    pub pipeline_s: f64,
    /// Windows per wall second of the pipeline.
    pub windows_per_s: f64,
    /// Signal seconds per wall second, summed over channels.
    pub realtime_factor: f64,
    /// Channels of this rate and shape the machine sustains in real time: the real-time
    /// factor, rounded down.
    pub channels_realtime: u64,
    /// Median single-core time of the reconstruct stage per window (warm-started from the
    /// previous window of the stream, the pipeline's settings), milliseconds.
    pub ms_per_window: f64,
    /// Median solver iterations per window in that measurement.
    pub iterations_per_window: f64,
    /// Mean solver iterations per window in the replay.
    pub replay_iterations_per_window: f64,
    /// Median time of one FISTA iteration at this `n` and `m`, microseconds.
    pub fista_iteration_us: f64,
    /// Median time of one synthesis plus one analysis of the basis at this `n`, microseconds.
    pub floor_us: f64,
    /// `fista_iteration_us / floor_us`.
    pub iteration_floor_ratio: f64,
    /// Peak resident set size of the replay, MiB.
    pub peak_rss_mib: Option<f64>,
    /// Whether the peak could be reset before the replay (else it covers the whole run).
    pub peak_rss_reset: bool,
    /// The machine.
    pub machine: MachineInfo,
    /// The replay's pipeline figures.
    pub pipeline: PipelineSummary,
}

/// Measures the real-time capacity of this machine; see the module docs.
pub fn measure_capacity(
    opts: &CapacityOptions,
    progress: &mut dyn FnMut(Phase, u64, u64),
) -> Result<CapacityReport, BenchError> {
    let w = &opts.workload;
    w.check()?;
    if !(opts.seconds.is_finite() && opts.seconds > 0.0) {
        return Err(BenchError::Option(format!(
            "seconds: {} must be a positive number",
            opts.seconds
        )));
    }
    if opts.workers == 0 {
        return Err(BenchError::Option("workers: need at least one".into()));
    }
    let machine = machine_info();
    let floor =
        measure_iteration_floor(w, opts.floor_iterations, opts.pipeline.precision, progress)?;
    let cost = measure_window_cost(w, opts.solve_windows, &opts.pipeline, progress)?;

    let dir = scratch_dir(opts.scratch_in.as_deref())?;
    let log = dir.path().join("bench.cslog");
    let out = dir.path().join("bench.h5");
    generate_log(w, opts.seconds, &log, progress)?;
    let peak_rss_reset = reset_peak_rss();
    let report = replay(
        &replay_options(&log, &out, opts.workers, &opts.pipeline),
        |d, t| progress(Phase::Replay, d, t),
    )?;
    let peak = peak_rss_mib();
    drop(dir);

    let pipeline_s = (report.wall_s - report.scan_s).max(1e-9);
    let realtime_factor = report.signal_s / pipeline_s;
    Ok(CapacityReport {
        n: w.n,
        hop: w.hop,
        m_over_n: w.m_over_n,
        sample_rate_hz: SAMPLE_RATE_HZ,
        workers: opts.workers,
        precision: opts.pipeline.precision,
        trust: opts.pipeline.trust.enabled,
        trust_every: opts.pipeline.trust.every,
        channels_tested: w.channels,
        seconds: opts.seconds,
        windows: report.pipeline.windows,
        pipeline_s,
        windows_per_s: report.pipeline.windows as f64 / pipeline_s,
        realtime_factor,
        channels_realtime: realtime_factor.floor().max(0.0) as u64,
        ms_per_window: cost.median_ms,
        iterations_per_window: cost.median_iterations,
        replay_iterations_per_window: report.pipeline.mean_iterations,
        fista_iteration_us: floor.fista_iteration_us,
        floor_us: floor.floor_us,
        iteration_floor_ratio: floor.ratio,
        peak_rss_mib: peak,
        peak_rss_reset,
        machine,
        pipeline: report.pipeline,
    })
}

/// Single-core cost of the reconstruct stage.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WindowCost {
    /// Windows timed (the first, cold, window is not counted).
    pub windows: usize,
    /// Median time per window, milliseconds.
    pub median_ms: f64,
    /// Median iterations per window.
    pub median_iterations: f64,
}

/// Times the pipeline's reconstruct job ([`WorkerState::run`], the settings of `config`,
/// warm start from the previous window) over `windows + 1` windows of the workload's first
/// channel on this thread; the first window (cold start) is not counted.
pub fn measure_window_cost(
    w: &Workload,
    windows: usize,
    config: &PipelineConfig,
    progress: &mut dyn FnMut(Phase, u64, u64),
) -> Result<WindowCost, BenchError> {
    let one = Workload {
        channels: 1,
        ..w.clone()
    };
    let scenario = workload_scenario(&one)?;
    let seconds = (windows as f64 + 1.0) * f64::from(w.hop) / SAMPLE_RATE_HZ
        + f64::from(w.n) / SAMPLE_RATE_HZ;
    let mut sim = Simulation::new(&scenario, seconds, false);
    let mut packets: Vec<Packet> = Vec::new();
    while let Some(win) = sim.next_window()? {
        packets.extend(win.packets);
        if packets.len() > windows {
            break;
        }
    }
    let settings = Arc::new(config.solver.clone());
    let mut worker = WorkerState::new(Arc::new(BasisPlanner::new()));
    let mut warm = WarmState::default();
    let mut times = Vec::new();
    let mut iterations = Vec::new();
    let total = packets.len() as u64;
    for (k, packet) in packets.into_iter().enumerate() {
        let job = ReconstructJob {
            stream_slot: 0,
            start: k as u64 * u64::from(w.hop),
            packet,
            basis: BasisKind::Dct,
            settings: Arc::clone(&settings),
            warm_start: WarmStart::Previous,
            method: Method::Sparse,
            warm,
            trust: Arc::new(config.trust.clone()),
            precision: config.precision,
        };
        let started = Instant::now();
        let done = worker.run(job);
        let elapsed = started.elapsed().as_secs_f64() * 1e3;
        warm = done.warm;
        if k > 0 {
            times.push(elapsed);
            if let Ok((_, report)) = &done.outcome {
                iterations.push(report.iterations as f64);
            }
        }
        progress(Phase::Solve, k as u64 + 1, total);
    }
    Ok(WindowCost {
        windows: times.len(),
        median_ms: median(&mut times),
        median_iterations: median(&mut iterations),
    })
}

/// One FISTA iteration against its floor.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct IterationFloor {
    /// Median time of one FISTA iteration, microseconds.
    pub fista_iteration_us: f64,
    /// Median time of one synthesis plus one analysis, microseconds.
    pub floor_us: f64,
    /// Their ratio.
    pub ratio: f64,
}

/// Repeats of [`measure_iteration_floor`]; the median is reported.
const FLOOR_REPEATS: usize = 9;

/// Measures one FISTA iteration (in `precision`, the pipeline's) on a window of the workload
/// at `lambda = 0.01 lambda_max` (the pipeline's rule), against one synthesis plus one analysis
/// of the planned DCT of the same `n`. The two are timed alternately, `iterations` each per
/// repeat, and the medians over the repeats are compared, so that a burst of other work on the
/// machine hits both alike.
pub fn measure_iteration_floor(
    w: &Workload,
    iterations: usize,
    precision: Precision,
    progress: &mut dyn FnMut(Phase, u64, u64),
) -> Result<IterationFloor, BenchError> {
    match precision {
        Precision::F64 => iteration_floor_in::<f64>(w, iterations, progress),
        Precision::F32 => iteration_floor_in::<f32>(w, iterations, progress),
    }
}

fn iteration_floor_in<T: crate::real::Real>(
    w: &Workload,
    iterations: usize,
    progress: &mut dyn FnMut(Phase, u64, u64),
) -> Result<IterationFloor, BenchError> {
    let iterations = iterations.max(1);
    let one = Workload {
        channels: 1,
        ..w.clone()
    };
    let scenario = workload_scenario(&one)?;
    let seconds = 2.0 * f64::from(w.n) / SAMPLE_RATE_HZ;
    let mut sim = Simulation::new(&scenario, seconds, false);
    let packet = sim
        .next_window()?
        .and_then(|win| win.packets.into_iter().next())
        .ok_or_else(|| BenchError::Option("the workload produced no window".into()))?;
    let basis: SharedBasis<T> = BasisPlanner::new()
        .plan(BasisKind::Dct, w.n as usize)
        .map_err(|e| BenchError::Option(e.to_string()))?;
    let y: Vec<T> = packet.values.iter().map(|&v| T::of(f64::from(v))).collect();
    let mut op = SampledBasis::new(Arc::clone(&basis), &packet.indices)
        .map_err(|e| BenchError::Option(e.to_string()))?;
    let mut corr = vec![T::zero(); w.n as usize];
    op.adjoint(&y, &mut corr);
    let lambda = T::of(0.01) * corr.iter().fold(T::zero(), |a, c| a.max(c.abs()));
    let options = FistaOptions {
        // Never met: every repeat runs exactly `iterations` iterations.
        gap_tol: 1e-300,
        change_tol: 0.0,
        max_iter: iterations,
        restart: true,
        subspace: false,
    };
    let mut work = FistaWork::new();
    let mut s = vec![T::zero(); w.n as usize];
    let mut buf: Vec<T> = corr.clone();
    let mut scratch = BasisScratch::new();
    // Warm-up: grows every buffer and scratch, faults the pages in.
    fista(&mut op, &y, lambda, &options, &mut s, &mut work);
    basis.synthesize(&mut buf, &mut scratch);
    basis.analyze(&mut buf, &mut scratch);

    let mut per_iter = Vec::with_capacity(FLOOR_REPEATS);
    let mut per_floor = Vec::with_capacity(FLOOR_REPEATS);
    for r in 0..FLOOR_REPEATS {
        s.fill(T::zero());
        let t = Instant::now();
        let out = fista(&mut op, &y, lambda, &options, &mut s, &mut work);
        per_iter.push(t.elapsed().as_secs_f64() * 1e6 / out.iterations.max(1) as f64);
        std::hint::black_box(&s);

        buf.copy_from_slice(&corr);
        let t = Instant::now();
        for _ in 0..iterations {
            basis.synthesize(&mut buf, &mut scratch);
            basis.analyze(&mut buf, &mut scratch);
        }
        per_floor.push(t.elapsed().as_secs_f64() * 1e6 / iterations as f64);
        std::hint::black_box(&buf);
        progress(Phase::Floor, r as u64 + 1, FLOOR_REPEATS as u64);
    }
    let fista_iteration_us = median(&mut per_iter);
    let floor_us = median(&mut per_floor);
    Ok(IterationFloor {
        fista_iteration_us,
        floor_us,
        ratio: fista_iteration_us / floor_us.max(1e-12),
    })
}

/// The median (mean of the middle two for an even count); NaN for an empty slice.
pub fn median(v: &mut [f64]) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(|a, b| a.total_cmp(b));
    let mid = v.len() / 2;
    if v.len() % 2 == 1 {
        v[mid]
    } else {
        0.5 * (v[mid - 1] + v[mid])
    }
}

/// Options of [`long_replay`].
#[derive(Debug, Clone)]
pub struct LongReplayOptions {
    /// The workload (`channels` = streams of the log).
    pub workload: Workload,
    /// Minutes of log per stream.
    pub minutes: f64,
    /// Solver workers.
    pub workers: usize,
    /// Interval between resident-set samples.
    pub rss_every: Duration,
    /// Where to make the scratch folder (default: the system's temporary folder). The log
    /// and the record of a long run are large: 2.1 MiB of log and 6.1 MiB of record per
    /// stream-minute at n = 4096, m/n = 0.25 (measured on 60 s of the demo scenario with
    /// `csgate simulate` and `csgate replay`).
    pub scratch_in: Option<PathBuf>,
}

/// One sample of the resident set during a long replay.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct RssSample {
    /// Wall seconds since the replay started.
    pub wall_s: f64,
    /// Windows taken by the pipeline so far.
    pub windows: u64,
    /// Minutes of log (per stream) taken so far.
    pub log_minutes: f64,
    /// Resident set size, MiB.
    pub rss_mib: f64,
}

/// Figures of a long replay.
#[derive(Debug, Clone, Serialize)]
pub struct LongReplayReport {
    /// Streams in the log.
    pub streams: usize,
    /// Minutes of log per stream.
    pub minutes: f64,
    /// Sampling ratio `m / n`.
    pub m_over_n: f64,
    /// Window length.
    pub n: u32,
    /// Solver workers.
    pub workers: usize,
    /// Wall seconds the simulator took to write the log.
    pub generate_s: f64,
    /// Bytes of the log.
    pub log_bytes: u64,
    /// The replay's own report (throughput, real-time factor, record size).
    pub replay: ReplayReport,
    /// Windows per wall second of the pipeline (first pass excluded).
    pub windows_per_s: f64,
    /// Samples per wall second of the pipeline.
    pub samples_per_s: f64,
    /// Signal seconds per wall second of the pipeline, summed over streams.
    pub realtime_factor: f64,
    /// Peak resident set size of the replay, MiB.
    pub peak_rss_mib: Option<f64>,
    /// Whether the peak could be reset before the replay.
    pub peak_rss_reset: bool,
    /// Resident set sampled through the replay.
    pub rss_samples: Vec<RssSample>,
    /// Least-squares slope of the resident set against log minutes over the second half of the
    /// samples, MiB per hour of log (about zero when memory is flat).
    pub rss_slope_mib_per_log_hour: Option<f64>,
    /// The machine.
    pub machine: MachineInfo,
}

/// Generates a long log and replays it, sampling memory; see the module docs.
pub fn long_replay(
    opts: &LongReplayOptions,
    progress: &mut dyn FnMut(Phase, u64, u64),
) -> Result<LongReplayReport, BenchError> {
    let w = &opts.workload;
    w.check()?;
    if !(opts.minutes.is_finite() && opts.minutes > 0.0) {
        return Err(BenchError::Option(format!(
            "minutes: {} must be a positive number",
            opts.minutes
        )));
    }
    if opts.workers == 0 {
        return Err(BenchError::Option("workers: need at least one".into()));
    }
    let machine = machine_info();
    let dir = scratch_dir(opts.scratch_in.as_deref())?;
    let log = dir.path().join("long.cslog");
    let out = dir.path().join("long.h5");
    let started = Instant::now();
    let (_, log_bytes) = generate_log(w, opts.minutes * 60.0, &log, progress)?;
    let generate_s = started.elapsed().as_secs_f64();

    let peak_rss_reset = reset_peak_rss();
    let replay_started = Instant::now();
    let mut samples: Vec<RssSample> = Vec::new();
    let mut next_sample = Duration::ZERO;
    let report = replay(
        &replay_options(&log, &out, opts.workers, &PipelineConfig::default()),
        |done, total| {
            progress(Phase::Replay, done, total);
            let now = replay_started.elapsed();
            if now >= next_sample {
                next_sample = now + opts.rss_every;
                if let Some(rss) = rss_mib() {
                    let sample = RssSample {
                        wall_s: now.as_secs_f64(),
                        windows: done,
                        log_minutes: if total > 0 {
                            opts.minutes * done as f64 / total as f64
                        } else {
                            0.0
                        },
                        rss_mib: rss,
                    };
                    // A trace of the run as it goes (CSGATE_LOG=debug), so that a run stopped
                    // before its end still shows how memory behaved.
                    tracing::debug!(
                        wall_s = sample.wall_s,
                        windows = done,
                        log_minutes = sample.log_minutes,
                        rss_mib = rss,
                        "long replay memory sample"
                    );
                    samples.push(sample);
                }
            }
        },
    )?;
    let peak = peak_rss_mib();
    drop(dir);

    let pipeline_s = (report.wall_s - report.scan_s).max(1e-9);
    let half = &samples[samples.len() / 2..];
    Ok(LongReplayReport {
        streams: w.channels,
        minutes: opts.minutes,
        m_over_n: w.m_over_n,
        n: w.n,
        workers: opts.workers,
        generate_s,
        log_bytes,
        windows_per_s: report.pipeline.windows as f64 / pipeline_s,
        samples_per_s: report.pipeline.samples as f64 / pipeline_s,
        realtime_factor: report.signal_s / pipeline_s,
        replay: report,
        peak_rss_mib: peak,
        peak_rss_reset,
        rss_slope_mib_per_log_hour: slope(half.iter().map(|s| (s.log_minutes / 60.0, s.rss_mib))),
        rss_samples: samples,
        machine,
    })
}

/// Least-squares slope of `(x, y)` pairs; `None` with fewer than 3 points or no spread in x.
fn slope(points: impl Iterator<Item = (f64, f64)>) -> Option<f64> {
    let pts: Vec<(f64, f64)> = points.collect();
    if pts.len() < 3 {
        return None;
    }
    let k = pts.len() as f64;
    let mx = pts.iter().map(|p| p.0).sum::<f64>() / k;
    let my = pts.iter().map(|p| p.1).sum::<f64>() / k;
    let sxx: f64 = pts.iter().map(|p| (p.0 - mx).powi(2)).sum();
    let sxy: f64 = pts.iter().map(|p| (p.0 - mx) * (p.1 - my)).sum();
    (sxx > 0.0).then(|| sxy / sxx)
}

/// The manifest of a window set (see the module docs for the format).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WindowSetManifest {
    /// Format version; 1.
    pub version: u32,
    /// Window length.
    pub n: usize,
    /// Samples per window.
    pub m: usize,
    /// Windows.
    pub count: usize,
    /// LASSO weight per window.
    pub lambdas: Vec<f64>,
    /// Relative duality-gap tolerance.
    pub gap_tol: f64,
    /// Iteration cap.
    pub max_iter: usize,
    /// Start each window from the previous window's LASSO solution.
    pub warm_start: bool,
    /// Refit on the support after the LASSO.
    pub debias: bool,
    /// Adaptive restart.
    #[serde(default = "yes")]
    pub restart: bool,
    /// Times the whole chain is solved; per-window times are the medians.
    #[serde(default = "one")]
    pub repeats: usize,
    /// File of the indices, relative to the manifest.
    pub indices_file: String,
    /// File of the values, relative to the manifest.
    pub values_file: String,
    /// Prefix of the output files.
    pub output: String,
    /// Working precision of the solver: "f64" (default) or "f32".
    #[serde(default = "f64_name")]
    pub precision: String,
}

fn f64_name() -> String {
    "f64".into()
}

/// What one pass over a window set gives per window.
struct SetPass {
    times: Vec<Vec<f64>>,
    iterations: Vec<usize>,
    objective: Vec<f64>,
    relative_gap: Vec<f64>,
    coefficients: Vec<f64>,
}

fn solve_set_in<T: crate::real::Real>(
    set: &WindowSetManifest,
    indices: &[u32],
    values: &[f64],
    manifest: &Path,
    idx_path: &Path,
) -> Result<SetPass, BenchError> {
    let basis: SharedBasis<T> = BasisPlanner::new()
        .plan(BasisKind::Dct, set.n)
        .map_err(|e| set_err(manifest, e.to_string()))?;
    let mut solver = Solver::new(Arc::clone(&basis));
    let values: Vec<T> = values.iter().map(|&v| T::of(v)).collect();
    let mut pass = SetPass {
        times: vec![Vec::new(); set.count],
        iterations: vec![0; set.count],
        objective: vec![0.0; set.count],
        relative_gap: vec![0.0; set.count],
        coefficients: vec![0.0; set.count * set.n],
    };
    for _ in 0..set.repeats.max(1) {
        let mut warm: Option<Vec<T>> = None;
        for k in 0..set.count {
            let settings = SolveSettings {
                form: Form::Lasso {
                    lambda: LambdaRule::Absolute(set.lambdas[k]),
                },
                gap_tol: set.gap_tol,
                max_iter: set.max_iter,
                restart: set.restart,
                debias: set.debias,
                ..SolveSettings::default()
            };
            let idx = &indices[k * set.m..(k + 1) * set.m];
            let y = &values[k * set.m..(k + 1) * set.m];
            let start = if set.warm_start {
                warm.as_deref()
            } else {
                None
            };
            let t = Instant::now();
            let sol = solver
                .solve(idx, y, &settings, start)
                .map_err(|e| set_err(idx_path, format!("window {k}: {e}")))?;
            pass.times[k].push(t.elapsed().as_secs_f64() * 1e6);
            pass.iterations[k] = sol.report.iterations;
            pass.objective[k] = sol.report.objective;
            pass.relative_gap[k] = sol.report.relative_gap;
            for (o, c) in pass.coefficients[k * set.n..(k + 1) * set.n]
                .iter_mut()
                .zip(&sol.coefficients)
            {
                *o = c.to_f64_();
            }
            warm = Some(sol.lasso_coefficients);
        }
    }
    Ok(pass)
}

fn yes() -> bool {
    true
}

fn one() -> usize {
    1
}

/// What csgate reports for a window set (written as `<output>.json`).
#[derive(Debug, Clone, Serialize)]
pub struct WindowSetResult {
    /// Format version; 1.
    pub version: u32,
    /// Windows solved.
    pub count: usize,
    /// Solver iterations per window.
    pub iterations: Vec<usize>,
    /// Median wall time per window over the repeats, microseconds (one core).
    pub solve_us: Vec<f64>,
    /// LASSO objective reached per window.
    pub objective: Vec<f64>,
    /// Relative duality gap at the end per window.
    pub relative_gap: Vec<f64>,
    /// The coefficients file written.
    pub coefficients_file: String,
}

fn set_err(path: &Path, message: impl Into<String>) -> BenchError {
    BenchError::WindowSet {
        path: path.to_path_buf(),
        message: message.into(),
    }
}

fn read_le<const W: usize, T>(
    path: &Path,
    expected: usize,
    what: &str,
    conv: impl Fn([u8; W]) -> T,
) -> Result<Vec<T>, BenchError> {
    let bytes = std::fs::read(path).map_err(|e| set_err(path, e.to_string()))?;
    if bytes.len() != expected * W {
        return Err(set_err(
            path,
            format!(
                "holds {} bytes; expected {expected} little-endian {what} ({} bytes)",
                bytes.len(),
                expected * W
            ),
        ));
    }
    Ok(bytes
        .chunks_exact(W)
        .map(|c| conv(c.try_into().expect("exact chunk")))
        .collect())
}

/// Solves the window set described by the manifest at `manifest` (see the module docs) with
/// csgate's [`Solver`] (DCT, f64, one core) and writes the results beside it.
pub fn solve_window_set(manifest: &Path) -> Result<WindowSetResult, BenchError> {
    let text = std::fs::read_to_string(manifest).map_err(|e| set_err(manifest, e.to_string()))?;
    let set: WindowSetManifest =
        serde_json::from_str(&text).map_err(|e| set_err(manifest, e.to_string()))?;
    if set.version != 1 {
        return Err(set_err(
            manifest,
            format!("version {} is not supported (expected 1)", set.version),
        ));
    }
    if set.lambdas.len() != set.count {
        return Err(set_err(
            manifest,
            format!(
                "{} lambdas for {} windows (expected one per window)",
                set.lambdas.len(),
                set.count
            ),
        ));
    }
    if set.m == 0 || set.m > set.n {
        return Err(set_err(
            manifest,
            format!("m = {} must be within 1..=n ({})", set.m, set.n),
        ));
    }
    let folder = manifest.parent().unwrap_or(Path::new("."));
    let idx_path = folder.join(&set.indices_file);
    let val_path = folder.join(&set.values_file);
    let indices = read_le(&idx_path, set.count * set.m, "u32", u32::from_le_bytes)?;
    let values = read_le(&val_path, set.count * set.m, "f64", f64::from_le_bytes)?;
    let mut pass = match set.precision.as_str() {
        "f64" => solve_set_in::<f64>(&set, &indices, &values, manifest, &idx_path)?,
        "f32" => solve_set_in::<f32>(&set, &indices, &values, manifest, &idx_path)?,
        other => {
            return Err(set_err(
                manifest,
                format!("precision {other:?} is not supported (expected \"f64\" or \"f32\")"),
            ))
        }
    };
    let coefficients = pass.coefficients;
    let coef_name = format!("{}.coef.f64", set.output);
    let coef_path = folder.join(&coef_name);
    let bytes: Vec<u8> = coefficients.iter().flat_map(|v| v.to_le_bytes()).collect();
    std::fs::write(&coef_path, bytes).map_err(|e| set_err(&coef_path, e.to_string()))?;
    let result = WindowSetResult {
        version: 1,
        count: set.count,
        iterations: pass.iterations,
        solve_us: pass.times.iter_mut().map(|t| median(t)).collect(),
        objective: pass.objective,
        relative_gap: pass.relative_gap,
        coefficients_file: coef_name,
    };
    let json_path = folder.join(format!("{}.json", set.output));
    let json = serde_json::to_string(&result).map_err(|e| set_err(&json_path, e.to_string()))?;
    std::fs::write(&json_path, json).map_err(|e| set_err(&json_path, e.to_string()))?;
    Ok(result)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn status_fields_parse() {
        // The layout of /proc/<pid>/status lines: proc(5), Linux man-pages.
        let text = "Name:\tcsgate\nVmHWM:\t   20480 kB\nVmRSS:\t    1024 kB\n";
        assert_eq!(parse_kib_field(text, "VmHWM"), Some(20480.0));
        assert_eq!(parse_kib_field(text, "VmRSS"), Some(1024.0));
        assert_eq!(parse_kib_field(text, "VmSwap"), None);
    }

    #[test]
    fn workload_scenarios_load() {
        for channels in [1, 2, 3, 7] {
            let w = Workload {
                channels,
                ..Workload::default()
            };
            let s = workload_scenario(&w).unwrap();
            assert_eq!(s.nodes.len(), channels);
            assert!(s.nodes.iter().all(|n| n.sample_count() == 1024));
        }
        let bad = Workload {
            hop: 1000,
            ..Workload::default()
        };
        assert!(workload_scenario(&bad).is_err());
    }

    #[test]
    fn medians_and_slopes() {
        assert_eq!(median(&mut [3.0, 1.0, 2.0]), 2.0);
        assert_eq!(median(&mut [4.0, 1.0, 2.0, 3.0]), 2.5);
        let s = slope([(0.0, 1.0), (1.0, 3.0), (2.0, 5.0)].into_iter()).unwrap();
        assert!((s - 2.0).abs() < 1e-12);
        // Whole windows in one second at 25.6 kHz, n = 4096, hop 2048:
        // (25600 - 4096) / 2048 + 1 = 11 (integer division).
        assert_eq!(Workload::default().windows_per_channel(1.0), 11);
    }
}

/// Broker path against direct TCP (`csgate bench --broker`).
pub mod transport;
