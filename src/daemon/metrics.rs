//! Every metric the gateway exports, in one place, encoded in the OpenMetrics text format by
//! `prometheus-client`.
//!
//! Two kinds of source: per-stream figures are updated by the record tap (which sees every
//! window report and gap the pipeline sends to the record writer), and gateway-wide figures
//! are copied from the stages' own atomics ([`IngestStats`], [`PipelineStats`], the record
//! writer's byte counter) at each scrape by [`GatewayMetrics::refresh`]. Scraping only reads
//! atomics and takes the families' short read locks, so metrics never slow the pipeline.
//!
//! Names follow the Prometheus conventions: a `csgate_` prefix, base units as suffixes
//! (`_seconds`, `_bytes`, `_ratio`), `_total` on counters (added by the crate).
//!
//! Hooks for the analytics stage ([`AnalyticsMetrics`]): per-stream trust, band RMS,
//! velocity RMS and labelled fault-frequency amplitudes. They are registered now (so
//! dashboards can be built against the names) and stay empty until something sets them.

use crate::pipeline::run::PipelineStats;
use crate::sources::tcp::IngestStats;
use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::metrics::histogram::{exponential_buckets, Histogram};
use prometheus_client::metrics::info::Info;
use prometheus_client::registry::{Registry, Unit};
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};
use std::sync::Arc;

/// Labels of a per-stream metric.
#[derive(Debug, Clone, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct StreamLabels {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
}

/// Labels of a metric with a reason or queue name.
#[derive(Debug, Clone, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct ReasonLabels {
    /// Why (or which).
    pub reason: String,
}

/// Labels of a queue metric.
#[derive(Debug, Clone, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct QueueLabels {
    /// Which queue: `packets` (sockets to pipeline), `solver` (windows waiting for a worker).
    pub queue: String,
}

/// Labels of a per-stream metric with a reason.
#[derive(Debug, Clone, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct StreamReasonLabels {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
    /// Why.
    pub reason: String,
}

/// Labels of a band RMS value.
#[derive(Debug, Clone, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct BandLabels {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
    /// Band name, e.g. `10-1000Hz`.
    pub band: String,
}

/// Labels of a fault-frequency amplitude.
#[derive(Debug, Clone, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct FaultLabels {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
    /// Fault-frequency label, e.g. `BPFO` or `2x`.
    pub label: String,
    /// `direct` or `envelope` spectrum.
    pub spectrum: String,
}

type F64Gauge = Gauge<f64, AtomicU64>;

/// Per-stream figures from the record messages.
#[derive(Debug)]
pub struct StreamMetrics {
    /// Windows reconstructed.
    pub windows: Family<StreamLabels, Counter>,
    /// Gap rows (runs of missing samples).
    pub gaps: Family<StreamLabels, Counter>,
    /// Missing samples.
    pub gap_samples: Family<StreamLabels, Counter>,
    /// Samples sent to the record (including NaN fill).
    pub samples: Family<StreamLabels, Counter>,
    /// Relative residual of the last window.
    pub residual: Family<StreamLabels, F64Gauge>,
    /// Solver iterations, summed.
    pub iterations: Family<StreamLabels, Counter>,
    /// Solve time per window.
    pub solve_time: Family<StreamLabels, Histogram, fn() -> Histogram>,
}

fn solve_time_histogram() -> Histogram {
    // 100 us to about 3.3 s in factors of 2: the span from a small DCT window to a slow
    // wavelet solve on a small gateway (common practice: exponential buckets over the range
    // of interest).
    Histogram::new(exponential_buckets(1e-4, 2.0, 16))
}

/// Figures of the trust and analytics stages, set by the record tap from the rows it passes.
#[derive(Debug, Default)]
pub struct AnalyticsMetrics {
    /// Trust of the last assessed window: 1 trusted, 0 low trust.
    pub trust: Family<StreamLabels, F64Gauge>,
    /// Hold-out error of the last assessed window (relative RMS).
    pub cv_error: Family<StreamLabels, F64Gauge>,
    /// Samples per window advised to the node.
    pub advised_m: Family<StreamLabels, Gauge>,
    /// Band RMS of the last block, in the stream's units.
    pub band_rms: Family<BandLabels, F64Gauge>,
    /// Velocity RMS of the last block, millimetres per second.
    pub velocity_rms_mm_s: Family<StreamLabels, F64Gauge>,
    /// Amplitude at a labelled fault frequency, in the stream's units.
    pub fault_amplitude: Family<FaultLabels, F64Gauge>,
    /// Per stream: the block time and the labels of its last block's fault amplitudes (so a
    /// label that no longer shows is removed rather than left stale).
    fault_labels:
        std::sync::Mutex<std::collections::HashMap<StreamLabels, (i64, Vec<FaultLabels>)>>,
}

