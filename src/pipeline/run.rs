//! The dispatcher: packets in, record messages out, with the worker pool in between.
//!
//! One dedicated thread runs the *task* stages (STYLE 2.3) for every stream: the reorder
//! buffer (order, duplicates, gaps, capture restarts), the queue of windows waiting for a
//! worker, and the overlap-add stitcher. It hands windows to the worker pool one at a time per
//! stream (the warm start of window `k+1` needs the solution of window `k`), so streams run in
//! parallel across the workers while each stream stays in order.
//!
//! Back-pressure: the dispatcher stops taking packets while more than
//! [`PipelineConfig::max_queued_windows`] windows wait for a worker; the bounded packet channel
//! then fills and the sources stop reading (TCP flow control reaches the nodes). Record
//! messages go to the writer thread's bounded channel with a blocking send, so a slow disk
//! slows the dispatcher the same way.
//!
//! Shutdown: when every packet sender is dropped, the dispatcher flushes the reorder buffers
//! (what is still missing becomes a gap), waits for the windows in flight, finishes every
//! stitcher (the tail of each capture) and returns; the caller then shuts the writer down.
//!
//! The live gateway and the offline replay both run exactly this code; only the source of the
//! packet channel differs. A broker recorder (docs/scale-out.md) runs it too, fed with windows
//! that workers elsewhere have already reconstructed ([`Arrival::Solved`]): those skip the
//! worker pool and go straight to the stitcher, in the same order and with the same reorder,
//! gap and capture rules as received packets.

use super::analytics::{self, AnalyticsConfig, AnalyticsMsg, AnalyticsStats};
use super::events::{EventError, EventSink};
use super::pool::WorkerPool;
use super::reconstruct::{
    Precision, ReconstructJob, ReconstructedWindow, SolvedWindow, WarmStart, WarmState, WorkerState,
};
use super::trust::TrustConfig;
use crate::basis::{BasisKind, BasisPlanner};
use crate::packet::{Packet, StreamId};
use crate::solver::{SolveSettings, StopReason};
use crate::store::layout::{stop_reason, trust, WindowRow};
use crate::store::{RecordMsg, StreamKey, StreamMeta};
use crate::stream::overlap_add::{GapReason, StitchConfig, StitchItem, Stitcher};
use crate::stream::reorder::{ReorderConfig, ReorderEvent, Reorderer, Sequenced};
use serde::{Deserialize, Serialize};
use std::collections::{HashMap, VecDeque};
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::SyncSender;
use std::sync::Arc;
use tokio::sync::mpsc;

/// Settings of the reconstruction pipeline.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct PipelineConfig {
    /// Worker threads for the solver. Default: the number of cores (the I/O threads spend
    /// most of their time waiting, so the cores belong to the numerics).
    pub workers: usize,
    /// Sparsity basis. Default DCT: random time samples are maximally incoherent with it
    /// (coherence about sqrt 2), which wavelet bases are not.
    #[serde(with = "basis_kind_str")]
    pub basis: BasisKind,
    /// Solver settings. Default: the solver's defaults with LASSO at `lambda = 0.01
    /// lambda_max`. Machine vibration is compressible rather than exactly sparse (tones between
    /// DCT bins and with arbitrary phase leak into their neighbours), so the universal
    /// threshold, made to reject white noise, removes real signal: on the replay test's tone
    /// mix (n = 1024, m/n = 0.25, noise-free) the stitched SNR was 14.7 dB with the universal
    /// threshold, 23.3 dB at 0.05 lambda_max, 32.8 dB at 0.01 and 36.0 dB at 0.002 (2.4x the
    /// iterations of 0.01). Measured with `cargo test --release --test tests
    /// pipeline::lambda_rules -- --ignored --nocapture`. On noisy machine streams the best
    /// fraction is larger (0.02-0.04 on the demo site), so with the trust figures on each
    /// stream tunes its own fraction from this start by the hold-out error
    /// ([`TrustConfig::tune_lambda`]).
    pub solver: SolveSettings,
    /// Working precision of the solver. Default f32 (see [`Precision`]).
    pub precision: Precision,
    /// Warm-start policy. Default: the previous window's solution.
    pub warm_start: WarmStart,
    /// Reconstruction method. Default: sparse recovery.
    pub method: super::reconstruct::Method,
    /// Reorder buffer settings.
    pub reorder: ReorderConfig,
    /// Windows allowed to wait for a worker, over all streams, before the dispatcher stops
    /// taking packets. Default 256 (about 8 MiB of f32 samples at m = 1024 plus headers).
    pub max_queued_windows: usize,
    /// Per-window trust figures (`windows.cv_error`, `windows.trust`). Default on.
    pub trust: TrustConfig,
    /// Features per block (`peaks`, `indicators`, events), with the machines' kinematics.
    /// Default on, shaft speed estimated, no bearings or gears known.
    pub analytics: AnalyticsConfig,
    /// Per-stream overrides of `basis`, `solver`, `warm_start` and `method` (`[[pipeline.stream]]`
    /// tables); the first entry that matches a stream applies. Default none.
    #[serde(rename = "stream", skip_serializing_if = "Vec::is_empty")]
    pub streams: Vec<StreamOverride>,
}

