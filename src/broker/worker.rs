//! The `work` role: reconstructs the windows of the partitions this worker holds a lease on
//! and publishes them to the windows stream.
//!
//! ```text
//!  lease renewals ─► Acquired(p): restart consumer part-<p> ─┐
//!                    Dropped(p): stop it, forget its streams  │
//!  consumer tasks (one per held partition) ─(bounded)─► solve loop ─► solver pool (threads)
//!        ─► publish to <name>.windows.<node>.<channel> ─► on the broker's ack: ack the frame
//! ```
//!
//! Each stream's windows are solved one at a time in arrival order (the warm start of a
//! window is the previous window's solution), streams in parallel over the pool. A frame is
//! acknowledged only once its reconstruction is stored in the windows stream, so a worker
//! that dies leaves every unfinished frame in the frames stream (a work queue: acknowledged
//! frames are gone, the rest wait).
//!
//! Taking a partition over, the new holder deletes the partition's durable consumer and
//! creates it again from the start of what the stream still holds: the dead holder's
//! delivered-but-unacknowledged frames come first, in stream order, without waiting for their
//! acknowledgement time to run out. Frames that the old holder had published but not yet
//! acknowledged are solved again; their windows carry the same message id and the broker
//! stores them once (and the recorder's reorder buffer drops any later copy by its sequence
//! number).

use super::lease::{LeaseChange, Leases};
use super::message;
use super::{window_msg_id, Broker, BrokerError};
use crate::basis::BasisPlanner;
use crate::packet::{wire, DecodeError, Frame, Limits, Packet, StreamId};
use crate::pipeline::pool::WorkerPool;
use crate::pipeline::reconstruct::{
    ReconstructJob, ReconstructedWindow, SolvedWindow, WarmState, WorkerState,
};
use crate::pipeline::run::PipelineConfig;
use async_nats::jetstream::consumer::{pull, AckPolicy, DeliverPolicy};
use async_nats::jetstream::message::Acker;
use async_nats::jetstream::message::PublishMessage as Publish;
use futures::StreamExt;
use serde::Serialize;
use std::collections::{HashMap, VecDeque};
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::mpsc;
use tokio::task::JoinSet;
use tokio_util::sync::CancellationToken;

/// Header naming the worker that reconstructed a window (for operators and the tests).
pub const WORKER_HEADER: &str = "Csgate-Worker";

/// Counters of a worker.
#[derive(Debug, Default)]
pub struct WorkerStats {
    /// Frames taken from the broker.
    pub frames: AtomicU64,
    /// Frames that did not parse (acknowledged and dropped).
    pub bad_frames: AtomicU64,
    /// Windows reconstructed.
    pub solved: AtomicU64,
    /// Windows whose reconstruction failed (published as such; the recorder records a gap).
    pub failed: AtomicU64,
    /// Windows stored in the windows stream.
    pub published: AtomicU64,
    /// Windows the broker already had (redone after a takeover).
    pub duplicates: AtomicU64,
    /// Publishes that failed (the frame is delivered again).
    pub publish_errors: AtomicU64,
    /// Results discarded because their partition moved while they were solved.
    pub stale: AtomicU64,
    /// Partitions held now.
    pub partitions: AtomicU64,
    /// Partitions taken (including the first ones).
    pub acquired: AtomicU64,
    /// Partitions released or lost.
    pub dropped: AtomicU64,
    /// Nanoseconds of solver jobs.
    pub job_ns: AtomicU64,
}

/// A copy of the counters.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
#[allow(missing_docs)]
pub struct WorkerSnapshot {
    pub frames: u64,
    pub bad_frames: u64,
    pub solved: u64,
    pub failed: u64,
    pub published: u64,
    pub duplicates: u64,
    pub publish_errors: u64,
    pub stale: u64,
    pub acquired: u64,
    pub dropped: u64,
}

impl WorkerStats {
    /// Reads the counters.
    pub fn snapshot(&self) -> WorkerSnapshot {
        WorkerSnapshot {
            frames: self.frames.load(Relaxed),
            bad_frames: self.bad_frames.load(Relaxed),
            solved: self.solved.load(Relaxed),
            failed: self.failed.load(Relaxed),
            published: self.published.load(Relaxed),
            duplicates: self.duplicates.load(Relaxed),
            publish_errors: self.publish_errors.load(Relaxed),
            stale: self.stale.load(Relaxed),
            acquired: self.acquired.load(Relaxed),
            dropped: self.dropped.load(Relaxed),
        }
    }
}

