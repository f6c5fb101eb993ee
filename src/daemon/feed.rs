//! The event feed hook: a bounded broadcast of JSON-lines events that any stage may publish
//! into and every HTTP `/events` reader (or a file writer) subscribes to.
//!
//! Events are serialised once, at publish time, into one line of JSON (no newline inside), so
//! a hundred readers cost one serialisation. The channel is bounded: a reader that falls more
//! than the capacity behind skips ahead and is told how many lines it missed (a `feed_lag`
//! line); the publisher never waits, so a slow dashboard can never slow the pipeline.

use serde::Serialize;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use tokio::sync::broadcast;

/// One serialised event: a JSON object without the trailing newline.
pub type EventLine = Arc<str>;

/// Publisher side of the feed; cheap to clone.
#[derive(Debug, Clone)]
pub struct EventFeed {
    tx: broadcast::Sender<EventLine>,
    published: Arc<AtomicU64>,
}

impl EventFeed {
    /// A feed keeping up to `capacity` lines per reader.
    pub fn new(capacity: usize) -> Self {
        let (tx, _) = broadcast::channel(capacity.max(1));
        Self {
            tx,
            published: Arc::new(AtomicU64::new(0)),
        }
    }

    /// Publishes an event (any serialisable value; an object with a `kind` field by
    /// convention). Without readers it is dropped after counting. Never blocks.
    pub fn publish<T: Serialize>(&self, event: &T) {
        self.published.fetch_add(1, Ordering::Relaxed);
        if self.tx.receiver_count() == 0 {
            return;
        }
        match serde_json::to_string(event) {
            Ok(line) => {
                let _ = self.tx.send(line.into());
            }
            Err(e) => tracing::warn!(error = %e, "event not serialisable; dropped"),
        }
    }

    /// A new reader, starting with the next event published.
    pub fn subscribe(&self) -> broadcast::Receiver<EventLine> {
        self.tx.subscribe()
    }

    /// Events published since start (with or without readers).
    pub fn published(&self) -> u64 {
        self.published.load(Ordering::Relaxed)
    }

    /// Readers connected now.
    pub fn readers(&self) -> usize {
        self.tx.receiver_count()
    }
}

/// A gateway event of the daemon itself (stages add their own types).
#[derive(Debug, Clone, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum GatewayEvent {
    /// First line of every feed connection.
    FeedOpen {
        /// Site name from the configuration.
        site: String,
        /// csgate version.
        version: String,
    },
    /// A reader fell behind and skipped this many lines.
    FeedLag {
        /// Lines skipped.
        missed: u64,
    },
    /// Samples of a stream the record marks as missing.
    Gap {
        /// Node id.
        node: u32,
        /// Channel.
        channel: u16,
        /// First missing grid position.
        start: u64,
        /// Missing samples.
        len: u64,
        /// Why (the record's gap reason).
        reason: String,
    },
    /// The sampling advice of a stream changed (sent to the node on its next window).
    Advice {
        /// Node id.
        node: u32,
        /// Channel.
        channel: u16,
        /// Sequence number of the window that caused it.
        seq: u64,
        /// Samples per window advised.
        m: u32,
        /// The advice before.
        previous: u32,
        /// Samples that window asked for.
        need: u32,
        /// Why: `sparsity`, `low_trust` or `release`.
        reason: crate::advice::AdviceReason,
    },
    /// The gateway began its shutdown drain.
    ShuttingDown,
}