/// Reconstruction settings of some streams that differ from the pipeline's (e.g. a wavelet
/// basis for an impulsive acoustic channel, or another lambda rule for a noisy node).
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StreamOverride {
    /// Node id.
    pub node: u32,
    /// Channel; absent: every channel of the node.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub channel: Option<u16>,
    /// Sparsity basis of these streams.
    #[serde(
        default,
        with = "opt_basis_kind_str",
        skip_serializing_if = "Option::is_none"
    )]
    pub basis: Option<BasisKind>,
    /// Solver settings of these streams, whole (a key left out takes the solver's default,
    /// not the pipeline's).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub solver: Option<SolveSettings>,
    /// Warm-start policy.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warm_start: Option<WarmStart>,
    /// Reconstruction method.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub method: Option<super::reconstruct::Method>,
}

impl StreamOverride {
    fn matches(&self, s: StreamId) -> bool {
        self.node == s.node && self.channel.map_or(true, |c| c == s.channel)
    }
}

mod opt_basis_kind_str {
    use crate::basis::BasisKind;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(k: &Option<BasisKind>, s: S) -> Result<S::Ok, S::Error> {
        match k {
            Some(k) => s.serialize_str(&k.to_string()),
            None => s.serialize_none(),
        }
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Option<BasisKind>, D::Error> {
        let text = String::deserialize(d)?;
        text.parse().map(Some).map_err(serde::de::Error::custom)
    }
}

impl PipelineConfig {
    /// The first `[[pipeline.stream]]` override that matches `stream`, if any.
    pub fn override_for(&self, stream: StreamId) -> Option<&StreamOverride> {
        self.streams.iter().find(|o| o.matches(stream))
    }

    /// The basis `stream` is reconstructed in: its override's, else the pipeline's. The
    /// dispatcher and the replay's first pass both declare the stream with it.
    pub fn basis_for(&self, stream: StreamId) -> BasisKind {
        self.override_for(stream)
            .and_then(|o| o.basis)
            .unwrap_or(self.basis)
    }

    /// Checks the settings that serde cannot; the message names the field.
    pub fn check(&self) -> Result<(), String> {
        self.trust.check()?;
        self.analytics.check()
    }
}

impl Default for PipelineConfig {
    fn default() -> Self {
        Self {
            workers: std::thread::available_parallelism()
                .map(|n| n.get())
                .unwrap_or(1),
            basis: BasisKind::Dct,
            solver: SolveSettings {
                form: crate::solver::Form::Lasso {
                    lambda: crate::solver::LambdaRule::FractionOfMax(0.01),
                },
                ..SolveSettings::default()
            },
            precision: Precision::default(),
            warm_start: WarmStart::default(),
            method: Default::default(),
            reorder: ReorderConfig::default(),
            max_queued_windows: 256,
            trust: TrustConfig::default(),
            analytics: AnalyticsConfig::default(),
            streams: Vec::new(),
        }
    }
}

mod basis_kind_str {
    use crate::basis::BasisKind;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(k: &BasisKind, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&k.to_string())
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<BasisKind, D::Error> {
        let s = String::deserialize(d)?;
        s.parse().map_err(serde::de::Error::custom)
    }
}

/// Live counters of the pipeline (atomics: metrics read them without blocking anything).
#[derive(Debug, Default)]
pub struct PipelineStats {
    /// Packets taken from the source channel.
    pub packets: AtomicU64,
    /// Windows reconstructed and stitched.
    pub windows: AtomicU64,
    /// Windows whose reconstruction failed (recorded as gaps).
    pub failed_windows: AtomicU64,
    /// Windows declared lost by the reorder buffers.
    pub lost_windows: AtomicU64,
    /// Duplicates dropped.
    pub duplicates: AtomicU64,
    /// Late windows dropped.
    pub late: AtomicU64,
    /// Windows dropped because their grid position was out of range (a seq absurdly far from
    /// the capture's first).
    pub out_of_range: AtomicU64,
    /// Gap rows sent to the record.
    pub gaps: AtomicU64,
    /// Samples sent to the record.
    pub samples: AtomicU64,
    /// Windows waiting for a worker now.
    pub queued: AtomicUsize,
    /// Streams seen.
    pub streams: AtomicUsize,
    /// Sum of relative residuals of reconstructed windows, times 1e9 (for the mean).
    pub residual_sum_e9: AtomicU64,
    /// Worst relative residual, as f64 bits.
    pub residual_worst_bits: AtomicU64,
    /// Sum of solver iterations.
    pub iterations: AtomicU64,
    /// Windows with trust figures.
    pub assessed_windows: AtomicU64,
    /// Windows assessed as low trust.
    pub low_trust_windows: AtomicU64,
    /// FISTA iterations of the hold-out solves (the extra cost of the trust figures).
    pub trust_iterations: AtomicU64,
    /// Nanoseconds of the hold-out solves.
    pub trust_ns: AtomicU64,
    /// Nanoseconds of whole reconstruction jobs (hold-out solve included).
    pub job_ns: AtomicU64,
    /// Counters of the analytics stage.
    pub analytics: Arc<AnalyticsStats>,
    /// Per stream: (stream, duplicates, late), refreshed with the totals (for metrics).
    pub reorder_by_stream: std::sync::Mutex<Vec<(StreamId, u64, u64)>>,
}

impl PipelineStats {
    /// A plain copy of the counters.
    pub fn summary(&self) -> PipelineSummary {
        let windows = self.windows.load(Ordering::Relaxed);
        let rsum = self.residual_sum_e9.load(Ordering::Relaxed) as f64 * 1e-9;
        PipelineSummary {
            packets: self.packets.load(Ordering::Relaxed),
            streams: self.streams.load(Ordering::Relaxed),
            windows,
            failed_windows: self.failed_windows.load(Ordering::Relaxed),
            lost_windows: self.lost_windows.load(Ordering::Relaxed),
            duplicates: self.duplicates.load(Ordering::Relaxed),
            late: self.late.load(Ordering::Relaxed),
            out_of_range: self.out_of_range.load(Ordering::Relaxed),
            gaps: self.gaps.load(Ordering::Relaxed),
            samples: self.samples.load(Ordering::Relaxed),
            mean_residual: if windows > 0 {
                rsum / windows as f64
            } else {
                0.0
            },
            worst_residual: f64::from_bits(self.residual_worst_bits.load(Ordering::Relaxed)),
            mean_iterations: if windows > 0 {
                self.iterations.load(Ordering::Relaxed) as f64 / windows as f64
            } else {
                0.0
            },
            assessed_windows: self.assessed_windows.load(Ordering::Relaxed),
            low_trust_windows: self.low_trust_windows.load(Ordering::Relaxed),
            mean_trust_iterations: if windows > 0 {
                self.trust_iterations.load(Ordering::Relaxed) as f64 / windows as f64
            } else {
                0.0
            },
            trust_time_share: {
                let job = self.job_ns.load(Ordering::Relaxed);
                if job > 0 {
                    self.trust_ns.load(Ordering::Relaxed) as f64 / job as f64
                } else {
                    0.0
                }
            },
            blocks: self.analytics.blocks.load(Ordering::Relaxed),
            low_trust_blocks: self.analytics.low_trust_blocks.load(Ordering::Relaxed),
            skipped_blocks: self.analytics.skipped_gap.load(Ordering::Relaxed),
            peak_rows: self.analytics.peak_rows.load(Ordering::Relaxed),
            events: self.analytics.events.load(Ordering::Relaxed),
            analytics_busy_s: self.analytics.busy_ns.load(Ordering::Relaxed) as f64 * 1e-9,
            solve_busy_s: self.job_ns.load(Ordering::Relaxed) as f64 * 1e-9,
        }
    }