/// A frame taken from a partition.
struct Incoming {
    partition: u32,
    epoch: u64,
    packet: Packet,
    frame: bytes::Bytes,
    acker: Acker,
}

/// A stream's place in the solve loop.
#[derive(Default)]
struct StreamState {
    partition: u32,
    epoch: u64,
    queue: VecDeque<Incoming>,
    /// Ticket of the job in flight, with the frame to publish and acknowledge afterwards.
    in_flight: Option<(u64, bytes::Bytes, Acker)>,
    warm: WarmState,
}

/// Runs the work role until `stop` is cancelled; then finishes the windows in flight,
/// publishes them, releases every lease and returns.
pub async fn run(
    broker: Broker,
    pipeline: PipelineConfig,
    limits: Limits,
    stats: Arc<WorkerStats>,
    stop: CancellationToken,
) -> Result<(), BrokerError> {
    let id = broker.config.worker_id();
    let frames = broker.frames_stream().await?;
    broker.windows_stream().await?;
    let mut leases = Leases::open(&broker, &id).await?;
    let planner = Arc::new(BasisPlanner::<f64>::new());
    let (done_tx, mut done_rx) = mpsc::unbounded_channel::<ReconstructedWindow>();
    let pool = WorkerPool::start(
        pipeline.workers,
        "csgate-solve",
        move || WorkerState::new(Arc::clone(&planner)),
        |state: &mut WorkerState, job: ReconstructJob| state.run(job),
        done_tx,
    )
    .map_err(|e| BrokerError::JetStream {
        what: "start the solver workers".into(),
        message: e.to_string(),
    })?;
    let settings = Arc::new(pipeline.solver.clone());
    let trust = Arc::new(pipeline.trust.clone());
    let capacity = pipeline.max_queued_windows.max(1);
    let (in_tx, mut in_rx) = mpsc::channel::<Incoming>(capacity);
    let mut consumers: HashMap<u32, (u64, CancellationToken)> = HashMap::new();
    let mut consumer_tasks = JoinSet::new();
    let mut epoch = 0u64;
    let mut streams: HashMap<StreamId, StreamState> = HashMap::new();
    let mut queued = 0usize;
    let mut in_flight = 0usize;
    let mut next_ticket = 0u64;
    let mut acks = JoinSet::new();
    let mut tick = tokio::time::interval(leases.period());
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    tracing::info!(worker = %id, partitions = broker.config.partitions, "worker running");

    loop {
        tokio::select! {
            biased;
            _ = stop.cancelled() => break,
            Some(r) = done_rx.recv(), if in_flight > 0 => {
                in_flight -= 1;
                let ticket = r.stream_slot as u64;
                let stream = r.packet.stream();
                let Some(st) = streams.get_mut(&stream).filter(|st| {
                    st.in_flight.as_ref().is_some_and(|(t, _, _)| *t == ticket)
                }) else {
                    stats.stale.fetch_add(1, Relaxed);
                    continue;
                };
                let (_, frame, acker) = st.in_flight.take().expect("matched above");
                st.warm = r.warm.clone();
                stats.job_ns.fetch_add((r.solve_time_us * 1e3) as u64, Relaxed);
                if r.outcome.is_ok() { stats.solved.fetch_add(1, Relaxed); } else { stats.failed.fetch_add(1, Relaxed); }
                let h = r.packet.header;
                let body = message::encode(&SolvedWindow::from(r), &frame);
                let sent = broker.js.send_publish(
                    broker.names.window_subject(h.stream.node, h.stream.channel),
                    Publish::build()
                        .payload(body.into())
                        .message_id(window_msg_id(h.stream.node, h.stream.channel, h.capture_id, h.seq))
                        .header(WORKER_HEADER, id.as_str()),
                ).await;
                let stats2 = Arc::clone(&stats);
                // Sent in order on the one connection; the broker's answer is awaited aside.
                acks.spawn(async move {
                    let stored = match sent {
                        Ok(ack) => ack.await.map_err(|e| e.to_string()),
                        Err(e) => Err(e.to_string()),
                    };
                    match stored {
                        Ok(a) => {
                            if a.duplicate { stats2.duplicates.fetch_add(1, Relaxed); } else { stats2.published.fetch_add(1, Relaxed); }
                            if let Err(e) = acker.ack().await {
                                tracing::debug!(error = %e, "frame acknowledgement failed; it comes again");
                            }
                        }
                        Err(e) => {
                            stats2.publish_errors.fetch_add(1, Relaxed);
                            tracing::warn!(error = %e, "window not published; its frame comes again");
                        }
                    }
                });
                submit_next(stream, &mut streams, &pool, &pipeline, &settings, &trust, &mut next_ticket, &mut queued, &mut in_flight);
            }
            _ = tick.tick() => {
                for change in leases.renew().await {
                    match change {
                        LeaseChange::Acquired(p) => {
                            epoch += 1;
                            stats.acquired.fetch_add(1, Relaxed);
                            let token = stop.child_token();
                            consumers.insert(p, (epoch, token.clone()));
                            tracing::info!(partition = p, workers = leases.live_workers(), "partition taken");
                            consumer_tasks.spawn(consume_partition(
                                broker.clone(), frames.clone(), p, epoch, limits.clone(),
                                in_tx.clone(), token, Arc::clone(&stats),
                            ));
                        }
                        LeaseChange::Dropped(p) => {
                            stats.dropped.fetch_add(1, Relaxed);
                            if let Some((_, token)) = consumers.remove(&p) {
                                token.cancel();
                            }
                            // Queued frames stay unacknowledged: the next holder gets them.
                            streams.retain(|_, st| {
                                if st.partition == p {
                                    queued -= st.queue.len();
                                    false
                                } else {
                                    true
                                }
                            });
                            tracing::info!(partition = p, "partition released");
                        }
                    }
                }
                stats.partitions.store(consumers.len() as u64, Relaxed);
                while consumer_tasks.try_join_next().is_some() {}
                while acks.try_join_next().is_some() {}
            }
            Some(inc) = in_rx.recv(), if queued < capacity => {
                if consumers.get(&inc.partition).map(|(e, _)| *e) != Some(inc.epoch) {
                    continue; // from a consumer of a partition since dropped
                }
                let stream = inc.packet.stream();
                let st = streams.entry(stream).or_insert_with(|| StreamState {
                    partition: inc.partition,
                    epoch: inc.epoch,
                    ..StreamState::default()
                });
                if st.epoch != inc.epoch {
                    // The partition came back: start the stream afresh.
                    *st = StreamState { partition: inc.partition, epoch: inc.epoch, ..StreamState::default() };
                }
                st.queue.push_back(inc);
                queued += 1;
                submit_next(stream, &mut streams, &pool, &pipeline, &settings, &trust, &mut next_ticket, &mut queued, &mut in_flight);
            }
        }
    }

    // Stop: no new frames; finish and publish what is being solved; release the leases.
    for (_, (_, token)) in consumers.drain() {
        token.cancel();
    }
    drop(in_rx);
    while consumer_tasks.join_next().await.is_some() {}
    for st in streams.values_mut() {
        queued -= st.queue.len();
        st.queue.clear();
    }
    while in_flight > 0 {
        let Some(r) = done_rx.recv().await else { break };
        in_flight -= 1;
        let stream = r.packet.stream();
        let ticket = r.stream_slot as u64;
        let Some((_, frame, acker)) = streams
            .get_mut(&stream)
            .and_then(|st| st.in_flight.take())
            .filter(|(t, _, _)| *t == ticket)
        else {
            continue;
        };
        let h = r.packet.header;
        let body = message::encode(&SolvedWindow::from(r), &frame);
        if let Ok(ack) = broker
            .js
            .send_publish(
                broker.names.window_subject(h.stream.node, h.stream.channel),
                Publish::build()
                    .payload(body.into())
                    .message_id(window_msg_id(
                        h.stream.node,
                        h.stream.channel,
                        h.capture_id,
                        h.seq,
                    ))
                    .header(WORKER_HEADER, id.as_str()),
            )
            .await
        {
            if ack.await.is_ok() {
                stats.published.fetch_add(1, Relaxed);
                let _ = acker.ack().await;
            }
        }
    }
    while acks.join_next().await.is_some() {}
    leases.release_all().await;
    stats.partitions.store(0, Relaxed);
    drop(pool);
    let _ = queued;
    tracing::info!(worker = %id, "worker stopped; leases released");
    Ok(())
}