/// Gateway-wide figures, copied from the stages' atomics at each scrape.
#[derive(Debug, Default)]
struct GatewayFigures {
    connections_active: Gauge,
    connections_accepted: Counter,
    connections_rejected: Counter,
    idle_timeouts: Counter,
    advice_sent: Counter,
    frames_accepted: Counter,
    frames_rejected: Family<ReasonLabels, Counter>,
    frames_dropped: Family<ReasonLabels, Counter>,
    stream_frames_dropped: Family<StreamReasonLabels, Counter>,
    received_bytes: Counter,
    packets: Counter,
    windows_lost: Counter,
    windows_failed: Counter,
    streams: Gauge,
    queue_depth: Family<QueueLabels, Gauge>,
    queue_capacity: Family<QueueLabels, Gauge>,
    workers: Gauge,
    worker_busy: Counter<f64, AtomicU64>,
    record_bytes: Counter,
    record_write_errors: Counter,
    record_writable: Gauge,
    record_dropped_samples: Counter,
    record_dropped_rows: Counter,
    feed_events: Counter,
    discarded_at_shutdown: Counter,
}

/// What [`GatewayMetrics::refresh`] reads.
#[derive(Debug, Clone)]
pub struct MetricSources {
    /// Ingest counters.
    pub ingest: Arc<IngestStats>,
    /// Pipeline counters.
    pub pipeline: Arc<PipelineStats>,
    /// Bytes in record files written so far (closed files plus the open one at its last
    /// flush).
    pub record_bytes: Arc<AtomicU64>,
    /// Write-error figures of the record writer.
    pub record: Arc<crate::store::SinkLive>,
    /// Packets waiting between the sockets and the pipeline, as the forwarder last saw them.
    pub packet_queue: Arc<AtomicU64>,
    /// That channel itself, read at each scrape (the forwarder's figure goes stale while it
    /// waits for a full pipeline, which is when the figure matters). A weak handle: it does
    /// not keep the channel open.
    pub packet_channel: Option<tokio::sync::mpsc::WeakSender<crate::packet::Packet>>,
    /// Capacity of that queue.
    pub packet_queue_capacity: usize,
    /// Solver queue limit.
    pub solver_queue_capacity: usize,
    /// Solver worker threads.
    pub workers: usize,
    /// Packets discarded by a forced drain.
    pub discarded_at_shutdown: Arc<AtomicU64>,
    /// Events published to the feed.
    pub feed: super::feed::EventFeed,
}

/// The registry and every metric of the gateway.
#[derive(Debug)]
pub struct GatewayMetrics {
    registry: Registry,
    /// Per-stream figures (the record tap updates them).
    pub streams: Arc<StreamMetrics>,
    /// Analytics hooks.
    pub analytics: Arc<AnalyticsMetrics>,
    /// Microseconds of solver time, summed (the tap adds; refresh converts).
    pub busy_us: Arc<AtomicU64>,
    gateway: GatewayFigures,
}

