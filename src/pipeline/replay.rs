//! Offline replay: packet logs in, one HDF5 record file out, through the same dispatcher,
//! worker pool, stitcher and writer thread as the live gateway.
//!
//! HDF5 cannot add objects to a file once SWMR writing has started, so a single record file
//! needs every stream declared before the first sample. A first pass over the logs (cheap:
//! frames are decoded, nothing is solved) runs the packets through the same reorder buffer the
//! pipeline uses and takes, per stream, the first window it would emit; those headers give the
//! stream declarations, identical to the ones the dispatcher sends later.

use super::events::{EventError, JsonLinesFile};
use super::run::{self, PipelineConfig, PipelineStats, PipelineSummary};
use crate::packet::log::LogReader;
use crate::packet::{Frame, KeyRing, Limits, Packet, StreamId};
use crate::sources::packet_log::{replay_blocking, ReplaySummary};
use crate::store::{RecordMsg, RecordSink, SinkConfig, SinkStats, StoreError, StreamMeta};
use crate::stream::reorder::{ReorderEvent, Reorderer};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};

/// Errors of a replay.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ReplayError {
    /// The output exists; records are never overwritten.
    #[error("{0} already exists; a record is never overwritten (choose another --out)")]
    OutputExists(PathBuf),
    /// The output path has no file name.
    #[error("{0} is not a file path")]
    BadOutput(PathBuf),
    /// A log could not be read.
    // The log error already names the file; printed once, not repeated as a source.
    #[error("{error}")]
    Log {
        /// The log.
        path: PathBuf,
        /// Why (it names the file).
        error: crate::packet::log::LogError,
    },
    /// No valid window in any log.
    #[error("the packet logs hold no valid window")]
    NoWindows,
    /// The pipeline stopped.
    #[error(transparent)]
    Pipeline(#[from] run::PipelineError),
    /// The record could not be written.
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// What the first pass found.
#[derive(Debug, Clone, Default)]
pub struct LogScan {
    /// Per stream, the declaration the dispatcher will send.
    pub streams: BTreeMap<StreamId, StreamMeta>,
    /// Valid windows over all logs.
    pub windows: u64,
}

/// First pass: the streams of the logs and how many windows they hold.
pub fn scan_logs(
    logs: &[PathBuf],
    limits: &Limits,
    keys: &KeyRing,
    config: &PipelineConfig,
) -> Result<LogScan, ReplayError> {
    let mut scan = LogScan::default();
    let mut reorder = Reorderer::new(config.reorder.clone());
    let note = |ev: ReorderEvent, scan: &mut LogScan| {
        if let ReorderEvent::Window(p) = ev {
            scan.streams
                .entry(p.stream())
                .or_insert_with(|| stream_meta(&p, config));
        }
    };
    for path in logs {
        let mut reader = LogReader::open(path).map_err(|source| ReplayError::Log {
            path: path.clone(),
            error: source,
        })?;
        loop {
            let record = reader.next_record().map_err(|error| ReplayError::Log {
                path: path.clone(),
                error,
            })?;
            let Some(record) = record else { break };
            if keys.check(record.frame.as_bytes()).is_err() {
                continue;
            }
            if let Ok(Frame::Window(p)) = record.frame.parse(limits) {
                scan.windows += 1;
                for ev in reorder.push(p) {
                    note(ev, &mut scan);
                }
            }
        }
    }
    for ev in reorder.flush_all() {
        note(ev, &mut scan);
    }
    Ok(scan)
}

/// The stream declaration for a stream whose first window is `p` (as the dispatcher makes it).
pub fn stream_meta(p: &Packet, config: &PipelineConfig) -> StreamMeta {
    let h = &p.header;
    StreamMeta {
        node: h.stream.node,
        channel: h.stream.channel,
        sample_rate_hz: h.sample_rate_hz,
        start_time_unix_ns: h.t0_us.saturating_mul(1000),
        capture_id: h.capture_id,
        units: h.units.symbol().to_string(),
        // As the dispatcher declares it: a different declaration would arrive after the file
        // started.
        basis: config.basis_for(h.stream).to_string(),
    }
}

/// Options of one replay.
#[derive(Debug, Clone)]
pub struct ReplayOptions {
    /// Logs, replayed one after the other.
    pub logs: Vec<PathBuf>,
    /// The record file to create.
    pub out: PathBuf,
    /// Pipeline settings.
    pub pipeline: PipelineConfig,
    /// Frame limits.
    pub limits: Limits,
    /// Node keys (frames failing authentication are skipped and counted).
    pub keys: KeyRing,
    /// Deflate level of `samples`, if any.
    pub deflate: Option<u8>,
    /// Digest of the configuration, written into the record.
    pub config_digest: String,
    /// A new JSON-lines file for the feature events (`docs/events.md`), if wanted.
    pub events: Option<PathBuf>,
}

/// Figures of a finished replay.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ReplayReport {
    /// The record written.
    pub out: PathBuf,
    /// Pipeline figures.
    pub pipeline: PipelineSummary,
    /// Log records read (all logs).
    pub log_records: u64,
    /// Garbage stretches skipped in the logs.
    pub log_garbage_skips: u64,
    /// Logs whose tail was cut.
    pub logs_cut: u64,
    /// Records rejected (authentication, decoding, validation).
    pub rejected_records: u64,
    /// Wall time in seconds, the first pass included.
    pub wall_s: f64,
    /// Seconds of the first pass over the logs (decode only, to declare the streams); a live
    /// gateway does not make it.
    pub scan_s: f64,
    /// Signal time reconstructed, summed over streams, in seconds.
    pub signal_s: f64,
    /// Windows per second of wall time.
    pub windows_per_s: f64,
    /// Samples per second of wall time.
    pub samples_per_s: f64,
    /// Signal seconds per wall second, summed over streams (how many such streams one run of
    /// this machine could keep up with in real time).
    pub realtime_factor: f64,
    /// Bytes of the record file.
    pub record_bytes: u64,
    /// The events file written, if any.
    pub events: Option<PathBuf>,
}