    fn note_report(&self, residual: f64, iterations: usize) {
        self.windows.fetch_add(1, Ordering::Relaxed);
        self.iterations
            .fetch_add(iterations as u64, Ordering::Relaxed);
        if residual.is_finite() {
            self.residual_sum_e9
                .fetch_add((residual * 1e9) as u64, Ordering::Relaxed);
            let _ = self.residual_worst_bits.fetch_update(
                Ordering::Relaxed,
                Ordering::Relaxed,
                |old| (residual > f64::from_bits(old)).then_some(residual.to_bits()),
            );
        }
    }
}

/// Final figures of a pipeline run.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct PipelineSummary {
    /// Packets taken from the source.
    pub packets: u64,
    /// Streams seen.
    pub streams: usize,
    /// Windows reconstructed.
    pub windows: u64,
    /// Windows whose reconstruction failed.
    pub failed_windows: u64,
    /// Windows declared lost (never arrived).
    pub lost_windows: u64,
    /// Duplicates dropped.
    pub duplicates: u64,
    /// Late windows dropped.
    pub late: u64,
    /// Windows dropped because their grid position was out of range.
    pub out_of_range: u64,
    /// Gap rows written.
    pub gaps: u64,
    /// Samples written (including NaN in gaps).
    pub samples: u64,
    /// Mean relative residual `||A s - y|| / ||y||` of the reconstructed windows.
    pub mean_residual: f64,
    /// Worst relative residual.
    pub worst_residual: f64,
    /// Mean solver iterations per window (the full solve).
    pub mean_iterations: f64,
    /// Windows with trust figures.
    pub assessed_windows: u64,
    /// Windows assessed as low trust.
    pub low_trust_windows: u64,
    /// Mean FISTA iterations of the hold-out solve per window.
    pub mean_trust_iterations: f64,
    /// Share of the reconstruction jobs' time spent in hold-out solves.
    pub trust_time_share: f64,
    /// Blocks analysed.
    pub blocks: u64,
    /// Blocks marked low trust.
    pub low_trust_blocks: u64,
    /// Blocks skipped because of a gap.
    pub skipped_blocks: u64,
    /// Peak rows written.
    pub peak_rows: u64,
    /// Events sent to the event sinks.
    pub events: u64,
    /// CPU seconds of feature extraction.
    pub analytics_busy_s: f64,
    /// CPU seconds of reconstruction jobs (hold-out solves included).
    pub solve_busy_s: f64,
}