impl GatewayMetrics {
    /// Registers every metric. `site` goes into the `csgate_build_info` metric.
    pub fn new(site: &str) -> Self {
        let mut registry = Registry::with_prefix("csgate");
        let streams = Arc::new(StreamMetrics {
            windows: Family::default(),
            gaps: Family::default(),
            gap_samples: Family::default(),
            samples: Family::default(),
            residual: Family::default(),
            iterations: Family::default(),
            solve_time: Family::new_with_constructor(solve_time_histogram as fn() -> Histogram),
        });
        let analytics = Arc::new(AnalyticsMetrics::default());
        let g = GatewayFigures::default();
        let r = &mut registry;
        r.register(
            "build",
            "Version of the gateway and its site",
            Info::new(vec![
                ("version".to_string(), crate::VERSION.to_string()),
                ("site".to_string(), site.to_string()),
            ]),
        );
        // Per stream.
        r.register(
            "windows_reconstructed",
            "Windows reconstructed, per stream",
            streams.windows.clone(),
        );
        r.register(
            "gaps",
            "Runs of missing samples recorded as gaps, per stream",
            streams.gaps.clone(),
        );
        r.register(
            "gap_samples",
            "Samples recorded as missing, per stream",
            streams.gap_samples.clone(),
        );
        r.register(
            "record_samples",
            "Samples sent to the record (NaN fill included), per stream",
            streams.samples.clone(),
        );
        r.register_with_unit(
            "window_residual",
            "Relative residual ||A s - y|| / ||y|| of the last window, per stream",
            Unit::Ratios,
            streams.residual.clone(),
        );
        r.register(
            "solver_iterations",
            "Solver iterations summed over windows, per stream",
            streams.iterations.clone(),
        );
        r.register_with_unit(
            "solve_duration",
            "Solve time per window, per stream",
            Unit::Seconds,
            streams.solve_time.clone(),
        );
        // Analytics hooks.
        r.register(
            "window_trust",
            "Trust of the last assessed window, per stream: 1 trusted, 0 low trust",
            analytics.trust.clone(),
        );
        r.register_with_unit(
            "window_cv_error",
            "Hold-out (cross-validation) relative RMS error of the last assessed window, per stream",
            Unit::Ratios,
            analytics.cv_error.clone(),
        );
        r.register(
            "advised_samples_per_window",
            "Samples per window advised to the node (sampling advice), per stream",
            analytics.advised_m.clone(),
        );
        r.register(
            "band_rms",
            "RMS of the last feature block in the stream's units; band=\"full\" is the whole record band",
            analytics.band_rms.clone(),
        );
        r.register_with_unit(
            "velocity_rms",
            "Velocity RMS of the last block (set by the analytics stage)",
            Unit::Other("millimeters_per_second".into()),
            analytics.velocity_rms_mm_s.clone(),
        );
        r.register(
            "fault_frequency_amplitude",
            "Amplitude of the last feature block's peaks at labelled fault frequencies, in the stream's units. Indicative only: it does not replace a qualified analyst, the machine maker's limits or local codes",
            analytics.fault_amplitude.clone(),
        );
        // Gateway.
        r.register(
            "connections_active",
            "Node connections open now",
            g.connections_active.clone(),
        );
        r.register(
            "connections_accepted",
            "Node connections accepted",
            g.connections_accepted.clone(),
        );
        r.register(
            "connections_rejected",
            "Connections closed for a protocol fault (corrupt frame, failed authentication)",
            g.connections_rejected.clone(),
        );
        r.register(
            "advice_messages_sent",
            "Sampling-advice control frames sent to nodes",
            g.advice_sent.clone(),
        );
        r.register(
            "idle_timeouts",
            "Connections closed for idleness",
            g.idle_timeouts.clone(),
        );
        r.register(
            "frames_accepted",
            "Window frames handed to the pipeline",
            g.frames_accepted.clone(),
        );
        r.register(
            "frames_rejected",
            "Frames rejected at ingest by reason: crc, decode, invalid, unauthenticated, truncated (the connection ended inside the frame); a corrupt frame cannot be trusted to name its stream, so these are per gateway",
            g.frames_rejected.clone(),
        );
        r.register(
            "frames_dropped",
            "Windows dropped after ingest: late, duplicate (by the reorder buffers), out_of_range (a seq too far from its capture's start to place)",
            g.frames_dropped.clone(),
        );
        r.register(
            "stream_frames_dropped",
            "Windows dropped by the reorder buffers, per stream: late, duplicate",
            g.stream_frames_dropped.clone(),
        );
        r.register_with_unit(
            "received",
            "Bytes of whole frames received",
            Unit::Bytes,
            g.received_bytes.clone(),
        );
        r.register(
            "pipeline_packets",
            "Packets taken by the pipeline",
            g.packets.clone(),
        );
        r.register(
            "windows_lost",
            "Windows declared lost (never arrived)",
            g.windows_lost.clone(),
        );
        r.register(
            "windows_failed",
            "Windows whose reconstruction failed (recorded as gaps)",
            g.windows_failed.clone(),
        );
        r.register("streams", "Streams seen", g.streams.clone());
        r.register(
            "queue_depth",
            "Items waiting in a queue now (lag: packets waiting for the pipeline, windows waiting for a worker)",
            g.queue_depth.clone(),
        );
        r.register(
            "queue_capacity",
            "Capacity of a queue",
            g.queue_capacity.clone(),
        );
        r.register("workers", "Solver worker threads", g.workers.clone());
        r.register_with_unit(
            "worker_busy",
            "Solver time summed over workers; rate / csgate_workers is the utilisation",
            Unit::Seconds,
            g.worker_busy.clone(),
        );
        r.register_with_unit(
            "record_written",
            "Bytes of record files written",
            Unit::Bytes,
            g.record_bytes.clone(),
        );
        r.register(
            "record_write_errors",
            "Record write errors (disk full, folder not writable, ...); each abandons the open file and starts discarding until a new file can be written",
            g.record_write_errors.clone(),
        );
        r.register(
            "record_writable",
            "1 while the record is being written, 0 during a write outage",
            g.record_writable.clone(),
        );
        r.register(
            "record_dropped_samples",
            "Samples (NaN fill of gaps included) that could not be written during write outages",
            g.record_dropped_samples.clone(),
        );
        r.register(
            "record_dropped_rows",
            "Window, peak and indicator rows that could not be written during write outages",
            g.record_dropped_rows.clone(),
        );
        r.register(
            "feed_events",
            "Events published to the feed",
            g.feed_events.clone(),
        );
        r.register(
            "shutdown_discarded_packets",
            "Packets discarded by a shortened shutdown drain",
            g.discarded_at_shutdown.clone(),
        );
        Self {
            registry,
            streams,
            analytics,
            busy_us: Arc::new(AtomicU64::new(0)),
            gateway: g,
        }
    }

