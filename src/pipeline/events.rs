//! Feature events: one [`FeatureEvent`] per analysed block per stream, pushed by the analytics
//! stage ([`super::analytics`]) into every [`EventSink`] it was given.
//!
//! # The sink contract
//! - [`EventSink::send`] is called once per event, in block order per stream, from the
//!   analytics thread. It may block (a bounded queue that is full): that slows the analytics
//!   stage, whose bounded input then slows the dispatcher; nothing is dropped silently.
//!   A sink that must never slow the pipeline (a live feed) drops instead and counts it, as
//!   [`EventBroadcast`] does.
//! - An `Err` from `send` disables that sink for the rest of the run; the first error is
//!   reported when the pipeline ends (a replay then fails with it).
//! - [`EventSink::finish`] is called once, after the last event: flush and close.
//!
//! Two sinks come with the crate: [`JsonLinesFile`] (a writer thread appending one JSON object
//! per line to a new file; the format is in `docs/events.md`) and [`EventBroadcast`] (a
//! tokio broadcast channel for the daemon's feeds: each subscriber gets every event while it
//! keeps up, and a lag count when it does not).

use crate::features::FeatureEvent;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{sync_channel, SyncSender};
use std::sync::Arc;
use std::thread::JoinHandle;

/// Errors of an event sink.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum EventError {
    /// The events file could not be created or written.
    #[error("events file {path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The OS error.
        #[source]
        source: std::io::Error,
    },
    /// The events file exists; it is never overwritten.
    #[error("events file {0} already exists; it is never overwritten (choose another name)")]
    Exists(PathBuf),
    /// The sink's thread stopped.
    #[error("the events writer stopped")]
    Stopped,
}

/// Where feature events go (see the module docs for the contract).
pub trait EventSink: Send {
    /// Takes one event.
    fn send(&mut self, event: &Arc<FeatureEvent>) -> Result<(), EventError>;
    /// Called once after the last event.
    fn finish(&mut self) -> Result<(), EventError>;
}

/// Appends events as JSON lines to a new file, on a writer thread of its own behind a bounded
/// queue (file I/O stays off the analytics thread).
#[derive(Debug)]
pub struct JsonLinesFile {
    path: PathBuf,
    tx: Option<SyncSender<Arc<FeatureEvent>>>,
    handle: Option<JoinHandle<Result<u64, std::io::Error>>>,
}

impl JsonLinesFile {
    /// Queue length of the writer thread: a few hundred events (a few seconds of a large site)
    /// absorb a slow disk without growing memory.
    pub const QUEUE: usize = 256;

    /// Creates `path` (which must not exist) and starts the writer thread.
    pub fn create(path: &Path) -> Result<Self, EventError> {
        let file = std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(path)
            .map_err(|source| {
                if source.kind() == std::io::ErrorKind::AlreadyExists {
                    EventError::Exists(path.to_path_buf())
                } else {
                    EventError::Io {
                        path: path.to_path_buf(),
                        source,
                    }
                }
            })?;
        let (tx, rx) = sync_channel::<Arc<FeatureEvent>>(Self::QUEUE);
        let handle = std::thread::Builder::new()
            .name("csgate-events".into())
            .spawn(move || -> Result<u64, std::io::Error> {
                let mut out = std::io::BufWriter::new(file);
                let mut lines = 0;
                for ev in rx {
                    serde_json::to_writer(&mut out, &*ev)?;
                    out.write_all(b"\n")?;
                    lines += 1;
                }
                out.flush()?;
                out.into_inner().map_err(|e| e.into_error())?.sync_all()?;
                Ok(lines)
            })
            .map_err(|source| EventError::Io {
                path: path.to_path_buf(),
                source,
            })?;
        Ok(Self {
            path: path.to_path_buf(),
            tx: Some(tx),
            handle: Some(handle),
        })
    }

    fn join(&mut self) -> Result<u64, EventError> {
        self.tx.take();
        match self.handle.take() {
            Some(h) => match h.join() {
                Ok(Ok(lines)) => Ok(lines),
                Ok(Err(source)) => Err(EventError::Io {
                    path: self.path.clone(),
                    source,
                }),
                Err(_) => Err(EventError::Stopped),
            },
            None => Ok(0),
        }
    }
}

impl EventSink for JsonLinesFile {
    fn send(&mut self, event: &Arc<FeatureEvent>) -> Result<(), EventError> {
        let sent = self
            .tx
            .as_ref()
            .map(|tx| tx.send(Arc::clone(event)).is_ok());
        if sent == Some(true) {
            return Ok(());
        }
        // The thread ended: report its error.
        self.join()?;
        Err(EventError::Stopped)
    }

    fn finish(&mut self) -> Result<(), EventError> {
        self.join().map(|_| ())
    }
}

impl Drop for JsonLinesFile {
    fn drop(&mut self) {
        let _ = self.join();
    }
}

/// A live feed: a tokio broadcast channel the daemon's subscribers read. `send` never blocks;
/// a subscriber that falls more than the capacity behind loses the oldest events (tokio's
/// `RecvError::Lagged` tells it how many). Events sent while nobody listens are counted as
/// unheard and dropped.
#[derive(Debug, Clone)]
pub struct EventBroadcast {
    tx: tokio::sync::broadcast::Sender<Arc<FeatureEvent>>,
    unheard: Arc<AtomicU64>,
}

impl EventBroadcast {
    /// A feed keeping up to `capacity` events for slow subscribers.
    pub fn new(capacity: usize) -> Self {
        let (tx, _) = tokio::sync::broadcast::channel(capacity.max(1));
        Self {
            tx,
            unheard: Arc::new(AtomicU64::new(0)),
        }
    }

    /// A new subscriber, receiving every event sent from now on.
    pub fn subscribe(&self) -> tokio::sync::broadcast::Receiver<Arc<FeatureEvent>> {
        self.tx.subscribe()
    }

    /// Events sent while no subscriber was listening.
    pub fn unheard(&self) -> u64 {
        self.unheard.load(Ordering::Relaxed)
    }
}

impl EventSink for EventBroadcast {
    fn send(&mut self, event: &Arc<FeatureEvent>) -> Result<(), EventError> {
        if self.tx.send(Arc::clone(event)).is_err() {
            self.unheard.fetch_add(1, Ordering::Relaxed);
        }
        Ok(())
    }

    fn finish(&mut self) -> Result<(), EventError> {
        Ok(())
    }
}
