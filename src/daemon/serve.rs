//! The running gateway: TCP ingest, the reconstruction pipeline, the record writer and the HTTP
//! endpoint, joined and shut down in order.
//!
//! ```text
//!  sockets ─► tcp::run ─(ingest.channel_capacity)─► forwarder ─(64)─► pipeline::run (thread)
//!        ─(record.queue_capacity)─► record tap (thread: metrics, feed) ─► RecordSink (thread)
//! ```
//!
//! tokio runs only the sockets, the forwarder and the HTTP endpoint; solving runs on the
//! pipeline's worker pool and HDF5 on the writer thread. Every queue is bounded and every
//! hand-off blocks when full, so slow workers stop the forwarder, then the socket readers, and
//! TCP flow control reaches the nodes; `csgate_queue_depth` shows the lag.
//!
//! Shutdown ([`Shutdown`]): the first signal stops the listener and every connection (each
//! finishes the frame in hand); the forwarder passes on what the sockets handed over, the
//! pipeline reconstructs every complete window, flushes its reorder buffers (the rest becomes
//! gaps) and finishes its stitchers, and the writer closes every file. A second signal, or the
//! drain deadline, shortens this: the packets still waiting in the forwarder's queue are
//! discarded (and counted); the windows already in the pipeline are still finished, so every
//! record is closed complete. A restart opens the next file of the series; the sink never
//! writes to an existing file.
//!
//! Broker mode (`broker.roles`, docs/scale-out.md) swaps the ends of this chain: the `ingest`
//! role sends the forwarder's packets to the frame publisher instead of the pipeline; the
//! `record` role feeds the pipeline with the windows the workers publish (and publishes the
//! feed's lines for dashboards); the `work` role runs [`crate::broker::worker`] beside. Parts
//! a role does not use stay idle (no listener is bound, no record file is created).

use super::config::GatewayConfig;
use super::feed::{EventFeed, GatewayEvent};
use super::http::{self, HttpState};
use super::metrics::{GatewayMetrics, MetricSources};
use crate::advice::{AdviceBoard, AdviceConfig, Advisor, WindowObservation};
use crate::broker::publish::PublishStats;
use crate::broker::record::RecordStats;
use crate::broker::worker::{WorkerSnapshot, WorkerStats};
use crate::broker::{Broker, BrokerError, Role};
use crate::features::FeatureEvent;
use crate::packet::Packet;
use crate::pipeline::events::{EventError, EventSink};
use crate::pipeline::run::{self as pipeline, PipelineError, PipelineStats, PipelineSummary};
use crate::pipeline::run::{Arrival, PipelineOutputs};
use crate::sources::tcp::{self, IngestError, IngestSnapshot, IngestStats};
use crate::store::layout::WindowRow;
use crate::store::StreamKey;
use crate::store::{RecordMsg, RecordSink, SinkStats, StoreError, WriteFault};
use serde::Serialize;
use std::collections::HashMap;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::net::TcpListener;
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

/// Capacity between the forwarder and the pipeline. Small: the real buffer is the ingest
/// channel before the forwarder, whose contents a forced drain can still discard.
const PIPELINE_FEED: usize = 64;

