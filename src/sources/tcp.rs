//! TCP ingest: accepts node connections, delimits, authenticates and validates their frames
//! and hands the packets to the pipeline over a bounded channel, acknowledging each window.
//!
//! Structure follows the usual tokio server shape: a permit from a semaphore is taken before
//! `accept` (the connection cap; excess connections wait in the listen backlog), one task per
//! connection, and shutdown as a future. On shutdown the listener stops accepting, every
//! connection finishes the frame in hand and drops its sender, and [`run`] returns once all
//! connection tasks have ended, so the channel closes behind the last packet.
//!
//! A frame that cannot be delimited (bad magic, length or CRC) or fails authentication closes
//! its connection: framing can no longer be trusted, or the peer is not who it claims. A frame
//! that is delimited but invalid is counted and skipped, and the connection carries on.

use super::config::IngestConfig;
use crate::advice::AdviceBoard;
use crate::packet::codec::{CodecError, FrameCodec, RawFrame};
use crate::packet::wire::WireError;
use crate::packet::{wire, Ack, AuthError, Control, DecodeError, Frame, KeyRing, Packet, StreamId};
use bytes::BytesMut;
use futures::{SinkExt, StreamExt};
use serde::Serialize;
use std::future::Future;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};
use std::sync::Arc;
use std::time::Duration;
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{mpsc, Semaphore};
use tokio::task::JoinSet;
use tokio_util::codec::Framed;
use tokio_util::sync::CancellationToken;