/// Errors that stop the pipeline.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PipelineError {
    /// The worker threads could not be started.
    #[error("cannot start the solver workers: {0}")]
    Workers(#[source] std::io::Error),
    /// The record writer stopped (its own error comes back through its join handle).
    #[error("the record writer stopped")]
    SinkStopped,
    /// A setting is out of range.
    #[error("invalid pipeline configuration: {0}")]
    Config(String),
    /// An event sink failed (the record itself is complete).
    #[error(transparent)]
    Events(#[from] EventError),
    /// The analytics thread could not be started or stopped unexpectedly.
    #[error("the analytics thread stopped")]
    AnalyticsStopped,
}

/// Where a pipeline's outputs go besides the record: event sinks for the analytics stage.
#[derive(Default)]
pub struct PipelineOutputs {
    /// Every event goes to each sink (see [`super::events`]).
    pub events: Vec<Box<dyn EventSink>>,
}

impl std::fmt::Debug for PipelineOutputs {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PipelineOutputs")
            .field("events", &self.events.len())
            .finish()
    }
}

/// What the dispatcher takes in: a received window to reconstruct, or one a broker worker has
/// already reconstructed.
#[derive(Debug)]
pub enum Arrival {
    /// A window as received from a node.
    Packet(Packet),
    /// A window reconstructed elsewhere, with its report.
    Solved(Box<SolvedWindow>),
}

impl Arrival {
    /// The window as received.
    pub fn packet(&self) -> &Packet {
        match self {
            Arrival::Packet(p) => p,
            Arrival::Solved(w) => &w.packet,
        }
    }
}

impl From<Packet> for Arrival {
    fn from(p: Packet) -> Self {
        Arrival::Packet(p)
    }
}

impl From<SolvedWindow> for Arrival {
    fn from(w: SolvedWindow) -> Self {
        Arrival::Solved(Box::new(w))
    }
}

impl Sequenced for Arrival {
    fn stream(&self) -> StreamId {
        self.packet().header.stream
    }
    fn capture_id(&self) -> u32 {
        self.packet().header.capture_id
    }
    fn seq(&self) -> u64 {
        self.packet().header.seq
    }
}

/// What waits in a stream's queue, in stream order.
#[derive(Debug)]
enum Pending {
    Window {
        start: u64,
        arrival: Arrival,
    },
    Missing {
        start: u64,
        reason: GapReason,
    },
    /// The first window of a capture: declare the stream or segment, set up the stitcher.
    CaptureBegin(Box<crate::packet::WindowHeader>),
    CaptureEnd,
}

#[derive(Debug)]
struct StreamSlot {
    key: StreamKey,
    declared: bool,
    /// Capture in progress: (capture id, first seq, window len, hop).
    capture: Option<CaptureGrid>,
    stitcher: Option<Stitcher>,
    queue: VecDeque<Pending>,
    in_flight: bool,
    warm: WarmState,
    /// The stream's reconstruction settings (the pipeline's, or its override's).
    basis: BasisKind,
    settings: Arc<SolveSettings>,
    warm_start: WarmStart,
    method: super::reconstruct::Method,
}

/// The grid position of window `seq` of a capture, if it is a sane one: at most 2^53 samples
/// from the capture's start (about 11 000 years at 25.6 kHz), so that every later sum and
/// conversion stays exact. A window beyond that is a node fault, not a signal.
fn grid_position(seq: u64, grid: &CaptureGrid) -> Option<u64> {
    const MAX_POSITION: u64 = 1 << 53;
    seq.checked_sub(grid.first_seq)?
        .checked_mul(grid.hop)
        .filter(|&p| p <= MAX_POSITION)
}

#[derive(Debug, Clone, Copy)]
struct CaptureGrid {
    first_seq: u64,
    hop: u64,
    /// True until the first window of the capture arrived (it fixes n, hop and t0).
    awaiting_first: bool,
}

/// Runs the pipeline until `packets` closes and everything is written to `record`, with no
/// event sinks (features still go to the record when `config.analytics.enabled`).
///
/// Blocking: call it on a thread of its own (see [`spawn`]).
pub fn run(
    config: &PipelineConfig,
    packets: mpsc::Receiver<Packet>,
    record: SyncSender<RecordMsg>,
    stats: Arc<PipelineStats>,
) -> Result<PipelineSummary, PipelineError> {
    run_with(config, packets, record, stats, PipelineOutputs::default())
}

