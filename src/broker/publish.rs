//! The frame publisher of the `ingest` role (and of `csgate publish`): every accepted window,
//! from the TCP ingest, the MQTT source or a packet log, goes to the frames stream on
//! `<name>.frames.<partition>.<node>.<channel>` as the exact frame the node sent (its tag
//! included), with the message id `<node>.<channel>.<capture>.<seq>` so that a frame sent twice
//! (a node resending after a reconnect, or a publish retried here) is stored once.
//!
//! Publishes are pipelined: up to [`IN_FLIGHT`] wait for the server's acknowledgement at once.
//! A publish that fails or times out is retried with the same message id (safe, by the
//! duplicate detection), a few times with doubling pauses, and then counted as failed.

use super::{partition_of, window_msg_id, Broker, BrokerError};
use crate::packet::{wire, Packet};
use async_nats::jetstream::message::PublishMessage as Publish;
use futures::stream::{FuturesUnordered, StreamExt};
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::mpsc;

/// Publishes waiting for their acknowledgement at once: enough to hide the round trip at
/// thousands of frames per second, few enough to bound what a crash of the ingest could lose.
pub const IN_FLIGHT: usize = 256;
/// Attempts per frame before it is counted as failed.
const ATTEMPTS: u32 = 5;

/// Counters of the publisher.
#[derive(Debug, Default)]
pub struct PublishStats {
    /// Frames stored by the broker.
    pub published: AtomicU64,
    /// Frames the broker already had (same message id within its duplicate window).
    pub duplicates: AtomicU64,
    /// Frames given up after every attempt failed.
    pub failed: AtomicU64,
    /// Publishes retried.
    pub retries: AtomicU64,
}

/// One frame ready to publish.
#[derive(Debug, Clone)]
pub struct OutgoingFrame {
    subject: String,
    msg_id: String,
    payload: bytes::Bytes,
}

impl OutgoingFrame {
    /// The frame of `packet` (re-encoded byte for byte, tag included) for a cluster with
    /// `partitions` partitions.
    pub fn new(broker: &Broker, packet: &Packet) -> Result<Self, wire::EncodeError> {
        let h = &packet.header;
        let p = partition_of(h.stream.node, h.stream.channel, broker.config.partitions);
        Ok(Self {
            subject: broker
                .names
                .frame_subject(p, h.stream.node, h.stream.channel),
            msg_id: window_msg_id(h.stream.node, h.stream.channel, h.capture_id, h.seq),
            payload: wire::encode_window_to_vec(packet, None)?.into(),
        })
    }
}

async fn publish_one(broker: &Broker, f: OutgoingFrame, stats: &PublishStats) {
    let mut pause = Duration::from_millis(100);
    for attempt in 1..=ATTEMPTS {
        let sent = broker
            .js
            .send_publish(
                f.subject.clone(),
                Publish::build()
                    .payload(f.payload.clone())
                    .message_id(f.msg_id.as_str()),
            )
            .await;
        let acked = match sent {
            Ok(ack) => ack.await.map_err(|e| e.to_string()),
            Err(e) => Err(e.to_string()),
        };
        match acked {
            Ok(ack) => {
                if ack.duplicate {
                    stats.duplicates.fetch_add(1, Relaxed);
                } else {
                    stats.published.fetch_add(1, Relaxed);
                }
                return;
            }
            Err(e) if attempt < ATTEMPTS => {
                stats.retries.fetch_add(1, Relaxed);
                tracing::warn!(subject = %f.subject, attempt, error = %e, "frame publish failed; retrying");
                tokio::time::sleep(pause).await;
                pause *= 2;
            }
            Err(e) => {
                stats.failed.fetch_add(1, Relaxed);
                tracing::error!(subject = %f.subject, error = %e, "frame not published; given up");
            }
        }
    }
}

/// Publishes every packet of `rx` until it closes, then waits for the last acknowledgements.
pub async fn publish_frames(
    broker: Broker,
    mut rx: mpsc::Receiver<Packet>,
    stats: Arc<PublishStats>,
) -> Result<(), BrokerError> {
    broker.frames_stream().await?;
    let mut pending = FuturesUnordered::new();
    while let Some(packet) = rx.recv().await {
        let frame = match OutgoingFrame::new(&broker, &packet) {
            Ok(f) => f,
            Err(e) => {
                // A validated packet always encodes; count it rather than stop the ingest.
                stats.failed.fetch_add(1, Relaxed);
                tracing::error!(stream = %packet.stream(), error = %e, "frame cannot be encoded");
                continue;
            }
        };
        let (b, s) = (broker.clone(), Arc::clone(&stats));
        pending.push(async move { publish_one(&b, frame, &s).await });
        while pending.len() >= IN_FLIGHT {
            pending.next().await;
        }
        // Collect finished acknowledgements without waiting.
        while let Some(Some(())) = futures::FutureExt::now_or_never(pending.next()) {}
    }
    while pending.next().await.is_some() {}
    Ok(())
}