/// Errors that stop the ingest.
#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    /// The enrolled keys are malformed.
    #[error("ingest configuration: {0}")]
    Config(#[from] AuthError),
    /// Binding failed.
    #[error("cannot listen on {addr}: {source}")]
    Bind {
        /// The address.
        addr: SocketAddr,
        /// The cause.
        source: std::io::Error,
    },
    /// `accept` kept failing after back-off.
    #[error("accept failed repeatedly: {0}")]
    Accept(std::io::Error),
    /// The recording log could not be opened or written.
    #[error("recording log: {0}")]
    Recording(#[from] crate::packet::log::LogError),
}

/// Counters of the ingest (atomics; read with [`IngestStats::snapshot`]).
#[derive(Debug, Default)]
pub struct IngestStats {
    /// Connections accepted.
    pub connections_accepted: AtomicU64,
    /// Connections the gateway closed because of a protocol fault (corrupt frame, failed
    /// authentication).
    pub connections_rejected: AtomicU64,
    /// Connections open now.
    pub connections_active: AtomicU64,
    /// Windows handed to the pipeline.
    pub frames_accepted: AtomicU64,
    /// Bytes of whole frames received.
    pub bytes: AtomicU64,
    /// Frames failing their CRC.
    pub crc_errors: AtomicU64,
    /// Frames that could not be delimited or parsed (other than CRC and cut frames),
    /// including unexpected frame kinds.
    pub decode_errors: AtomicU64,
    /// Connections that ended inside a frame (the node went away mid-frame); the partial
    /// frame is discarded.
    pub truncated_frames: AtomicU64,
    /// Windows that parsed but broke a validation rule.
    pub validation_errors: AtomicU64,
    /// Frames failing authentication.
    pub auth_failures: AtomicU64,
    /// Connections closed for idleness.
    pub idle_timeouts: AtomicU64,
    /// Sampling-advice control frames sent to nodes.
    pub advice_sent: AtomicU64,
}

/// A copy of the counters at one moment.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
#[allow(missing_docs)]
pub struct IngestSnapshot {
    pub connections_accepted: u64,
    pub connections_rejected: u64,
    pub connections_active: u64,
    pub frames_accepted: u64,
    pub bytes: u64,
    pub crc_errors: u64,
    pub decode_errors: u64,
    pub truncated_frames: u64,
    pub validation_errors: u64,
    pub auth_failures: u64,
    pub idle_timeouts: u64,
    pub advice_sent: u64,
}

impl IngestStats {
    /// Reads every counter.
    pub fn snapshot(&self) -> IngestSnapshot {
        IngestSnapshot {
            connections_accepted: self.connections_accepted.load(Relaxed),
            connections_rejected: self.connections_rejected.load(Relaxed),
            connections_active: self.connections_active.load(Relaxed),
            frames_accepted: self.frames_accepted.load(Relaxed),
            bytes: self.bytes.load(Relaxed),
            crc_errors: self.crc_errors.load(Relaxed),
            decode_errors: self.decode_errors.load(Relaxed),
            truncated_frames: self.truncated_frames.load(Relaxed),
            validation_errors: self.validation_errors.load(Relaxed),
            auth_failures: self.auth_failures.load(Relaxed),
            idle_timeouts: self.idle_timeouts.load(Relaxed),
            advice_sent: self.advice_sent.load(Relaxed),
        }
    }
}

fn inc(c: &AtomicU64) {
    c.fetch_add(1, Relaxed);
}

/// Binds the configured address.
pub async fn bind(config: &IngestConfig) -> Result<TcpListener, IngestError> {
    TcpListener::bind(config.listen)
        .await
        .map_err(|source| IngestError::Bind {
            addr: config.listen,
            source,
        })
}

struct Shared {
    config: IngestConfig,
    keys: KeyRing,
    stats: Arc<IngestStats>,
    /// Frames to record, with their receive time (microseconds since the epoch).
    recorder: Option<mpsc::Sender<(i64, bytes::Bytes)>>,
    /// Sampling advice to send to the nodes that asked for it.
    advice: Option<Arc<AdviceBoard>>,
}

/// The recording thread's input and its join handle.
type Recorder = (
    mpsc::Sender<(i64, bytes::Bytes)>,
    std::thread::JoinHandle<Result<(), crate::packet::log::LogError>>,
);

/// Starts the recording thread: frames come in through a bounded channel (a slow disk slows
/// the readers rather than growing memory) and are appended to the log in arrival order.
fn start_recorder(path: &std::path::Path) -> Result<Recorder, IngestError> {
    let now_us = chrono::Utc::now().timestamp_micros();
    let mut log =
        crate::packet::log::LogWriter::open_append(path, now_us, "recorded by the csgate ingest")?;
    let (tx, mut rx) = mpsc::channel::<(i64, bytes::Bytes)>(1024);
    let handle = std::thread::Builder::new()
        .name("csgate-record-log".into())
        .spawn(move || {
            while let Some((at, frame)) = rx.blocking_recv() {
                log.append(at, &frame)?;
            }
            log.sync()
        })
        .map_err(IngestError::Accept)?;
    Ok((tx, handle))
}

/// Runs the ingest on `listener` until `shutdown` completes, sending every accepted window to
/// `tx`. Returns after every connection task has finished (and dropped its sender).
pub async fn run(
    listener: TcpListener,
    config: IngestConfig,
    tx: mpsc::Sender<Packet>,
    stats: Arc<IngestStats>,
    shutdown: impl Future<Output = ()>,
) -> Result<(), IngestError> {
    run_advised(listener, config, tx, stats, None, shutdown).await
}

/// [`run`], also sending the sampling advice of `advice` to the nodes it names: after a window
/// of such a node is accepted (and acknowledged), each stream seen on the connection whose
/// advice differs from what the connection last sent gets a control frame (wire format 5.2,
/// message type 1), signed with the node's key when it is enrolled.
pub async fn run_advised(
    listener: TcpListener,
    config: IngestConfig,
    tx: mpsc::Sender<Packet>,
    stats: Arc<IngestStats>,
    advice: Option<Arc<AdviceBoard>>,
    shutdown: impl Future<Output = ()>,
) -> Result<(), IngestError> {
    let keys = config.key_ring()?;
    let (recorder, recorder_handle) = match &config.record_log {
        Some(path) => {
            let (tx, h) = start_recorder(path)?;
            (Some(tx), Some(h))
        }
        None => (None, None),
    };
    let limit = Arc::new(Semaphore::new(config.max_connections.max(1)));
    let shared = Arc::new(Shared {
        config,
        keys,
        stats,
        recorder,
        advice,
    });
    let cancel = CancellationToken::new();
    let mut tasks = JoinSet::new();
    tokio::pin!(shutdown);
    let result = loop {
        let permit = tokio::select! {
            _ = &mut shutdown => break Ok(()),
            p = limit.clone().acquire_owned() => p.expect("the semaphore is never closed"),
        };
        let (socket, peer) = tokio::select! {
            _ = &mut shutdown => break Ok(()),
            r = accept(&listener) => match r {
                Ok(s) => s,
                Err(e) => break Err(IngestError::Accept(e)),
            },
        };
        inc(&shared.stats.connections_accepted);
        inc(&shared.stats.connections_active);
        let (shared, tx, cancel) = (shared.clone(), tx.clone(), cancel.child_token());
        tasks.spawn(async move {
            tracing::debug!(%peer, "node connected");
            connection(socket, peer, &shared, tx, cancel).await;
            shared.stats.connections_active.fetch_sub(1, Relaxed);
            drop(permit);
        });
        while tasks.try_join_next().is_some() {}
    };
    cancel.cancel();
    drop(tx);
    while tasks.join_next().await.is_some() {}
    drop(shared);
    if let Some(h) = recorder_handle {
        // Every connection task has ended, so every recorder sender is gone and the thread
        // drains the channel, syncs and returns.
        let done = tokio::task::spawn_blocking(move || h.join()).await;
        if let Ok(Ok(Err(e))) = done {
            tracing::error!(error = %e, "recording log failed");
            return result.and(Err(IngestError::Recording(e)));
        }
    }
    result
}

/// `accept` with doubling back-off on errors (e.g. out of file descriptors), giving up after
/// the wait would exceed a minute.
async fn accept(listener: &TcpListener) -> std::io::Result<(TcpStream, SocketAddr)> {
    let mut backoff = Duration::from_millis(100);
    loop {
        match listener.accept().await {
            Ok(s) => return Ok(s),
            Err(e) if backoff > Duration::from_secs(60) => return Err(e),
            Err(e) => {
                tracing::warn!(error = %e, "accept failed, backing off");
                tokio::time::sleep(backoff).await;
                backoff *= 2;
            }
        }
    }
}

async fn connection(
    socket: TcpStream,
    peer: SocketAddr,
    shared: &Shared,
    tx: mpsc::Sender<Packet>,
    cancel: CancellationToken,
) {
    let stats = &shared.stats;
    let idle = shared.config.idle_timeout();
    let limits = &shared.config.limits;
    let mut framed = Framed::new(socket, FrameCodec::new(limits.max_frame_len));
    // Advice state of this connection: the board's version last looked at, the streams seen
    // and the advice last sent for each.
    let mut advice_seen = 0u64;
    let mut advised: Vec<(StreamId, Option<u32>)> = Vec::new();
    loop {
        let next = tokio::select! {
            _ = cancel.cancelled() => break,
            r = tokio::time::timeout(idle, framed.next()) => r,
        };
        let raw = match next {
            Err(_) => {
                inc(&stats.idle_timeouts);
                tracing::info!(%peer, "idle timeout, closing");
                break;
            }
            Ok(None) => break,
            Ok(Some(Err(CodecError::Io(e)))) => {
                tracing::info!(%peer, error = %e, "connection error");
                break;
            }
            Ok(Some(Err(CodecError::Wire(WireError::Truncated { needed, have })))) => {
                // The node closed (or its link dropped) in the middle of a frame: not a
                // protocol fault of ours to punish, but the partial frame is gone.
                inc(&stats.truncated_frames);
                tracing::warn!(%peer, have, needed, "connection ended inside a frame; the partial frame is discarded");
                break;
            }
            Ok(Some(Err(e))) => {
                if e.is_crc() {
                    inc(&stats.crc_errors);
                } else {
                    inc(&stats.decode_errors);
                }
                inc(&stats.connections_rejected);
                tracing::warn!(%peer, error = %e, "corrupt frame, closing connection");
                break;
            }
            Ok(Some(Ok(raw))) => raw,
        };
        stats.bytes.fetch_add(raw.len() as u64, Relaxed);
        if let Err(e) = shared.keys.check(raw.as_bytes()) {
            inc(&stats.auth_failures);
            inc(&stats.connections_rejected);
            tracing::warn!(%peer, error = %e, "authentication failed, closing connection");
            break;
        }
        let packet = match raw.parse(limits) {
            Ok(Frame::Window(p)) => p,
            Ok(_) => {
                inc(&stats.decode_errors);
                tracing::warn!(%peer, kind = raw.kind(), "unexpected frame kind from a node, skipped");
                continue;
            }
            Err(DecodeError::Wire(e)) => {
                inc(&stats.decode_errors);
                tracing::warn!(%peer, node = ?raw.node(), error = %e, "malformed frame skipped");
                continue;
            }
            Err(DecodeError::Invalid(e)) => {
                inc(&stats.validation_errors);
                tracing::warn!(%peer, error = %e, "invalid window skipped");
                continue;
            }
        };
        let ack = Ack {
            stream: packet.stream(),
            capture_id: packet.header.capture_id,
            seq: packet.header.seq,
            auth_tag: None,
        };
        // Back-pressure: while the pipeline is full this await holds the reader, the socket
        // buffer fills, and TCP flow control slows the node.
        if let Some(rec) = &shared.recorder {
            let at = chrono::Utc::now().timestamp_micros();
            if rec.send((at, raw.clone().into_bytes())).await.is_err() {
                tracing::error!("recording log stopped; frames are no longer recorded");
            }
        }
        if tx.send(packet).await.is_err() {
            tracing::debug!("pipeline closed, dropping connection");
            break;
        }
        inc(&stats.frames_accepted);
        if shared.config.send_acks {
            let mut buf = BytesMut::with_capacity(wire::ACK_LEN + crate::packet::TAG_LEN);
            wire::encode_ack(&ack, shared.keys.get(ack.stream.node), &mut buf);
            let frame = RawFrame::from_trusted(buf.freeze());
            match tokio::time::timeout(idle, framed.send(frame)).await {
                Ok(Ok(())) => {}
                Ok(Err(e)) => {
                    tracing::info!(%peer, error = %e, "cannot send ack, closing");
                    break;
                }
                Err(_) => {
                    inc(&stats.idle_timeouts);
                    tracing::info!(%peer, "node does not read acks, closing");
                    break;
                }
            }
        }
        if let Some(board) = shared
            .advice
            .as_deref()
            .filter(|b| b.advises(ack.stream.node))
        {
            if !advised.iter().any(|(s, _)| *s == ack.stream) {
                advised.push((ack.stream, None));
                advice_seen = advice_seen.wrapping_sub(1); // look again for the new stream
            }
            let version = board.version();
            if version != advice_seen {
                advice_seen = version;
                if let Err(e) = send_advice(&mut framed, board, &mut advised, shared, idle).await {
                    tracing::info!(%peer, error = %e, "cannot send sampling advice, closing");
                    break;
                }
            }
        }
    }
}

/// Sends a control frame for every stream of `advised` whose advice on `board` changed.
async fn send_advice(
    framed: &mut Framed<TcpStream, FrameCodec>,
    board: &AdviceBoard,
    advised: &mut [(StreamId, Option<u32>)],
    shared: &Shared,
    idle: Duration,
) -> Result<(), CodecError> {
    for (stream, sent) in advised.iter_mut() {
        let Some(m) = board.get(*stream) else {
            continue;
        };
        if *sent == Some(m) {
            continue;
        }
        let mut buf = BytesMut::with_capacity(64);
        wire::encode_control(
            &Control::sampling_advice(*stream, m),
            shared.keys.get(stream.node),
            &mut buf,
        )
        .expect("an advice message is far below every size limit");
        match tokio::time::timeout(idle, framed.send(RawFrame::from_trusted(buf.freeze()))).await {
            Ok(r) => r?,
            Err(_) => {
                return Err(CodecError::Io(std::io::Error::new(
                    std::io::ErrorKind::TimedOut,
                    "node does not read",
                )))
            }
        }
        inc(&shared.stats.advice_sent);
        tracing::debug!(%stream, m, "sampling advice sent");
        *sent = Some(m);
    }
    Ok(())
}