/// [`run`] with event sinks for the analytics stage.
pub fn run_with<I: Into<Arrival>>(
    config: &PipelineConfig,
    mut packets: mpsc::Receiver<I>,
    record: SyncSender<RecordMsg>,
    stats: Arc<PipelineStats>,
    outputs: PipelineOutputs,
) -> Result<PipelineSummary, PipelineError> {
    config.check().map_err(PipelineError::Config)?;
    let analytics = if config.analytics.enabled {
        let (tx, rx) = std::sync::mpsc::sync_channel(config.analytics.channel_capacity);
        let acfg = config.analytics.clone();
        let rec = record.clone();
        let st = Arc::clone(&stats.analytics);
        let handle = std::thread::Builder::new()
            .name("csgate-analytics".into())
            .spawn(move || analytics::run(&acfg, rx, rec, outputs.events, st))
            .map_err(|_| PipelineError::AnalyticsStopped)?;
        Some((tx, handle))
    } else {
        None
    };
    let (analytics_tx, analytics_handle) = match analytics {
        Some((tx, h)) => (Some(tx), Some(h)),
        None => (None, None),
    };
    let planner = Arc::new(BasisPlanner::<f64>::new());
    let (done_tx, mut done_rx) = mpsc::unbounded_channel::<ReconstructedWindow>();
    let pool = WorkerPool::start(
        config.workers,
        "csgate-solve",
        move || WorkerState::new(Arc::clone(&planner)),
        |state: &mut WorkerState, job: ReconstructJob| state.run(job),
        done_tx,
    )
    .map_err(PipelineError::Workers)?;
    let mut d = Dispatcher {
        config,
        settings: Arc::new(config.solver.clone()),
        trust: Arc::new(config.trust.clone()),
        analytics: analytics_tx,
        reorder: Reorderer::new(config.reorder.clone()),
        slots: Vec::new(),
        by_stream: HashMap::new(),
        record,
        stats: Arc::clone(&stats),
        pool,
        in_flight: 0,
        queued: 0,
    };
    let mut sources_open = true;
    loop {
        if !sources_open && d.in_flight == 0 {
            break;
        }
        let accepting = sources_open && d.queued < config.max_queued_windows;
        enum Ev {
            Done(Box<ReconstructedWindow>),
            Packet(Arrival),
            SourcesClosed,
            Idle,
        }
        let ev = futures::executor::block_on(async {
            tokio::select! {
                biased;
                Some(r) = done_rx.recv(), if d.in_flight > 0 => Ev::Done(Box::new(r)),
                p = packets.recv(), if accepting => match p {
                    Some(p) => Ev::Packet(p.into()),
                    None => Ev::SourcesClosed,
                },
                else => Ev::Idle,
            }
        });
        match ev {
            Ev::Done(r) => d.on_done(*r)?,
            Ev::Packet(p) => {
                stats.packets.fetch_add(1, Ordering::Relaxed);
                let events: Vec<ReorderEvent<Arrival>> = d.reorder.push(p).collect();
                d.on_events(events)?;
            }
            Ev::SourcesClosed => {
                sources_open = false;
                let events: Vec<ReorderEvent<Arrival>> = d.reorder.flush_all().collect();
                d.on_events(events)?;
            }
            Ev::Idle => {
                // Nothing in flight and not accepting: only possible with a zero queue limit.
                if !sources_open {
                    break;
                }
                std::thread::yield_now();
            }
        }
    }
    // Every capture still open ends here (flush_all declared their ends; make sure).
    for slot in 0..d.slots.len() {
        d.finish_stitcher(slot)?;
    }
    let Dispatcher {
        pool, analytics, ..
    } = d;
    pool.join();
    drop(analytics);
    if let Some(h) = analytics_handle {
        h.join().map_err(|_| PipelineError::AnalyticsStopped)??;
    }
    Ok(stats.summary())
}

/// Starts [`run`] on a thread of its own.
pub fn spawn<I: Into<Arrival> + Send + 'static>(
    config: PipelineConfig,
    packets: mpsc::Receiver<I>,
    record: SyncSender<RecordMsg>,
    stats: Arc<PipelineStats>,
) -> std::thread::JoinHandle<Result<PipelineSummary, PipelineError>> {
    spawn_with(config, packets, record, stats, PipelineOutputs::default())
}

/// Starts [`run_with`] on a thread of its own.
pub fn spawn_with<I: Into<Arrival> + Send + 'static>(
    config: PipelineConfig,
    packets: mpsc::Receiver<I>,
    record: SyncSender<RecordMsg>,
    stats: Arc<PipelineStats>,
    outputs: PipelineOutputs,
) -> std::thread::JoinHandle<Result<PipelineSummary, PipelineError>> {
    std::thread::Builder::new()
        .name("csgate-dispatch".into())
        .spawn(move || run_with(&config, packets, record, stats, outputs))
        .expect("spawn the dispatcher thread")
}

struct Dispatcher<'a> {
    config: &'a PipelineConfig,
    settings: Arc<SolveSettings>,
    trust: Arc<TrustConfig>,
    analytics: Option<SyncSender<AnalyticsMsg>>,
    reorder: Reorderer<Arrival>,
    slots: Vec<StreamSlot>,
    by_stream: HashMap<StreamId, usize>,
    record: SyncSender<RecordMsg>,
    stats: Arc<PipelineStats>,
    pool: WorkerPool<ReconstructJob>,
    in_flight: usize,
    queued: usize,
}