/// Submits the stream's next queued window when none is in flight.
#[allow(clippy::too_many_arguments)]
fn submit_next(
    stream: StreamId,
    streams: &mut HashMap<StreamId, StreamState>,
    pool: &WorkerPool<ReconstructJob>,
    pipeline: &PipelineConfig,
    settings: &Arc<crate::solver::SolveSettings>,
    trust: &Arc<crate::pipeline::trust::TrustConfig>,
    next_ticket: &mut u64,
    queued: &mut usize,
    in_flight: &mut usize,
) {
    let Some(st) = streams.get_mut(&stream) else {
        return;
    };
    if st.in_flight.is_some() {
        return;
    }
    let Some(inc) = st.queue.pop_front() else {
        return;
    };
    *queued -= 1;
    let over = pipeline.override_for(stream);
    *next_ticket += 1;
    let job = ReconstructJob {
        stream_slot: *next_ticket as usize,
        start: 0,
        packet: inc.packet,
        basis: over.and_then(|o| o.basis).unwrap_or(pipeline.basis),
        settings: over
            .and_then(|o| o.solver.clone())
            .map(Arc::new)
            .unwrap_or_else(|| Arc::clone(settings)),
        warm_start: over
            .and_then(|o| o.warm_start)
            .unwrap_or(pipeline.warm_start),
        method: over.and_then(|o| o.method).unwrap_or(pipeline.method),
        warm: std::mem::take(&mut st.warm),
        trust: Arc::clone(trust),
        precision: pipeline.precision,
    };
    if pool.submit(job).is_ok() {
        st.in_flight = Some((*next_ticket, inc.frame, inc.acker));
        *in_flight += 1;
    }
}