/// Replays `opts.logs` into the new record `opts.out`. `progress(done, total)` is called a few
/// times a second with windows taken by the pipeline and the total from the first pass.
pub fn replay(
    opts: &ReplayOptions,
    mut progress: impl FnMut(u64, u64),
) -> Result<ReplayReport, ReplayError> {
    let started = Instant::now();
    if opts.out.exists() {
        return Err(ReplayError::OutputExists(opts.out.clone()));
    }
    let file_name = opts
        .out
        .file_name()
        .ok_or_else(|| ReplayError::BadOutput(opts.out.clone()))?
        .to_string_lossy()
        .into_owned();
    let folder = match opts.out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    opts.pipeline.check().map_err(run::PipelineError::Config)?;
    if let Some(ev) = &opts.events {
        if ev.exists() {
            return Err(run::PipelineError::Events(EventError::Exists(ev.clone())).into());
        }
    }
    let scan = scan_logs(&opts.logs, &opts.limits, &opts.keys, &opts.pipeline)?;
    let scan_s = started.elapsed().as_secs_f64();
    if scan.windows == 0 {
        return Err(ReplayError::NoWindows);
    }
    let rates: BTreeMap<StreamId, f64> = scan
        .streams
        .iter()
        .map(|(id, m)| (*id, m.sample_rate_hz))
        .collect();

    let mut sink_config = SinkConfig::new(&folder);
    sink_config.single_file = Some(file_name);
    sink_config.rotate_after = None;
    sink_config.rotate_bytes = None;
    sink_config.writer.deflate = opts.deflate;
    sink_config.config_digest = opts.config_digest.clone();
    let (sink, sink_handle) = RecordSink::spawn(sink_config);
    for meta in scan.streams.values() {
        if sink.send(RecordMsg::OpenStream(meta.clone())).is_err() {
            break;
        }
    }

    let stats = Arc::new(PipelineStats::default());
    let (tx, rx) = tokio::sync::mpsc::channel::<Packet>(256);
    let mut outputs = run::PipelineOutputs::default();
    if let Some(path) = &opts.events {
        let file = JsonLinesFile::create(path).map_err(run::PipelineError::Events)?;
        outputs.events.push(Box::new(file));
    }
    let pipe = run::spawn_with(
        opts.pipeline.clone(),
        rx,
        sink.sender(),
        Arc::clone(&stats),
        outputs,
    );
    let logs = opts.logs.clone();
    let limits = opts.limits.clone();
    let keys = opts.keys.clone();
    let source = std::thread::Builder::new()
        .name("csgate-replay".into())
        .spawn(
            move || -> Vec<Result<ReplaySummary, (PathBuf, crate::packet::log::LogError)>> {
                let mut out = Vec::new();
                for path in &logs {
                    let r =
                        replay_blocking(path, &limits, &keys, &tx).map_err(|e| (path.clone(), e));
                    let stop = r.as_ref().map(|s| s.receiver_closed).unwrap_or(true);
                    out.push(r);
                    if stop {
                        break;
                    }
                }
                out
            },
        )
        .expect("spawn the replay source thread");

    while !pipe.is_finished() {
        progress(stats.packets.load(Ordering::Relaxed), scan.windows);
        std::thread::sleep(Duration::from_millis(100));
    }
    progress(stats.packets.load(Ordering::Relaxed), scan.windows);
    let summaries = source.join().expect("replay source thread panicked");
    let pipeline = pipe.join().expect("dispatcher thread panicked");
    let _ = sink.send(RecordMsg::Shutdown);
    drop(sink);
    let sink_stats: SinkStats = sink_handle.join().expect("record writer panicked")?;
    let pipeline = pipeline?;

    let mut report_logs = (0u64, 0u64, 0u64, 0u64);
    for s in summaries {
        match s {
            Ok(s) => {
                report_logs.0 += s.log.records;
                report_logs.1 += s.log.garbage_regions;
                report_logs.2 += u64::from(s.log.truncated.is_some());
                report_logs.3 += s.auth_failures + s.decode_errors + s.validation_errors;
            }
            Err((path, error)) => return Err(ReplayError::Log { path, error }),
        }
    }
    let wall_s = started.elapsed().as_secs_f64().max(1e-9);
    // Signal time: samples per stream over its rate. The pipeline counts samples over all
    // streams, so weight by the mean rate (all streams of a log usually share one rate).
    let mean_rate = if rates.is_empty() {
        1.0
    } else {
        rates.values().sum::<f64>() / rates.len() as f64
    };
    let signal_s = pipeline.samples as f64 / mean_rate;
    let record_bytes = std::fs::metadata(&opts.out).map(|m| m.len()).unwrap_or(0);
    let _ = sink_stats;
    Ok(ReplayReport {
        out: opts.out.clone(),
        windows_per_s: pipeline.windows as f64 / wall_s,
        samples_per_s: pipeline.samples as f64 / wall_s,
        realtime_factor: signal_s / wall_s,
        pipeline,
        log_records: report_logs.0,
        log_garbage_skips: report_logs.1,
        logs_cut: report_logs.2,
        rejected_records: report_logs.3,
        wall_s,
        scan_s,
        signal_s,
        record_bytes,
        events: opts.events.clone(),
    })
}

/// Convenience for tests: replay with default settings.
pub fn replay_default(logs: &[PathBuf], out: &Path) -> Result<ReplayReport, ReplayError> {
    let opts = ReplayOptions {
        logs: logs.to_vec(),
        out: out.to_path_buf(),
        pipeline: PipelineConfig::default(),
        limits: Limits::default(),
        keys: KeyRing::new(false),
        deflate: None,
        config_digest: String::new(),
        events: None,
    };
    replay(&opts, |_, _| {})
}
