//! The `record` role's source and the dashboard publisher.
//!
//! [`consume_windows`] takes every reconstructed window from the windows stream (one durable
//! consumer, `recorder`) and hands it to the dispatcher as an [`Arrival::Solved`], which
//! reorders, stitches, analyses and records it exactly as a window solved in the process. The
//! message is acknowledged once the dispatcher has taken it.
//!
//! [`publish_events`] copies every line of the gateway's event feed (`docs/events.md`: feature
//! events with indicators, labelled peaks and trust; gaps; advice) to
//! `<name>.events.<kind>.<node>.<channel>` (or `<name>.events.<kind>` for lines without a
//! stream), kept in the events stream for dashboards to read live or catch up.

use super::{message, Broker, BrokerError};
use crate::daemon::feed::EventFeed;
use crate::packet::Limits;
use crate::pipeline::run::Arrival;
use async_nats::jetstream::consumer::{pull, AckPolicy, DeliverPolicy};
use futures::StreamExt;
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::broadcast::error::RecvError;
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

/// Counters of the record role's broker side.
#[derive(Debug, Default)]
pub struct RecordStats {
    /// Window messages taken.
    pub windows: AtomicU64,
    /// Messages that did not decode (acknowledged and dropped).
    pub bad_messages: AtomicU64,
    /// Event lines published for dashboards.
    pub events: AtomicU64,
    /// Event lines the publisher skipped because it fell behind the feed.
    pub events_missed: AtomicU64,
}

/// Takes reconstructed windows until `stop`, sending each to `tx` (the dispatcher's input).
pub async fn consume_windows(
    broker: Broker,
    limits: Limits,
    tx: mpsc::Sender<Arrival>,
    stats: Arc<RecordStats>,
    stop: CancellationToken,
) -> Result<(), BrokerError> {
    let stream = broker.windows_stream().await?;
    let consumer = stream
        .get_or_create_consumer(
            &broker.names.recorder_consumer(),
            pull::Config {
                durable_name: Some(broker.names.recorder_consumer()),
                ack_policy: AckPolicy::Explicit,
                ack_wait: Duration::from_millis(broker.config.ack_wait_ms),
                deliver_policy: DeliverPolicy::All,
                max_ack_pending: 1024,
                ..Default::default()
            },
        )
        .await
        .map_err(|e| e.to_string())
        .map_err(BrokerError::js("create the recorder's consumer"))?;
    let messages = consumer
        .messages()
        .await
        .map_err(|e| e.to_string())
        .map_err(BrokerError::js("read the windows stream"))?;
    tokio::pin!(messages);
    loop {
        let next = tokio::select! {
            _ = stop.cancelled() => return Ok(()),
            m = messages.next() => m,
        };
        let msg = match next {
            Some(Ok(m)) => m,
            Some(Err(e)) => {
                tracing::debug!(error = %e, "windows consumer");
                continue;
            }
            None => return Ok(()),
        };
        let (msg, acker) = msg.split();
        match message::decode(&msg.payload, &limits) {
            Ok(w) => {
                stats.windows.fetch_add(1, Relaxed);
                tokio::select! {
                    _ = stop.cancelled() => return Ok(()),
                    sent = tx.send(Arrival::Solved(Box::new(w))) => if sent.is_err() { return Ok(()) },
                }
            }
            Err(e) => {
                stats.bad_messages.fetch_add(1, Relaxed);
                tracing::warn!(subject = %msg.subject, error = %e, "window message dropped");
            }
        }
        if let Err(e) = acker.ack().await {
            tracing::debug!(error = %e, "window acknowledgement failed; it comes again");
        }
    }
}

/// The subject of one feed line, from its `kind`, `node` and `channel` fields.
fn subject_of(broker: &Broker, line: &str) -> String {
    let v: serde_json::Value = serde_json::from_str(line).unwrap_or_default();
    let kind = v
        .get("kind")
        .and_then(|k| k.as_str())
        .filter(|k| k.chars().all(|c| c.is_ascii_alphanumeric() || c == '_'))
        .unwrap_or("other");
    let stream = match (
        v.get("node").and_then(|n| n.as_u64()),
        v.get("channel").and_then(|c| c.as_u64()),
    ) {
        (Some(n), Some(c)) => Some((n as u32, c as u16)),
        _ => None,
    };
    broker.names.event_subject(kind, stream)
}

/// Copies the feed's lines to the broker until the feed closes or `stop`.
pub async fn publish_events(
    broker: Broker,
    feed: EventFeed,
    stats: Arc<RecordStats>,
    stop: CancellationToken,
) -> Result<(), BrokerError> {
    broker.events_stream().await?;
    let mut rx = feed.subscribe();
    loop {
        let line = tokio::select! {
            r = rx.recv() => r,
            _ = stop.cancelled() => break,
        };
        match line {
            Ok(line) => {
                let subject = subject_of(&broker, &line);
                // Plain publish: the stream stores it; no dashboard slows the recorder.
                if broker
                    .client
                    .publish(subject, bytes::Bytes::copy_from_slice(line.as_bytes()))
                    .await
                    .is_ok()
                {
                    stats.events.fetch_add(1, Relaxed);
                }
            }
            Err(RecvError::Lagged(n)) => {
                stats.events_missed.fetch_add(n, Relaxed);
            }
            Err(RecvError::Closed) => break,
        }
    }
    // What is still buffered in the feed goes out too.
    while let Ok(line) = rx.try_recv() {
        let subject = subject_of(&broker, &line);
        let _ = broker
            .client
            .publish(subject, bytes::Bytes::copy_from_slice(line.as_bytes()))
            .await;
        stats.events.fetch_add(1, Relaxed);
    }
    let _ = broker.client.flush().await;
    Ok(())
}