/// Errors that stop the gateway.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum DaemonError {
    /// A listener could not be bound.
    #[error("cannot listen for {what} on {addr}: {source} (key {key})")]
    Bind {
        /// Which listener.
        what: &'static str,
        /// The configuration key naming the address.
        key: &'static str,
        /// The address.
        addr: SocketAddr,
        /// The OS error.
        source: std::io::Error,
    },
    /// The ingest stopped.
    #[error(transparent)]
    Ingest(#[from] IngestError),
    /// The pipeline stopped.
    #[error(transparent)]
    Pipeline(#[from] PipelineError),
    /// The record writer stopped.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The broker failed (connection, streams, leases).
    #[error(transparent)]
    Broker(#[from] BrokerError),
    /// A stage thread panicked.
    #[error("the {0} stage panicked")]
    Panicked(&'static str),
}

/// The shutdown switch: [`Shutdown::signal`] once to drain, twice to shorten the drain.
#[derive(Debug, Clone, Default)]
pub struct Shutdown {
    drain: CancellationToken,
    force: CancellationToken,
}

impl Shutdown {
    /// A switch not yet thrown.
    pub fn new() -> Self {
        Self::default()
    }

    /// First call: begin the drain. Later calls: shorten it.
    pub fn signal(&self) {
        if self.drain.is_cancelled() {
            self.force.cancel();
        } else {
            self.drain.cancel();
        }
    }

    /// True once the drain has begun.
    pub fn is_draining(&self) -> bool {
        self.drain.is_cancelled()
    }
}

/// What a finished run did.
#[derive(Debug, Clone, Serialize)]
pub struct ServeReport {
    /// Ingest counters at the end.
    pub ingest: IngestSnapshot,
    /// Pipeline figures.
    pub pipeline: PipelineSummary,
    /// Record files created.
    pub record_files: u64,
    /// Bytes of record files written.
    pub record_bytes: u64,
    /// Packets discarded by a shortened drain.
    pub discarded_packets: u64,
    /// Write errors of the record writer (each began an outage; see `store::sink`).
    pub record_write_errors: u64,
    /// Samples (NaN fill included) that could not be written during outages.
    pub record_dropped_samples: u64,
    /// Window, peak and indicator rows that could not be written during outages.
    pub record_dropped_rows: u64,
    /// True if the drain was shortened (second signal or deadline).
    pub forced: bool,
    /// Seconds from the first signal to the end.
    pub drain_s: f64,
    /// Broker-mode figures (absent for a standalone gateway).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub broker: Option<BrokerReport>,
}

/// What the broker roles of a finished run did.
#[derive(Debug, Clone, Default, Serialize)]
pub struct BrokerReport {
    /// `ingest`: frames stored in the frames stream.
    pub frames_published: u64,
    /// `ingest`: frames the broker already had.
    pub frames_duplicate: u64,
    /// `ingest`: frames given up after every retry.
    pub frames_failed: u64,
    /// `work`: the worker's counters.
    pub worker: WorkerSnapshot,
    /// `record`: window messages taken.
    pub windows_received: u64,
    /// `record`: event lines published for dashboards.
    pub events_published: u64,
}

/// A gateway with its listeners bound, ready to [`Gateway::run`].
#[derive(Debug)]
pub struct Gateway {
    config: GatewayConfig,
    config_digest: String,
    ingest: Option<TcpListener>,
    http: Option<TcpListener>,
    feed: EventFeed,
    metrics: Arc<GatewayMetrics>,
    write_fault: WriteFault,
}

impl Gateway {
    /// Binds the ingest and HTTP listeners of `config` (a checked configuration, see
    /// [`GatewayConfig::load`]). `config_digest` is written into every record file.
    pub async fn bind(
        config: GatewayConfig,
        config_digest: String,
    ) -> Result<Gateway, DaemonError> {
        let ingest = if !config.broker.enabled() || config.broker.has(Role::Ingest) {
            Some(
                TcpListener::bind(config.ingest.listen)
                    .await
                    .map_err(|source| DaemonError::Bind {
                        what: "nodes",
                        key: "ingest.listen",
                        addr: config.ingest.listen,
                        source,
                    })?,
            )
        } else {
            None
        };
        let http = if config.http.enabled {
            Some(
                TcpListener::bind(config.http.listen)
                    .await
                    .map_err(|source| DaemonError::Bind {
                        what: "metrics and feeds",
                        key: "http.listen",
                        addr: config.http.listen,
                        source,
                    })?,
            )
        } else {
            None
        };
        let feed = EventFeed::new(config.http.feed_capacity);
        let metrics = Arc::new(GatewayMetrics::new(&config.site.name));
        Ok(Gateway {
            config,
            config_digest,
            ingest,
            http,
            feed,
            metrics,
            write_fault: WriteFault::new(),
        })
    }

    /// The address nodes connect to.
    ///
    /// # Panics
    /// If the gateway takes no ingest role (see [`Gateway::try_ingest_addr`]).
    pub fn ingest_addr(&self) -> SocketAddr {
        self.try_ingest_addr()
            .expect("this gateway takes no ingest role")
    }

    /// The address nodes connect to, if this gateway takes TCP ingest.
    pub fn try_ingest_addr(&self) -> Option<SocketAddr> {
        self.ingest
            .as_ref()
            .map(|l| l.local_addr().expect("a bound listener has an address"))
    }

    /// The address of `/metrics`, `/health` and `/events`, if enabled.
    pub fn http_addr(&self) -> Option<SocketAddr> {
        self.http
            .as_ref()
            .map(|l| l.local_addr().expect("a bound listener has an address"))
    }

    /// The event feed: stages publish into it, `/events` readers receive.
    pub fn feed(&self) -> EventFeed {
        self.feed.clone()
    }

    /// The metrics (the analytics stage sets its hooks through them).
    pub fn metrics(&self) -> Arc<GatewayMetrics> {
        Arc::clone(&self.metrics)
    }

    /// Fault injection for tests: a switch that makes the record writer's writes fail as on
    /// a full disk ([`WriteFault`]). Off unless a test turns it on.
    pub fn record_write_fault(&self) -> WriteFault {
        self.write_fault.clone()
    }

    /// Runs until `shutdown` is signalled and the drain is complete.
    pub async fn run(self, shutdown: Shutdown) -> Result<ServeReport, DaemonError> {
        let Gateway {
            config,
            config_digest,
            ingest,
            http,
            feed,
            metrics,
            write_fault,
        } = self;
        let roles = &config.broker;
        let record_role = !roles.enabled() || roles.has(Role::Record);
        let broker = if roles.enabled() {
            let name = format!("csgate {}", config.site.name);
            Some(Broker::connect(roles, name.trim()).await?)
        } else {
            None
        };
        let ingest_stats = Arc::new(IngestStats::default());
        let pipe_stats = Arc::new(PipelineStats::default());
        let publish_stats = Arc::new(PublishStats::default());
        let worker_stats = Arc::new(WorkerStats::default());
        let record_stats = Arc::new(RecordStats::default());
        let packet_queue = Arc::new(AtomicU64::new(0));
        let discarded = Arc::new(AtomicU64::new(0));
        let draining = Arc::new(AtomicBool::new(false));

        // Writer thread, behind the record tap.
        let mut sink_config = config.sink_config(config_digest);
        sink_config.write_fault = write_fault;
        let record_bytes = Arc::clone(&sink_config.live_bytes);
        let record_live = Arc::clone(&sink_config.live);
        let (sink, sink_handle) = RecordSink::spawn(sink_config);
        let (tap_tx, tap_rx) = std::sync::mpsc::sync_channel(config.record.queue_capacity);
        let board = config.advice_board();
        let tap = {
            let metrics = Arc::clone(&metrics);
            let feed = feed.clone();
            let advice = board
                .clone()
                .map(|b| AdviceTap::new(b, config.advice.clone()));
            std::thread::Builder::new()
                .name("csgate-record-tap".into())
                .spawn(move || record_tap(tap_rx, sink, &metrics, &feed, advice))
                .expect("spawn the record tap thread")
        };

        // Pipeline thread; the analytics stage's feature events go to the feed.
        let (pipe_tx, pipe_rx) = mpsc::channel::<Arrival>(PIPELINE_FEED);
        let outputs = PipelineOutputs {
            events: vec![Box::new(FeedSink(feed.clone()))],
        };
        let pipe = pipeline::spawn_with(
            config.pipeline.clone(),
            pipe_rx,
            tap_tx,
            Arc::clone(&pipe_stats),
            outputs,
        );
        let mut pipe_done = tokio::task::spawn_blocking(move || pipe.join());

        // Sources: TCP ingest and MQTT into one channel, the forwarder behind it to the
        // pipeline (standalone) or to the frame publisher (broker ingest).
        let ingest_config = config.ingest_config();
        let (ing_tx, ing_rx) = mpsc::channel::<Packet>(config.ingest.channel_capacity);
        let ing_tx_weak = ing_tx.downgrade();
        let drain_token = shutdown.drain.clone();
        let mqtt_task = (config.mqtt.enabled && ingest.is_some()).then(|| {
            let token = drain_token.clone();
            tokio::spawn(crate::sources::mqtt::run(
                config.mqtt.clone(),
                ingest_config.limits.clone(),
                config.key_ring(),
                ing_tx.clone(),
                Arc::clone(&ingest_stats),
                async move { token.cancelled().await },
            ))
        });
        let mut ingest_task = match ingest {
            Some(listener) => {
                let token = drain_token.clone();
                tokio::spawn(tcp::run_advised(
                    listener,
                    ingest_config.clone(),
                    ing_tx,
                    Arc::clone(&ingest_stats),
                    board,
                    async move { token.cancelled().await },
                ))
            }
            None => {
                drop(ing_tx);
                let token = drain_token.clone();
                tokio::spawn(async move {
                    token.cancelled().await;
                    Ok(())
                })
            }
        };
        let mut publisher = None;
        let forwarder = match &broker {
            Some(b) if roles.has(Role::Ingest) => {
                let (pub_tx, pub_rx) = mpsc::channel::<Packet>(PIPELINE_FEED);
                publisher = Some(tokio::spawn(crate::broker::publish::publish_frames(
                    b.clone(),
                    pub_rx,
                    Arc::clone(&publish_stats),
                )));
                tokio::spawn(forward(
                    ing_rx,
                    pub_tx,
                    shutdown.force.clone(),
                    Arc::clone(&packet_queue),
                    Arc::clone(&discarded),
                ))
            }
            _ => tokio::spawn(forward(
                ing_rx,
                pipe_tx.clone(),
                shutdown.force.clone(),
                Arc::clone(&packet_queue),
                Arc::clone(&discarded),
            )),
        };

        // Broker roles beside: the recorder's window source and event publisher, the worker.
        let events_stop = CancellationToken::new();
        let (mut windows_task, mut events_task, mut worker_task) = (None, None, None);
        if let Some(b) = &broker {
            if roles.has(Role::Record) {
                windows_task = Some(tokio::spawn(crate::broker::record::consume_windows(
                    b.clone(),
                    ingest_config.limits.clone(),
                    pipe_tx.clone(),
                    Arc::clone(&record_stats),
                    drain_token.clone(),
                )));
                if roles.publish_events {
                    events_task = Some(tokio::spawn(crate::broker::record::publish_events(
                        b.clone(),
                        feed.clone(),
                        Arc::clone(&record_stats),
                        events_stop.clone(),
                    )));
                }
            }
            if roles.has(Role::Work) {
                worker_task = Some(tokio::spawn(crate::broker::worker::run(
                    b.clone(),
                    config.pipeline.clone(),
                    ingest_config.limits.clone(),
                    Arc::clone(&worker_stats),
                    drain_token.clone(),
                )));
            }
        }
        // Without the record role nothing feeds the pipeline; it waits, idle, for the drain.
        let idle_pipe_tx = (!record_role).then_some(pipe_tx);

        // HTTP.
        let http_stop = CancellationToken::new();
        let sources = MetricSources {
            ingest: Arc::clone(&ingest_stats),
            pipeline: Arc::clone(&pipe_stats),
            record_bytes: Arc::clone(&record_bytes),
            record: Arc::clone(&record_live),
            packet_queue: Arc::clone(&packet_queue),
            packet_channel: Some(ing_tx_weak),
            packet_queue_capacity: config.ingest.channel_capacity,
            solver_queue_capacity: config.pipeline.max_queued_windows,
            workers: config.pipeline.workers,
            discarded_at_shutdown: Arc::clone(&discarded),
            feed: feed.clone(),
        };
        let http_task = http.map(|listener| {
            let state = Arc::new(HttpState {
                metrics: Arc::clone(&metrics),
                sources,
                feed: feed.clone(),
                site: config.site.name.clone(),
                started: Instant::now(),
                draining: Arc::clone(&draining),
                stop: http_stop.clone(),
            });
            let stop = http_stop.clone();
            tokio::spawn(async move {
                let served = axum::serve(listener, http::router(state))
                    .with_graceful_shutdown(async move { stop.cancelled().await })
                    .await;
                if let Err(e) = served {
                    tracing::error!(error = %e, "http endpoint failed");
                }
            })
        });
        tracing::info!(
            site = %config.site.name,
            ingest = %config.ingest.listen,
            roles = ?roles.roles,
            workers = config.pipeline.workers,
            records = %config.record.folder.display(),
            "gateway running"
        );

        // Run until a signal, or until a stage stops on its own (an error: start a shutdown).
        let mut early_pipe = None;
        let mut early_ingest = None;
        let worker_ends = async {
            match worker_task.as_mut() {
                Some(t) => t.await,
                None => std::future::pending().await,
            }
        };
        let mut early_worker = None;
        tokio::select! {
            _ = shutdown.drain.cancelled() => {}
            r = &mut pipe_done => early_pipe = Some(r),
            r = &mut ingest_task => early_ingest = Some(r),
            r = worker_ends => early_worker = Some(r),
        }
        if !shutdown.drain.is_cancelled() {
            tracing::error!("a stage stopped on its own; shutting down");
            shutdown.drain.cancel();
        }
        let drain_started = Instant::now();
        draining.store(true, Ordering::Relaxed);
        feed.publish(&GatewayEvent::ShuttingDown);
        tracing::info!(
            queued_packets = packet_queue.load(Ordering::Relaxed),
            queued_windows = pipe_stats.queued.load(Ordering::Relaxed),
            "shutdown: no longer accepting; draining (signal again to shorten)"
        );
        let deadline = {
            let force = shutdown.force.clone();
            let after = Duration::from_secs(config.shutdown.drain_timeout_s);
            tokio::spawn(async move {
                tokio::select! {
                    _ = tokio::time::sleep(after) => {
                        tracing::warn!(after_s = after.as_secs(), "drain deadline reached; discarding the packets still waiting");
                        force.cancel();
                    }
                    _ = force.cancelled() => {}
                }
            })
        };
        let force_log = {
            let force = shutdown.force.clone();
            tokio::spawn(async move {
                force.cancelled().await;
                tracing::warn!("shortened drain: packets still waiting are discarded");
            })
        };

        let ingest_result = match early_ingest {
            Some(r) => r,
            None => ingest_task.await,
        };
        if let Some(t) = mqtt_task {
            let _ = t.await;
        }
        let _ = forwarder.await;
        let mut broker_error = None;
        if let Some(t) = publisher {
            if let Ok(Err(e)) = t.await {
                broker_error = Some(e);
            }
        }
        if let Some(t) = windows_task {
            if let Ok(Err(e)) = t.await {
                broker_error = Some(e);
            }
        }
        let worker_result = match (early_worker, worker_task) {
            (Some(r), _) => Some(r),
            (None, Some(t)) => Some(t.await),
            (None, None) => None,
        };
        if let Some(Ok(Err(e))) = worker_result {
            broker_error = Some(e);
        }
        drop(idle_pipe_tx);
        let pipe_result = match early_pipe {
            Some(r) => r,
            None => {
                // Name what is still running every few seconds while the pipeline drains.
                loop {
                    tokio::select! {
                        r = &mut pipe_done => break r,
                        _ = tokio::time::sleep(Duration::from_secs(5)) => tracing::info!(
                            queued_windows = pipe_stats.queued.load(Ordering::Relaxed),
                            "still draining: pipeline"
                        ),
                    }
                }
            }
        };
        let tap_result = tokio::task::spawn_blocking(move || tap.join()).await;
        let sink_result = tokio::task::spawn_blocking(move || sink_handle.join()).await;
        // The last event lines (the shutdown notice, the tails' features) go out too.
        events_stop.cancel();
        if let Some(t) = events_task {
            let _ = t.await;
        }
        deadline.abort();
        force_log.abort();
        http_stop.cancel();
        if let Some(h) = http_task {
            let _ = h.await;
        }

        let sink_stats: SinkStats = match sink_result {
            Ok(Ok(r)) => r?,
            _ => return Err(DaemonError::Panicked("record writer")),
        };
        if !matches!(tap_result, Ok(Ok(()))) {
            return Err(DaemonError::Panicked("record tap"));
        }
        let summary = match pipe_result {
            Ok(Ok(r)) => r?,
            _ => return Err(DaemonError::Panicked("pipeline")),
        };
        match ingest_result {
            Ok(r) => r?,
            Err(_) => return Err(DaemonError::Panicked("ingest")),
        }
        if let Some(e) = broker_error {
            return Err(e.into());
        }
        let report = ServeReport {
            ingest: ingest_stats.snapshot(),
            pipeline: summary,
            record_files: sink_stats.files,
            record_bytes: sink_stats.bytes_written,
            discarded_packets: discarded.load(Ordering::Relaxed),
            record_write_errors: sink_stats.errors,
            record_dropped_samples: sink_stats.dropped_samples,
            record_dropped_rows: sink_stats.dropped_rows,
            forced: shutdown.force.is_cancelled(),
            drain_s: drain_started.elapsed().as_secs_f64(),
            broker: broker.map(|_| BrokerReport {
                frames_published: publish_stats.published.load(Ordering::Relaxed),
                frames_duplicate: publish_stats.duplicates.load(Ordering::Relaxed),
                frames_failed: publish_stats.failed.load(Ordering::Relaxed),
                worker: worker_stats.snapshot(),
                windows_received: record_stats.windows.load(Ordering::Relaxed),
                events_published: record_stats.events.load(Ordering::Relaxed),
            }),
        };
        tracing::info!(
            windows = report.pipeline.windows,
            lost = report.pipeline.lost_windows,
            files = report.record_files,
            bytes = report.record_bytes,
            discarded = report.discarded_packets,
            record_write_errors = report.record_write_errors,
            not_written_samples = report.record_dropped_samples,
            "gateway stopped; every record closed"
        );
        Ok(report)
    }
}

/// Passes packets from the sockets' channel to the pipeline's (or the frame publisher's),
/// keeping the lag gauge; on `force` it discards what is still waiting. Ends when the
/// sockets' side closes.
async fn forward<T: From<Packet>>(
    mut rx: mpsc::Receiver<Packet>,
    tx: mpsc::Sender<T>,
    force: CancellationToken,
    depth: Arc<AtomicU64>,
    discarded: Arc<AtomicU64>,
) {
    loop {
        let next = tokio::select! {
            biased;
            _ = force.cancelled() => break,
            p = rx.recv() => p,
        };
        let Some(packet) = next else {
            depth.store(0, Ordering::Relaxed);
            return;
        };
        depth.store(rx.len() as u64, Ordering::Relaxed);
        tokio::select! {
            biased;
            _ = force.cancelled() => {
                discarded.fetch_add(1, Ordering::Relaxed);
                break;
            }
            sent = tx.send(packet.into()) => if sent.is_err() {
                // The pipeline stopped; the caller reports why.
                break;
            },
        }
    }
    // Forced or the pipeline is gone: discard what waits, refuse what comes.
    drop(tx);
    rx.close();
    let mut n = 0;
    while rx.recv().await.is_some() {
        n += 1;
    }
    discarded.fetch_add(n, Ordering::Relaxed);
    depth.store(0, Ordering::Relaxed);
}

/// Publishes the analytics stage's feature events into the gateway's feed, each line tagged
/// `"kind": "features"` like the gateway's own events (docs/events.md).
struct FeedSink(EventFeed);

#[derive(Serialize)]
struct FeatureLine<'a> {
    kind: &'static str,
    #[serde(flatten)]
    event: &'a FeatureEvent,
}

impl EventSink for FeedSink {
    fn send(&mut self, event: &Arc<FeatureEvent>) -> Result<(), EventError> {
        self.0.publish(&FeatureLine {
            kind: "features",
            event,
        });
        Ok(())
    }

    fn finish(&mut self) -> Result<(), EventError> {
        Ok(())
    }
}

/// The sampling advice of the opted-in nodes, computed in the record tap from the window
/// rows on their way to the record and posted on the board the ingest sends from.
struct AdviceTap {
    board: Arc<AdviceBoard>,
    config: AdviceConfig,
    advisors: HashMap<StreamKey, Advisor>,
}

impl AdviceTap {
    fn new(board: Arc<AdviceBoard>, config: AdviceConfig) -> Self {
        Self {
            board,
            config,
            advisors: HashMap::new(),
        }
    }

    fn observe(
        &mut self,
        stream: StreamKey,
        row: &WindowRow,
        effective_support: Option<u32>,
        metrics: &GatewayMetrics,
        feed: &EventFeed,
    ) {
        if !self.board.advises(stream.node) {
            return;
        }
        let advisor = self
            .advisors
            .entry(stream)
            .or_insert_with(|| Advisor::new(self.config.clone()));
        let obs = WindowObservation {
            n: row.n,
            m: row.m,
            effective_support,
            low_trust: match row.trust {
                crate::store::layout::trust::OK => Some(false),
                crate::store::layout::trust::LOW => Some(true),
                _ => None,
            },
        };
        let first = advisor.current().is_none();
        let change = advisor.observe(&obs);
        if first {
            if let Some(m) = advisor.current() {
                metrics.note_advice(stream.node, stream.channel, m);
            }
        }
        let Some(a) = change else {
            return;
        };
        let id = crate::packet::StreamId {
            node: stream.node,
            channel: stream.channel,
        };
        self.board.post(id, a.m);
        metrics.note_advice(stream.node, stream.channel, a.m);
        tracing::info!(stream = %id, m = a.m, previous = a.previous, reason = ?a.reason, "sampling advice");
        feed.publish(&GatewayEvent::Advice {
            node: stream.node,
            channel: stream.channel,
            seq: row.seq,
            m: a.m,
            previous: a.previous,
            need: a.need,
            reason: a.reason,
        });
    }
}

/// The record tap: every record message passes here on its way to the writer thread, so
/// per-stream metrics and feed events come from exactly what is recorded, without the
/// pipeline knowing about either.
fn record_tap(
    rx: std::sync::mpsc::Receiver<RecordMsg>,
    sink: RecordSink,
    metrics: &GatewayMetrics,
    feed: &EventFeed,
    mut advice: Option<AdviceTap>,
) {
    while let Ok(msg) = rx.recv() {
        match &msg {
            RecordMsg::Window {
                stream,
                row,
                effective_support,
            } => {
                metrics.note_window(
                    stream.node,
                    stream.channel,
                    row.residual,
                    row.iterations,
                    row.solve_time_us,
                );
                metrics.note_trust(stream.node, stream.channel, row.cv_error, row.trust);
                if let Some(a) = advice.as_mut() {
                    a.observe(*stream, row, *effective_support, metrics, feed);
                }
            }
            RecordMsg::Peak { stream, row } => {
                metrics.note_peak(stream.node, stream.channel, row);
            }
            RecordMsg::Indicator { stream, row } => {
                metrics.note_indicators(stream.node, stream.channel, row);
            }
            RecordMsg::Gap {
                stream,
                start,
                len,
                reason,
            } => {
                metrics.note_gap(stream.node, stream.channel, *len);
                feed.publish(&GatewayEvent::Gap {
                    node: stream.node,
                    channel: stream.channel,
                    start: *start,
                    len: *len,
                    reason: format!("{reason:?}"),
                });
            }
            RecordMsg::Samples {
                stream, samples, ..
            } => metrics.note_samples(stream.node, stream.channel, samples.len() as u64),
            _ => {}
        }
        if sink.send(msg).is_err() {
            // The writer stopped (its error comes back through its join handle); dropping
            // the receiver makes the pipeline stop too.
            break;
        }
    }
}