impl Dispatcher<'_> {
    fn slot_of(&mut self, stream: StreamId) -> usize {
        if let Some(&i) = self.by_stream.get(&stream) {
            return i;
        }
        let i = self.slots.len();
        let over = self.config.override_for(stream);
        self.slots.push(StreamSlot {
            key: StreamKey::new(stream.node, stream.channel),
            declared: false,
            capture: None,
            stitcher: None,
            queue: VecDeque::new(),
            in_flight: false,
            warm: WarmState::default(),
            basis: self.config.basis_for(stream),
            settings: over
                .and_then(|o| o.solver.clone())
                .map(Arc::new)
                .unwrap_or_else(|| Arc::clone(&self.settings)),
            warm_start: over
                .and_then(|o| o.warm_start)
                .unwrap_or(self.config.warm_start),
            method: over.and_then(|o| o.method).unwrap_or(self.config.method),
        });
        self.by_stream.insert(stream, i);
        self.stats
            .streams
            .store(self.slots.len(), Ordering::Relaxed);
        i
    }

    fn send(&self, msg: RecordMsg) -> Result<(), PipelineError> {
        self.record
            .send(msg)
            .map_err(|_| PipelineError::SinkStopped)
    }

    /// Sends to the analytics thread, if there is one (blocking while its queue is full).
    fn to_analytics(&self, msg: AnalyticsMsg) -> Result<(), PipelineError> {
        match &self.analytics {
            Some(tx) => tx.send(msg).map_err(|_| PipelineError::AnalyticsStopped),
            None => Ok(()),
        }
    }

    /// Waits until the analytics thread has handled everything sent so far.
    fn analytics_barrier(&self) -> Result<(), PipelineError> {
        if self.analytics.is_none() {
            return Ok(());
        }
        let (ack_tx, ack_rx) = std::sync::mpsc::sync_channel(1);
        self.to_analytics(AnalyticsMsg::Barrier(ack_tx))?;
        ack_rx.recv().map_err(|_| PipelineError::AnalyticsStopped)
    }

    fn on_events(&mut self, events: Vec<ReorderEvent<Arrival>>) -> Result<(), PipelineError> {
        for ev in events {
            match ev {
                ReorderEvent::CaptureStart {
                    stream, first_seq, ..
                } => {
                    let s = self.slot_of(stream);
                    self.slots[s].capture = Some(CaptureGrid {
                        first_seq,
                        hop: 0,
                        awaiting_first: true,
                    });
                }
                ReorderEvent::Window(arrival) => {
                    let packet = arrival.packet();
                    let s = self.slot_of(packet.stream());
                    let Some(mut grid) = self.slots[s].capture else {
                        continue;
                    };
                    if grid.awaiting_first {
                        // The first window received fixes the capture's grid: position 0 is its
                        // first instant, even if the node's seq did not start at 0 (the
                        // gateway may join a capture in progress).
                        grid.first_seq = packet.header.seq;
                        grid.hop = u64::from(packet.header.hop_len);
                        grid.awaiting_first = false;
                        self.slots[s].capture = Some(grid);
                        // Queued, not applied: windows of the previous capture may still be
                        // in flight and their stitcher must finish first.
                        self.slots[s]
                            .queue
                            .push_back(Pending::CaptureBegin(Box::new(packet.header)));
                    }
                    let Some(start) = grid_position(packet.header.seq, &grid) else {
                        self.stats.out_of_range.fetch_add(1, Ordering::Relaxed);
                        tracing::warn!(
                            stream = %packet.stream(),
                            seq = packet.header.seq,
                            first_seq = grid.first_seq,
                            "window too far from the start of its capture to place on a grid; dropped"
                        );
                        continue;
                    };
                    self.slots[s]
                        .queue
                        .push_back(Pending::Window { start, arrival });
                    self.queued += 1;
                }
                ReorderEvent::Gap {
                    stream,
                    from_seq,
                    count,
                    ..
                } => {
                    let s = self.slot_of(stream);
                    self.stats.lost_windows.fetch_add(count, Ordering::Relaxed);
                    let Some(grid) = self.slots[s].capture else {
                        continue;
                    };
                    if grid.awaiting_first {
                        // Windows lost before the first one of the capture arrived have no
                        // grid yet; the record starts at the first window received.
                        continue;
                    }
                    // One entry for the first lost window only: the stitcher counts the slots
                    // skipped before the next window as missing too (same reason), so a gap
                    // of any length costs the same memory and time. A gap always ends at a
                    // window that arrived (the reorder buffer declares none at the tail).
                    let first = from_seq.max(grid.first_seq);
                    if first < from_seq.saturating_add(count) {
                        if let Some(start) = grid_position(first, &grid) {
                            self.slots[s].queue.push_back(Pending::Missing {
                                start,
                                reason: GapReason::WindowMissing,
                            });
                        }
                    }
                }
                ReorderEvent::CaptureEnd { stream, .. } => {
                    let s = self.slot_of(stream);
                    self.slots[s].queue.push_back(Pending::CaptureEnd);
                }
            }
        }
        for s in 0..self.slots.len() {
            self.advance(s)?;
        }
        self.sync_reorder_stats();
        self.stats.queued.store(self.queued, Ordering::Relaxed);
        Ok(())
    }

    fn sync_reorder_stats(&self) {
        let mut dup = 0;
        let mut late = 0;
        let mut by_stream = Vec::new();
        for id in self.reorder.streams() {
            if let Some(st) = self.reorder.stats(id) {
                dup += st.duplicates;
                late += st.late;
                by_stream.push((id, st.duplicates, st.late));
            }
        }
        if let Ok(mut v) = self.stats.reorder_by_stream.lock() {
            *v = by_stream;
        }
        self.stats.duplicates.store(dup, Ordering::Relaxed);
        self.stats.late.store(late, Ordering::Relaxed);
    }

    /// Declares the stream (first capture) or a new segment (later captures) to the record and
    /// sets up the stitcher for the capture's grid.
    fn begin_capture(
        &mut self,
        s: usize,
        h: &crate::packet::WindowHeader,
    ) -> Result<(), PipelineError> {
        let t0_ns = h.t0_us.saturating_mul(1000);
        let key = self.slots[s].key;
        if !self.slots[s].declared {
            self.send(RecordMsg::OpenStream(StreamMeta {
                node: key.node,
                channel: key.channel,
                sample_rate_hz: h.sample_rate_hz,
                start_time_unix_ns: t0_ns,
                capture_id: h.capture_id,
                units: h.units.symbol().to_string(),
                basis: self.slots[s].basis.to_string(),
            }))?;
            self.slots[s].declared = true;
        } else {
            // The analytics rows of the old capture must reach the writer before the new
            // segment moves its position mapping (capture restarts are rare; waiting is cheap).
            self.analytics_barrier()?;
            self.send(RecordMsg::Segment {
                stream: key,
                capture_id: h.capture_id,
                t0_unix_ns: t0_ns,
            })?;
        }
        self.to_analytics(AnalyticsMsg::Capture {
            slot: s,
            key,
            sample_rate_hz: h.sample_rate_hz,
            t0_unix_ns: t0_ns,
            hop_len: h.hop_len,
            units: h.units.symbol().to_string(),
        })?;
        let cfg = StitchConfig {
            window_len: h.window_len as usize,
            hop_len: h.hop_len as usize,
            ..StitchConfig::half_overlap(h.window_len as usize)
        };
        self.slots[s].warm = WarmState::default();
        match Stitcher::new(cfg) {
            Ok(st) => self.slots[s].stitcher = Some(st),
            Err(e) => {
                tracing::warn!(stream = %h.stream, error = %e, "cannot stitch this capture; its windows are dropped");
                self.slots[s].stitcher = None;
            }
        }
        Ok(())
    }

    /// Moves a stream's queue forward: applies gaps and capture ends in order and submits the
    /// next window when none is in flight.
    fn advance(&mut self, s: usize) -> Result<(), PipelineError> {
        while !self.slots[s].in_flight {
            let Some(head) = self.slots[s].queue.pop_front() else {
                break;
            };
            match head {
                Pending::Window { start, arrival } => {
                    self.queued -= 1;
                    if self.slots[s].stitcher.is_none() {
                        continue;
                    }
                    let packet = match arrival {
                        Arrival::Packet(p) => p,
                        Arrival::Solved(w) => {
                            let w = *w;
                            self.complete(
                                s,
                                start,
                                w.packet,
                                w.outcome,
                                w.trust,
                                (w.solve_time_us, w.trust_time_us),
                            )?;
                            continue;
                        }
                    };
                    let job = ReconstructJob {
                        stream_slot: s,
                        start,
                        packet,
                        basis: self.slots[s].basis,
                        settings: Arc::clone(&self.slots[s].settings),
                        warm_start: self.slots[s].warm_start,
                        method: self.slots[s].method,
                        warm: std::mem::take(&mut self.slots[s].warm),
                        trust: Arc::clone(&self.trust),
                        precision: self.config.precision,
                    };
                    if self.pool.submit(job).is_err() {
                        return Err(PipelineError::SinkStopped);
                    }
                    self.slots[s].in_flight = true;
                    self.in_flight += 1;
                }
                Pending::Missing { start, reason } => {
                    let items = match self.slots[s].stitcher.as_mut() {
                        Some(st) => st.push_missing(start, reason),
                        None => continue,
                    };
                    match items {
                        Ok(items) => self.emit(s, items)?,
                        Err(e) => tracing::warn!(error = %e, "stitcher refused a missing window"),
                    }
                }
                Pending::CaptureBegin(h) => {
                    self.finish_stitcher(s)?;
                    self.begin_capture(s, &h)?;
                }
                Pending::CaptureEnd => self.finish_stitcher(s)?,
            }
        }
        Ok(())
    }

    fn finish_stitcher(&mut self, s: usize) -> Result<(), PipelineError> {
        if let Some(mut st) = self.slots[s].stitcher.take() {
            let items = st.finish();
            self.emit(s, items)?;
            self.to_analytics(AnalyticsMsg::End { slot: s })?;
        }
        Ok(())
    }

    fn on_done(&mut self, r: ReconstructedWindow) -> Result<(), PipelineError> {
        let s = r.stream_slot;
        self.in_flight -= 1;
        self.slots[s].in_flight = false;
        self.slots[s].warm = r.warm;
        self.complete(
            s,
            r.start,
            r.packet,
            r.outcome,
            r.trust,
            (r.solve_time_us, r.trust_time_us),
        )?;
        self.advance(s)?;
        self.stats.queued.store(self.queued, Ordering::Relaxed);
        Ok(())
    }

    /// Records a reconstructed window (or its failure) and stitches it: the common end of a
    /// window solved here and one solved by a broker worker. `times` is (job, hold-out) in
    /// microseconds.
    fn complete(
        &mut self,
        s: usize,
        start: u64,
        packet: Packet,
        outcome: Result<(Vec<f64>, crate::solver::SolveReport), String>,
        trust: Option<super::trust::WindowTrust>,
        times: (f64, f64),
    ) -> Result<(), PipelineError> {
        let (solve_time_us, trust_time_us) = times;
        let key = self.slots[s].key;
        let h = packet.header;
        match outcome {
            Ok((signal, report)) => {
                self.stats
                    .note_report(report.relative_residual, report.iterations);
                self.stats
                    .job_ns
                    .fetch_add((solve_time_us * 1e3) as u64, Ordering::Relaxed);
                self.stats
                    .trust_ns
                    .fetch_add((trust_time_us * 1e3) as u64, Ordering::Relaxed);
                let (cv_error, trust_code) = match &trust {
                    Some(t) => {
                        self.stats.assessed_windows.fetch_add(1, Ordering::Relaxed);
                        self.stats
                            .trust_iterations
                            .fetch_add(t.holdout_iterations as u64, Ordering::Relaxed);
                        if t.low() {
                            self.stats.low_trust_windows.fetch_add(1, Ordering::Relaxed);
                            (t.cv_error, trust::LOW)
                        } else {
                            (t.cv_error, trust::OK)
                        }
                    }
                    None => (f64::NAN, trust::UNKNOWN),
                };
                self.to_analytics(AnalyticsMsg::Window {
                    slot: s,
                    start,
                    len: u64::from(h.window_len),
                    trust: trust.as_ref().map(|t| (t.cv_error, t.low())),
                })?;
                let row = WindowRow {
                    seq: h.seq,
                    capture_id: h.capture_id,
                    start_sample: start,
                    t0_unix_ns: h.t0_us.saturating_mul(1000),
                    m: packet.indices.len() as u32,
                    n: h.window_len,
                    lambda: report.lambda,
                    iterations: report.iterations as u32,
                    duality_gap: report.relative_gap,
                    residual: report.relative_residual,
                    support: report.support as u32,
                    stop_reason: stop_code(report.stop, packet.indices.len(), h.window_len),
                    solve_time_us,
                    cv_error,
                    trust: trust_code,
                };
                self.send(RecordMsg::Window {
                    stream: key,
                    row,
                    effective_support: trust.as_ref().map(|t| t.effective_support as u32),
                })?;
                let items = match self.slots[s].stitcher.as_mut() {
                    Some(st) => st.push_window(start, &signal),
                    None => Ok(Vec::new()),
                };
                match items {
                    Ok(items) => self.emit(s, items)?,
                    Err(e) => {
                        tracing::warn!(stream = %packet.stream(), seq = h.seq, error = %e, "window not stitched")
                    }
                }
            }
            Err(e) => {
                self.stats.failed_windows.fetch_add(1, Ordering::Relaxed);
                tracing::warn!(stream = %packet.stream(), seq = h.seq, error = %e, "window not reconstructed; recorded as a gap");
                let items = match self.slots[s].stitcher.as_mut() {
                    Some(st) => st.push_missing(start, GapReason::WindowRejected),
                    None => Ok(Vec::new()),
                };
                if let Ok(items) = items {
                    self.emit(s, items)?;
                }
            }
        }
        Ok(())
    }

    fn emit(&mut self, s: usize, items: Vec<StitchItem>) -> Result<(), PipelineError> {
        let key = self.slots[s].key;
        for item in items {
            match item {
                StitchItem::Block { start, samples } => {
                    self.stats
                        .samples
                        .fetch_add(samples.len() as u64, Ordering::Relaxed);
                    if self.analytics.is_some() {
                        self.to_analytics(AnalyticsMsg::Samples {
                            slot: s,
                            start,
                            samples: samples.clone(),
                        })?;
                    }
                    self.send(RecordMsg::Samples {
                        stream: key,
                        start,
                        samples,
                    })?;
                }
                StitchItem::Gap { start, len, reason } => {
                    self.stats.gaps.fetch_add(1, Ordering::Relaxed);
                    self.to_analytics(AnalyticsMsg::Gap {
                        slot: s,
                        start,
                        len,
                    })?;
                    self.stats.samples.fetch_add(len, Ordering::Relaxed);
                    self.send(RecordMsg::Gap {
                        stream: key,
                        start,
                        len,
                        reason,
                    })?;
                }
            }
        }
        Ok(())
    }
}

/// The record's stop-reason code for a solver report.
fn stop_code(stop: StopReason, m: usize, n: u32) -> u8 {
    match stop {
        StopReason::DualityGap | StopReason::ResidualWithinEps | StopReason::ExactResidual => {
            stop_reason::DUALITY_GAP
        }
        StopReason::RelativeChange => stop_reason::STEP_TOLERANCE,
        StopReason::IterationCap => stop_reason::ITERATION_LIMIT,
        StopReason::MinL2 | StopReason::ZeroSolution if m == n as usize => stop_reason::EXACT,
        StopReason::MinL2 | StopReason::ZeroSolution => stop_reason::DUALITY_GAP,
    }
}