/// Consumes one partition from the start of what the stream holds for it, handing every
/// frame to the solve loop, until `stop`.
#[allow(clippy::too_many_arguments)]
async fn consume_partition(
    broker: Broker,
    frames: async_nats::jetstream::stream::Stream,
    partition: u32,
    epoch: u64,
    limits: Limits,
    tx: mpsc::Sender<Incoming>,
    stop: CancellationToken,
    stats: Arc<WorkerStats>,
) {
    let name = broker.names.partition_consumer(partition);
    let mut pause = Duration::from_millis(200);
    // Restart the consumer: whatever the previous holder had in hand is delivered afresh.
    let _ = frames.delete_consumer(&name).await;
    let messages = loop {
        let created = frames
            .create_consumer(pull::Config {
                durable_name: Some(name.clone()),
                filter_subject: broker.names.partition_filter(partition),
                ack_policy: AckPolicy::Explicit,
                ack_wait: Duration::from_millis(broker.config.ack_wait_ms),
                deliver_policy: DeliverPolicy::All,
                max_ack_pending: broker.config.max_in_flight as i64,
                ..Default::default()
            })
            .await;
        let started = match created {
            Ok(c) => c.messages().await.map_err(|e| e.to_string()),
            Err(e) => Err(e.to_string()),
        };
        match started {
            Ok(m) => break m,
            Err(e) => {
                tracing::warn!(partition, error = %e, "cannot start the partition's consumer; retrying");
                tokio::select! {
                    _ = stop.cancelled() => return,
                    _ = tokio::time::sleep(pause) => {}
                }
                pause = (pause * 2).min(Duration::from_secs(5));
            }
        }
    };
    tokio::pin!(messages);
    loop {
        let next = tokio::select! {
            _ = stop.cancelled() => return,
            m = messages.next() => m,
        };
        let msg = match next {
            Some(Ok(m)) => m,
            Some(Err(e)) => {
                tracing::debug!(partition, error = %e, "partition consumer");
                continue;
            }
            None => return,
        };
        let (msg, acker) = msg.split();
        stats.frames.fetch_add(1, Relaxed);
        let packet = match wire::parse(&msg.payload, &limits) {
            Ok(Frame::Window(p)) => p,
            Ok(_) | Err(DecodeError::Wire(_)) | Err(DecodeError::Invalid(_)) => {
                stats.bad_frames.fetch_add(1, Relaxed);
                tracing::warn!(partition, subject = %msg.subject, "frame on the broker does not parse; dropped");
                let _ = acker.ack().await;
                continue;
            }
        };
        let inc = Incoming {
            partition,
            epoch,
            packet,
            frame: msg.payload,
            acker,
        };
        tokio::select! {
            _ = stop.cancelled() => return,
            sent = tx.send(inc) => if sent.is_err() { return },
        }
    }
}