    /// Copies the gateway-wide atomics into the metrics.
    pub fn refresh(&self, s: &MetricSources) {
        let g = &self.gateway;
        let i = s.ingest.snapshot();
        let p = &s.pipeline;
        let set = |c: &Counter, v: u64| c.inner().store(v, Relaxed);
        let reason = |r: &str| ReasonLabels { reason: r.into() };
        let queue = |q: &str| QueueLabels { queue: q.into() };
        g.connections_active.set(i.connections_active as i64);
        set(&g.connections_accepted, i.connections_accepted);
        set(&g.connections_rejected, i.connections_rejected);
        set(&g.idle_timeouts, i.idle_timeouts);
        set(&g.advice_sent, i.advice_sent);
        set(&g.frames_accepted, i.frames_accepted);
        set(
            &g.frames_rejected.get_or_create(&reason("crc")),
            i.crc_errors,
        );
        set(
            &g.frames_rejected.get_or_create(&reason("decode")),
            i.decode_errors,
        );
        set(
            &g.frames_rejected.get_or_create(&reason("truncated")),
            i.truncated_frames,
        );
        set(
            &g.frames_rejected.get_or_create(&reason("invalid")),
            i.validation_errors,
        );
        set(
            &g.frames_rejected.get_or_create(&reason("unauthenticated")),
            i.auth_failures,
        );
        set(
            &g.frames_dropped.get_or_create(&reason("late")),
            p.late.load(Relaxed),
        );
        set(
            &g.frames_dropped.get_or_create(&reason("duplicate")),
            p.duplicates.load(Relaxed),
        );
        set(
            &g.frames_dropped.get_or_create(&reason("out_of_range")),
            p.out_of_range.load(Relaxed),
        );
        if let Ok(v) = p.reorder_by_stream.lock() {
            for &(id, dup, late) in v.iter() {
                for (why, n) in [("duplicate", dup), ("late", late)] {
                    let l = StreamReasonLabels {
                        node: id.node,
                        channel: id.channel,
                        reason: why.into(),
                    };
                    set(&g.stream_frames_dropped.get_or_create(&l), n);
                }
            }
        }
        set(&g.received_bytes, i.bytes);
        set(&g.packets, p.packets.load(Relaxed));
        set(&g.windows_lost, p.lost_windows.load(Relaxed));
        set(&g.windows_failed, p.failed_windows.load(Relaxed));
        g.streams.set(p.streams.load(Relaxed) as i64);
        let packets = match s.packet_channel.as_ref().and_then(|w| w.upgrade()) {
            Some(tx) => (tx.max_capacity() - tx.capacity()) as u64,
            None => s.packet_queue.load(Relaxed),
        };
        g.queue_depth
            .get_or_create(&queue("packets"))
            .set(packets as i64);
        g.queue_depth
            .get_or_create(&queue("solver"))
            .set(p.queued.load(Relaxed) as i64);
        g.queue_capacity
            .get_or_create(&queue("packets"))
            .set(s.packet_queue_capacity as i64);
        g.queue_capacity
            .get_or_create(&queue("solver"))
            .set(s.solver_queue_capacity as i64);
        g.workers.set(s.workers as i64);
        g.worker_busy.inner().store(
            (self.busy_us.load(Relaxed) as f64 * 1e-6).to_bits(),
            Relaxed,
        );
        set(&g.record_bytes, s.record_bytes.load(Relaxed));
        set(&g.record_write_errors, s.record.write_errors.load(Relaxed));
        g.record_writable
            .set(i64::from(!s.record.failing.load(Relaxed)));
        set(
            &g.record_dropped_samples,
            s.record.dropped_samples.load(Relaxed),
        );
        set(&g.record_dropped_rows, s.record.dropped_rows.load(Relaxed));
        set(&g.feed_events, s.feed.published());
        set(
            &g.discarded_at_shutdown,
            s.discarded_at_shutdown.load(Relaxed),
        );
    }

    /// The OpenMetrics text of every metric (ends with `# EOF`).
    pub fn encode(&self) -> String {
        let mut out = String::new();
        // Writing into a String cannot fail.
        let _ = prometheus_client::encoding::text::encode(&mut out, &self.registry);
        out
    }

    /// Notes one reconstructed window's report.
    pub fn note_window(
        &self,
        node: u32,
        channel: u16,
        residual: f64,
        iterations: u32,
        solve_us: f64,
    ) {
        let l = StreamLabels { node, channel };
        let s = &self.streams;
        s.windows.get_or_create(&l).inc();
        s.iterations.get_or_create(&l).inc_by(u64::from(iterations));
        s.residual.get_or_create(&l).set(residual);
        let solve_us = if solve_us.is_finite() {
            solve_us.max(0.0)
        } else {
            0.0
        };
        s.solve_time.get_or_create(&l).observe(solve_us * 1e-6);
        self.busy_us.fetch_add(solve_us.round() as u64, Relaxed);
    }

    /// Notes the trust figures of a window row (`trust` code of the record: 1 trusted, 2 low,
    /// anything else not assessed).
    pub fn note_trust(&self, node: u32, channel: u16, cv_error: f64, trust: u8) {
        let l = StreamLabels { node, channel };
        let a = &self.analytics;
        match trust {
            1 => a.trust.get_or_create(&l).set(1.0),
            2 => a.trust.get_or_create(&l).set(0.0),
            _ => return,
        };
        if cv_error.is_finite() {
            a.cv_error.get_or_create(&l).set(cv_error);
        }
    }

    /// Notes the sampling advice of a stream.
    pub fn note_advice(&self, node: u32, channel: u16, m: u32) {
        let l = StreamLabels { node, channel };
        self.analytics.advised_m.get_or_create(&l).set(i64::from(m));
    }

    /// Notes a block's indicators.
    pub fn note_indicators(&self, node: u32, channel: u16, row: &crate::features::IndicatorRow) {
        let a = &self.analytics;
        if row.rms.is_finite() {
            let l = BandLabels {
                node,
                channel,
                band: "full".into(),
            };
            a.band_rms.get_or_create(&l).set(row.rms);
        }
        if row.velocity_rms_mm_s.is_finite() {
            let l = StreamLabels { node, channel };
            a.velocity_rms_mm_s
                .get_or_create(&l)
                .set(row.velocity_rms_mm_s);
        }
    }

    /// Notes a labelled peak; the labels of the stream's previous block are removed when the
    /// first peak of a new block arrives.
    pub fn note_peak(&self, node: u32, channel: u16, row: &crate::features::PeakRow) {
        let label = row.label_str();
        if label.is_empty() || !row.amplitude.is_finite() {
            return;
        }
        let a = &self.analytics;
        let l = FaultLabels {
            node,
            channel,
            label: label.to_string(),
            spectrum: if row.source == 1 {
                "envelope"
            } else {
                "direct"
            }
            .into(),
        };
        let mut seen = a.fault_labels.lock().unwrap_or_else(|e| e.into_inner());
        let entry = seen
            .entry(StreamLabels { node, channel })
            .or_insert((row.t_unix_ns, Vec::new()));
        if entry.0 != row.t_unix_ns {
            for old in entry.1.drain(..) {
                a.fault_amplitude.remove(&old);
            }
            entry.0 = row.t_unix_ns;
        }
        a.fault_amplitude.get_or_create(&l).set(row.amplitude);
        if !entry.1.contains(&l) {
            entry.1.push(l);
        }
    }

    /// Notes a gap.
    pub fn note_gap(&self, node: u32, channel: u16, len: u64) {
        let l = StreamLabels { node, channel };
        self.streams.gaps.get_or_create(&l).inc();
        self.streams.gap_samples.get_or_create(&l).inc_by(len);
        self.streams.samples.get_or_create(&l).inc_by(len);
    }

    /// Notes samples sent to the record.
    pub fn note_samples(&self, node: u32, channel: u16, len: u64) {
        let l = StreamLabels { node, channel };
        self.streams.samples.get_or_create(&l).inc_by(len);
    }
}

/// The `Content-Type` of [`GatewayMetrics::encode`]'s output.
pub const OPENMETRICS_CONTENT_TYPE: &str =
    "application/openmetrics-text; version=1.0.0; charset=utf-8";
