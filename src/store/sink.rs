//! [`RecordSink`]: the dedicated writer thread. It owns every open record file, takes
//! [`RecordMsg`]s from a bounded channel, flushes on an interval and on shutdown, and rotates
//! to the next file of the series when a stream appears after the file is in SWMR mode (HDF5
//! cannot add objects then) or when the file's age or size limit is reached.
//!
//! Files are named `<prefix>-<UTC creation time>-<seq>.h5` (e.g.
//! `rec-20261201T120000Z-0001.h5`) in the record folder; `index.json` beside them lists each
//! file, its streams and their sample ranges, and is replaced atomically (write, then rename)
//! at every file open, flush and close.
//!
//! # Write errors
//! Without [`SinkConfig::retry_after`] (offline replay) the first write error ends the thread
//! and comes back through its join handle. With it (the gateway), a write error (disk full,
//! folder made read-only, ...) starts an *outage*: the open file is abandoned as it stands
//! (readable up to its last flush, like the file of a killed writer: no `closed` row, `closed`
//! stays `null` in the index), the error is logged, and from then on every message is counted
//! in [`SinkLive`] and discarded, so the stages before the sink keep running with bounded
//! memory. Every `retry_after` the next data message tries to open a new file of the series;
//! once that works, writing resumes there and the stretch that could not be written shows in
//! the new file as a gap (NaN with a gap row of reason 0, or a new segment when longer than
//! `max_nan_fill`). Capture restarts seen during the outage are followed, so the new file
//! starts on the right grid.

use super::layout::{close_reason, IndicatorRow, PeakRow, WindowRow};
use super::time::{file_stamp, grid_time, iso8601_utc, now_unix_ns, INDEX_FILE};
use super::writer::{RecordWriter, StreamCursor, StreamKey, StreamMeta, WriterOptions};
use super::{GapReason, StoreError};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering::Relaxed};
use std::sync::mpsc::{self, RecvTimeoutError, SyncSender};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

/// Live figures of the writer thread about write errors (atomics, for metrics and health).
#[derive(Debug, Default)]
pub struct SinkLive {
    /// Outages begun: write errors that made the sink abandon its file.
    pub write_errors: AtomicU64,
    /// True while the record cannot be written (an outage is going on).
    pub failing: AtomicBool,
    /// Record messages discarded because they could not be written.
    pub dropped_msgs: AtomicU64,
    /// Samples (NaN fill of gap messages included) that could not be written.
    pub dropped_samples: AtomicU64,
    /// Window, peak and indicator rows that could not be written.
    pub dropped_rows: AtomicU64,
}

/// Fault injection for tests: while switched on, every write of the sink (data messages,
/// flushes, opening a file) fails as on a full disk (`ENOSPC`) before it reaches the disk.
/// Tests use it where a real full or read-only file system cannot be arranged (running as root
/// makes permissions moot, and a small file system needs privileges to mount). Off by default;
/// nothing in the gateway switches it on.
#[derive(Debug, Clone, Default)]
pub struct WriteFault(Arc<AtomicBool>);

impl WriteFault {
    /// A switch, off.
    pub fn new() -> Self {
        Self::default()
    }

    /// Switches the fault on (every write fails) or off.
    pub fn set(&self, on: bool) {
        self.0.store(on, Relaxed);
    }

    /// Whether the fault is on.
    pub fn is_on(&self) -> bool {
        self.0.load(Relaxed)
    }

    fn check(&self, path: &Path) -> Result<(), StoreError> {
        if self.is_on() {
            return Err(StoreError::Io {
                path: path.to_path_buf(),
                source: std::io::Error::new(
                    std::io::Error::from_raw_os_error(28).kind(), // ENOSPC; `ErrorKind::StorageFull` needs Rust 1.83 (MSRV 1.80)
                    "no space left on device (injected fault)",
                ),
            });
        }
        Ok(())
    }
}

/// Configuration of the writer thread.
#[derive(Debug, Clone)]
pub struct SinkConfig {
    /// Record folder (created if missing).
    pub folder: PathBuf,
    /// File name prefix. Default "rec".
    pub prefix: String,
    /// Storage options of each file.
    pub writer: WriterOptions,
    /// Hex digest of the configuration, written into every file.
    pub config_digest: String,
    /// Capacity of the message channel. Default 1024: a few seconds of blocks and rows at
    /// typical rates, so a slow disk pushes back on the pipeline instead of growing memory.
    pub channel_capacity: usize,
    /// Flush interval. Default 1 s: a reader (or a crash) loses at most about this much.
    pub flush_interval: Duration,
    /// Start a new file once the current one is this old. Default 1 hour.
    pub rotate_after: Option<Duration>,
    /// Start a new file once the current one reaches this many bytes. Default 2 GiB.
    pub rotate_bytes: Option<u64>,
    /// Single-file mode (offline replay): write exactly this file in `folder`, never rotate,
    /// and keep no `index.json`. Every stream must be declared before the first data message;
    /// a stream declared later is an error. Default `None` (a rotating series).
    pub single_file: Option<String>,
    /// Bytes of the files written so far (closed files plus the open one at its last flush),
    /// updated at every flush and close, for live metrics. Default: a fresh counter.
    pub live_bytes: std::sync::Arc<std::sync::atomic::AtomicU64>,
    /// After a write error: `None` ends the thread with the error (offline replay: a partial
    /// record must not look complete); `Some(d)` abandons the file, discards and counts what
    /// arrives, and tries a new file every `d` (the gateway; see the module docs). Default
    /// `None`.
    pub retry_after: Option<Duration>,
    /// Write-error counters, for live metrics. Default: fresh counters.
    pub live: Arc<SinkLive>,
    /// Fault injection for tests ([`WriteFault`]). Default: off.
    pub write_fault: WriteFault,
    /// How long a stream that appears while a file is open waits for others before the sink
    /// starts the next file for it (HDF5 cannot add a stream to a file in SWMR mode). Its
    /// messages are held in memory meanwhile, at most [`MAX_HELD_MSGS`]. Zero (the default)
    /// starts the next file at once. The gateway waits: a hundred nodes connecting within a
    /// second otherwise cost a hundred files, each with every stream known so far, and
    /// creating them kept the writer busy for tens of seconds (found by `csgate loadtest`).
    pub new_stream_wait: Duration,
}

/// Most messages held for streams waiting for the next file; one more starts it at once.
pub const MAX_HELD_MSGS: usize = 4096;

impl SinkConfig {
    /// Defaults for a record folder.
    pub fn new(folder: impl Into<PathBuf>) -> Self {
        Self {
            folder: folder.into(),
            prefix: "rec".into(),
            writer: WriterOptions::default(),
            config_digest: String::new(),
            channel_capacity: 1024,
            flush_interval: Duration::from_secs(1),
            rotate_after: Some(Duration::from_secs(3600)),
            rotate_bytes: Some(2 << 30),
            single_file: None,
            live_bytes: Default::default(),
            retry_after: None,
            live: Default::default(),
            write_fault: WriteFault::default(),
            new_stream_wait: Duration::ZERO,
        }
    }
}

/// A message to the writer thread. Positions are on the stream's segment grid (see
/// [`RecordWriter`]).
#[derive(Debug, Clone)]
pub enum RecordMsg {
    /// Declares a stream. Must precede its data; a stream declared after the current file
    /// went into SWMR mode makes the sink rotate to a new file holding every known stream.
    OpenStream(StreamMeta),
    /// Finished samples from grid position `start`.
    Samples {
        /// The stream.
        stream: StreamKey,
        /// Grid position of `samples[0]`.
        start: u64,
        /// The samples.
        samples: Vec<f32>,
    },
    /// A reconstructed window's report.
    Window {
        /// The stream.
        stream: StreamKey,
        /// The row (`start_sample` is a grid position).
        row: WindowRow,
        /// Effective support of the solution when the trust figures were computed. Not
        /// recorded; the gateway's sampling advice reads it on the way ([`crate::advice`]).
        effective_support: Option<u32>,
    },
    /// Samples no window covers.
    Gap {
        /// The stream.
        stream: StreamKey,
        /// Grid position of the first missing sample.
        start: u64,
        /// Number of missing samples.
        len: u64,
        /// Why.
        reason: GapReason,
    },
    /// A capture restart: the stream's grid starts again at position 0.
    Segment {
        /// The stream.
        stream: StreamKey,
        /// The new capture.
        capture_id: u32,
        /// Time of grid position 0 of the new capture.
        t0_unix_ns: i64,
    },
    /// A spectral peak.
    Peak {
        /// The stream.
        stream: StreamKey,
        /// The row.
        row: PeakRow,
    },
    /// Condition indicators of a block.
    Indicator {
        /// The stream.
        stream: StreamKey,
        /// The row (`start_sample` is a grid position).
        row: IndicatorRow,
    },
    /// Flush now.
    Flush,
    /// Flush, close every file and end the thread.
    Shutdown,
}

/// What the writer thread did.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct SinkStats {
    /// Samples written, including NaN fill.
    pub samples_written: u64,
    /// Bytes in the files written (their sizes at close).
    pub bytes_written: u64,
    /// Files created.
    pub files: u64,
    /// Messages dropped because they named a stream that was never opened.
    pub unknown_stream_msgs: u64,
    /// Write errors (without `retry_after` the first one ends the thread; with it, each one
    /// began an outage).
    pub errors: u64,
    /// Record messages discarded during outages.
    pub dropped_msgs: u64,
    /// Samples (NaN fill included) discarded during outages.
    pub dropped_samples: u64,
    /// Window, peak and indicator rows discarded during outages.
    pub dropped_rows: u64,
}

/// One stream in one file of the index.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StreamEntry {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
    /// Group path in the file.
    pub path: String,
    /// Samples in the file.
    pub samples: u64,
    /// Time of the file's first sample of this stream, Unix nanoseconds.
    pub start_time_unix_ns: i64,
    /// Time of the grid instant after the last sample, Unix nanoseconds (equals the next
    /// file's `start_time_unix_ns` when the capture continues there).
    pub end_time_unix_ns: i64,
}

/// One file of the index.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FileEntry {
    /// File name within the record folder.
    pub file: String,
    /// Sequence number in the series.
    pub seq: u32,
    /// Creation time, ISO-8601 UTC.
    pub created: String,
    /// Close time, ISO-8601 UTC; `None` while open or if the writer died.
    pub closed: Option<String>,
    /// "shutdown" or "rotated" once closed.
    pub close_reason: Option<String>,
    /// The file's streams.
    pub streams: Vec<StreamEntry>,
}

/// The record folder's `index.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RecordIndex {
    /// Layout version of the files.
    pub layout_version: u32,
    /// Files in series order.
    pub files: Vec<FileEntry>,
}

impl RecordIndex {
    /// Reads `index.json` from a record folder.
    pub fn load(folder: &Path) -> Result<Self, StoreError> {
        let path = folder.join(INDEX_FILE);
        let text = std::fs::read_to_string(&path).map_err(|source| StoreError::Io {
            path: path.clone(),
            source,
        })?;
        serde_json::from_str(&text).map_err(|e| StoreError::Index {
            path,
            what: e.to_string(),
        })
    }

    fn save(&self, folder: &Path) -> Result<(), StoreError> {
        let path = folder.join(INDEX_FILE);
        let tmp = folder.join(format!("{INDEX_FILE}.tmp"));
        let text = serde_json::to_string_pretty(self).map_err(|e| StoreError::Index {
            path: path.clone(),
            what: e.to_string(),
        })?;
        let io = |source| StoreError::Io {
            path: tmp.clone(),
            source,
        };
        std::fs::write(&tmp, text).map_err(io)?;
        std::fs::rename(&tmp, &path).map_err(|source| StoreError::Io {
            path: path.clone(),
            source,
        })
    }
}

/// Handle of the writer thread: a bounded sender. Dropping every sender also shuts the
/// thread down cleanly (flush and close).
#[derive(Debug, Clone)]
pub struct RecordSink {
    tx: SyncSender<RecordMsg>,
}

impl RecordSink {
    /// Starts the writer thread. Setup errors (folder, index) come back through the handle.
    ///
    /// # Panics
    /// If the OS refuses to start a thread.
    pub fn spawn(config: SinkConfig) -> (Self, JoinHandle<Result<SinkStats, StoreError>>) {
        let (tx, rx) = mpsc::sync_channel(config.channel_capacity.max(1));
        let handle = std::thread::Builder::new()
            .name("csgate-hdf5".into())
            .spawn(move || {
                let mut sink = SinkState::new(config)?;
                let result = sink.run(&rx);
                drop(rx);
                sink.finish(result)
            })
            .expect("spawn the record writer thread");
        (Self { tx }, handle)
    }

    /// The sender, for stages that want their own clone.
    pub fn sender(&self) -> SyncSender<RecordMsg> {
        self.tx.clone()
    }

    /// Sends a message, blocking while the channel is full.
    pub fn send(&self, msg: RecordMsg) -> Result<(), StoreError> {
        self.tx.send(msg).map_err(|_| StoreError::SinkStopped)
    }
}

struct OpenFile {
    writer: RecordWriter,
    opened: Instant,
    entry: usize,
}

/// A stretch of time in which the record could not be written.
struct Outage {
    since: Instant,
    next_try: Instant,
    msgs: u64,
    samples: u64,
    rows: u64,
}

struct SinkState {
    config: SinkConfig,
    streams: BTreeMap<StreamKey, StreamMeta>,
    cursors: BTreeMap<StreamKey, StreamCursor>,
    current: Option<OpenFile>,
    index: RecordIndex,
    next_seq: u32,
    stats: SinkStats,
    outage: Option<Outage>,
    /// Streams whose messages wait for the next file, since when, and their messages in order.
    waiting: std::collections::BTreeSet<StreamKey>,
    waiting_since: Option<Instant>,
    held: Vec<RecordMsg>,
}

impl SinkState {
    fn new(config: SinkConfig) -> Result<Self, StoreError> {
        std::fs::create_dir_all(&config.folder).map_err(|source| StoreError::Io {
            path: config.folder.clone(),
            source,
        })?;
        let index = if config.folder.join(INDEX_FILE).exists() {
            RecordIndex::load(&config.folder)?
        } else {
            RecordIndex {
                layout_version: super::layout::LAYOUT_VERSION,
                files: Vec::new(),
            }
        };
        // A restart continues the series; files already in the folder are never reused.
        let mut next_seq = index.files.iter().map(|f| f.seq).max().unwrap_or(0) + 1;
        if let Ok(dir) = std::fs::read_dir(&config.folder) {
            for entry in dir.flatten() {
                if let Some(seq) = seq_of_name(&entry.file_name().to_string_lossy(), &config.prefix)
                {
                    next_seq = next_seq.max(seq + 1);
                }
            }
        }
        Ok(Self {
            config,
            streams: BTreeMap::new(),
            cursors: BTreeMap::new(),
            current: None,
            index,
            next_seq,
            stats: SinkStats::default(),
            outage: None,
            waiting: Default::default(),
            waiting_since: None,
            held: Vec::new(),
        })
    }

    fn run(&mut self, rx: &mpsc::Receiver<RecordMsg>) -> Result<(), StoreError> {
        let mut last_flush = Instant::now();
        loop {
            let mut wait = self
                .config
                .flush_interval
                .saturating_sub(last_flush.elapsed());
            if let Some(since) = self.waiting_since {
                wait = wait.min(self.config.new_stream_wait.saturating_sub(since.elapsed()));
            }
            match rx.recv_timeout(wait) {
                Ok(RecordMsg::Shutdown) | Err(RecvTimeoutError::Disconnected) => return Ok(()),
                Ok(RecordMsg::Flush) => {
                    let r = self.flush();
                    self.on_error(r)?;
                    last_flush = Instant::now();
                }
                Ok(msg) => self.accept(msg)?,
                Err(RecvTimeoutError::Timeout) => {}
            }
            if self
                .waiting_since
                .is_some_and(|t| t.elapsed() >= self.config.new_stream_wait)
            {
                let r = self.start_next_file();
                self.on_error(r)?;
            }
            if last_flush.elapsed() >= self.config.flush_interval {
                let r = self.flush();
                self.on_error(r)?;
                last_flush = Instant::now();
            }
        }
    }

    /// Handles one message, or counts and discards it during an outage.
    fn accept(&mut self, msg: RecordMsg) -> Result<(), StoreError> {
        if self.outage.is_some() && !self.try_resume(&msg) {
            self.discard(msg);
            return Ok(());
        }
        let dropped = Dropped::of(&msg);
        let r = self.handle(msg);
        if r.is_err() {
            // The message that met the error is not written either.
            self.count_dropped(dropped);
        }
        self.on_error(r)
    }

    /// Passes `Ok` on; turns an error into an outage when retrying is configured.
    fn on_error(&mut self, r: Result<(), StoreError>) -> Result<(), StoreError> {
        let Err(err) = r else {
            return Ok(());
        };
        let Some(retry) = self.config.retry_after else {
            return Err(err);
        };
        self.stats.errors += 1;
        self.config.live.write_errors.fetch_add(1, Relaxed);
        self.config.live.failing.store(true, Relaxed);
        let abandoned = self.abandon_current();
        // Messages waiting for the next file are lost with it.
        self.waiting.clear();
        self.waiting_since = None;
        for msg in std::mem::take(&mut self.held) {
            let d = Dropped::of(&msg);
            self.count_dropped(d);
        }
        tracing::error!(
            error = %err,
            abandoned = abandoned.as_deref().unwrap_or("none"),
            retry_s = retry.as_secs_f64(),
            "cannot write the record: the open file is left as it was at its last flush; \
             what arrives is counted and discarded until a new file can be written"
        );
        let now = Instant::now();
        let pending = self
            .outage
            .take()
            .map(|o| (o.msgs, o.samples, o.rows, o.since));
        let (msgs, samples, rows, since) = pending.unwrap_or((0, 0, 0, now));
        self.outage = Some(Outage {
            since,
            next_try: now + retry,
            msgs,
            samples,
            rows,
        });
        Ok(())
    }

    /// Drops the open file without a clean close (its last flush is what a reader sees; the
    /// index keeps `closed: null` for it) and keeps each stream's cursor at the file's end.
    fn abandon_current(&mut self) -> Option<String> {
        let file = self.current.take()?;
        for key in file.writer.streams() {
            if file.writer.meta(key) != self.streams.get(&key) {
                self.cursors.remove(&key);
            } else if let Some(cursor) = file.writer.cursor(key) {
                self.cursors.insert(key, cursor);
            }
        }
        let name = self.index.files[file.entry].file.clone();
        self.stats.bytes_written += file.writer.file_size();
        drop(file);
        Some(name)
    }

    /// During an outage: when a retry is due and `msg` carries data, tries to open a new file.
    /// True when writing resumed.
    fn try_resume(&mut self, msg: &RecordMsg) -> bool {
        let Some(outage) = &mut self.outage else {
            return true;
        };
        if Instant::now() < outage.next_try || msg_stream(msg).is_none() {
            return false;
        }
        let key = msg_stream(msg).expect("checked above");
        if !self.streams.contains_key(&key) {
            return false;
        }
        match self.ensure_open().map(|f| f.writer.path().to_path_buf()) {
            Ok(path) => {
                let o = self.outage.take().expect("in an outage");
                self.config.live.failing.store(false, Relaxed);
                tracing::info!(
                    file = %path.display(),
                    after_s = o.since.elapsed().as_secs_f64(),
                    messages = o.msgs,
                    samples = o.samples,
                    rows = o.rows,
                    "record writing resumed in a new file; what arrived meanwhile was not written \
                     and shows there as a gap"
                );
                true
            }
            Err(e) => {
                let retry = self.config.retry_after.unwrap_or(Duration::from_secs(1));
                let outage = self.outage.as_mut().expect("in an outage");
                outage.next_try = Instant::now() + retry;
                tracing::warn!(
                    error = %e,
                    failing_s = outage.since.elapsed().as_secs_f64(),
                    discarded_messages = outage.msgs,
                    "the record still cannot be written"
                );
                false
            }
        }
    }

    /// Counts a message that cannot be written; keeps what the next file needs (stream
    /// declarations and capture restarts).
    fn discard(&mut self, msg: RecordMsg) {
        match msg {
            RecordMsg::OpenStream(meta) => {
                let key = meta.key();
                if self.streams.get(&key).is_some_and(|m| *m != meta) {
                    self.cursors.remove(&key);
                }
                self.streams.insert(key, meta);
                return;
            }
            RecordMsg::Segment {
                stream,
                capture_id,
                t0_unix_ns,
            } => {
                // The next file starts this capture at its grid position 0; what was not
                // written of it shows there as a hole.
                self.cursors.insert(
                    stream,
                    StreamCursor {
                        capture_id,
                        capture_t0_unix_ns: t0_unix_ns,
                        next_position: 0,
                    },
                );
            }
            RecordMsg::Flush | RecordMsg::Shutdown => return,
            _ => {}
        }
        let dropped = Dropped::of(&msg);
        self.count_dropped(dropped);
    }

    fn count_dropped(&mut self, d: Dropped) {
        let live = &self.config.live;
        live.dropped_msgs.fetch_add(1, Relaxed);
        live.dropped_samples.fetch_add(d.samples, Relaxed);
        live.dropped_rows.fetch_add(d.rows, Relaxed);
        self.stats.dropped_msgs += 1;
        self.stats.dropped_samples += d.samples;
        self.stats.dropped_rows += d.rows;
        if let Some(o) = &mut self.outage {
            o.msgs += 1;
            o.samples += d.samples;
            o.rows += d.rows;
        }
    }

    fn finish(mut self, result: Result<(), StoreError>) -> Result<SinkStats, StoreError> {
        match result {
            Ok(()) => {
                if let Some(o) = &self.outage {
                    tracing::error!(
                        failing_s = o.since.elapsed().as_secs_f64(),
                        messages = o.msgs,
                        samples = o.samples,
                        rows = o.rows,
                        "stopping while the record cannot be written; the end of every stream \
                         since the outage began is not recorded"
                    );
                }
                if self.waiting_since.is_some() {
                    if let Err(e) = self.start_next_file() {
                        self.stats.errors += 1;
                        tracing::error!(error = %e, "record writer stopped");
                        let _ = self.close_current(close_reason::SHUTDOWN);
                        return Err(e);
                    }
                }
                self.close_current(close_reason::SHUTDOWN)?;
                Ok(self.stats)
            }
            Err(err) => {
                self.stats.errors += 1;
                tracing::error!(error = %err, "record writer stopped");
                // Keep whatever can still be saved; the first error is the one reported.
                let _ = self.close_current(close_reason::SHUTDOWN);
                Err(err)
            }
        }
    }

    fn handle(&mut self, msg: RecordMsg) -> Result<(), StoreError> {
        if let RecordMsg::OpenStream(meta) = msg {
            let key = meta.key();
            if self.streams.get(&key) == Some(&meta) {
                return Ok(());
            }
            let in_file = self
                .current
                .as_ref()
                .is_some_and(|f| f.writer.has_stream(key));
            self.streams.insert(key, meta);
            if self.current.is_some() && self.config.single_file.is_some() {
                return Err(StoreError::Index {
                    path: self.config.folder.clone(),
                    what: format!(
                        "stream {}/{} declared after the single record file was started",
                        key.node, key.channel
                    ),
                });
            }
            if self.current.is_some() {
                if in_file {
                    // New metadata for a stream in the file: it cannot be rewritten in SWMR.
                    tracing::info!(
                        node = key.node,
                        channel = key.channel,
                        "stream metadata changed; rotating"
                    );
                }
                if self.config.new_stream_wait.is_zero() {
                    self.close_current(close_reason::ROTATED)?;
                } else {
                    // Hold this stream's messages for a while: other new streams may follow,
                    // and one new file can take them all.
                    self.waiting.insert(key);
                    self.waiting_since.get_or_insert_with(Instant::now);
                }
            }
            return Ok(());
        }
        let Some(key) = msg_stream(&msg) else {
            return Ok(());
        };
        if self.waiting.contains(&key) {
            self.held.push(msg);
            if self.held.len() > MAX_HELD_MSGS {
                self.start_next_file()?;
            }
            return Ok(());
        }
        if !self.streams.contains_key(&key) {
            self.stats.unknown_stream_msgs += 1;
            tracing::warn!(
                node = key.node,
                channel = key.channel,
                "record message for a stream never opened; dropped"
            );
            return Ok(());
        }
        self.config.write_fault.check(&self.config.folder)?;
        if matches!(msg, RecordMsg::Samples { .. }) && self.rotation_due() {
            if self.waiting_since.is_some() {
                // The next file takes the waiting streams too.
                self.start_next_file()?;
            } else {
                self.close_current(close_reason::ROTATED)?;
            }
        }
        let file = self.ensure_open()?;
        let writer = &mut file.writer;
        match msg {
            RecordMsg::Samples { start, samples, .. } => {
                let before = writer.samples_written();
                writer.append_samples(key, start, &samples)?;
                self.stats.samples_written += writer.samples_written() - before;
            }
            RecordMsg::Gap {
                start, len, reason, ..
            } => {
                let before = writer.samples_written();
                writer.append_gap(key, start, len, reason)?;
                self.stats.samples_written += writer.samples_written() - before;
            }
            RecordMsg::Window { row, .. } => writer.append_window(key, row)?,
            RecordMsg::Segment {
                capture_id,
                t0_unix_ns,
                ..
            } => writer.begin_segment(key, capture_id, t0_unix_ns)?,
            RecordMsg::Peak { row, .. } => writer.append_peak(key, row)?,
            RecordMsg::Indicator { row, .. } => writer.append_indicator(key, row)?,
            RecordMsg::OpenStream(_) | RecordMsg::Flush | RecordMsg::Shutdown => {}
        }
        Ok(())
    }

    /// Closes the current file and writes the held messages of the waiting streams, which
    /// opens the next file with every known stream.
    fn start_next_file(&mut self) -> Result<(), StoreError> {
        self.waiting_since = None;
        self.waiting.clear();
        self.close_current(close_reason::ROTATED)?;
        let mut msgs = std::mem::take(&mut self.held).into_iter();
        while let Some(msg) = msgs.next() {
            let d = Dropped::of(&msg);
            if let Err(e) = self.handle(msg) {
                // This one is lost; the rest stay held for the caller to count.
                self.count_dropped(d);
                self.held.extend(msgs);
                return Err(e);
            }
        }
        Ok(())
    }

    fn rotation_due(&self) -> bool {
        if self.config.single_file.is_some() {
            return false;
        }
        let Some(file) = &self.current else {
            return false;
        };
        self.config
            .rotate_after
            .is_some_and(|age| file.opened.elapsed() >= age)
            || self
                .config
                .rotate_bytes
                .is_some_and(|bytes| file.writer.file_size() >= bytes)
    }

    fn ensure_open(&mut self) -> Result<&mut OpenFile, StoreError> {
        if self.current.is_none() {
            self.config.write_fault.check(&self.config.folder)?;
            let now = now_unix_ns();
            let seq = self.next_seq;
            let name = match &self.config.single_file {
                Some(name) => name.clone(),
                None => format!("{}-{}-{seq:04}.h5", self.config.prefix, file_stamp(now)),
            };
            let path = self.config.folder.join(&name);
            let metas: Vec<StreamMeta> = self.streams.values().cloned().collect();
            let writer = RecordWriter::create_continuing(
                &path,
                &metas,
                &self.cursors,
                &self.config.writer,
                &self.config.config_digest,
            )?;
            self.next_seq += 1;
            self.stats.files += 1;
            self.index.files.push(FileEntry {
                file: name,
                seq,
                created: iso8601_utc(now),
                closed: None,
                close_reason: None,
                streams: Vec::new(),
            });
            let entry = self.index.files.len() - 1;
            self.current = Some(OpenFile {
                writer,
                opened: Instant::now(),
                entry,
            });
            self.update_index()?;
        }
        Ok(self.current.as_mut().expect("opened above"))
    }

    fn update_index(&mut self) -> Result<(), StoreError> {
        if let Some(file) = &self.current {
            let writer = &file.writer;
            let streams = writer
                .streams()
                .into_iter()
                .map(|key| {
                    let meta = writer.meta(key).expect("stream of this writer");
                    let samples = writer.sample_count(key).unwrap_or(0);
                    let start = writer.time_of_index(key, 0).unwrap_or(0);
                    // On the capture grid, like every time in the record, so that the next
                    // file's start equals this end to the nanosecond.
                    let end = match writer.cursor(key) {
                        Some(c) if samples > 0 => {
                            grid_time(c.capture_t0_unix_ns, c.next_position, meta.sample_rate_hz)
                        }
                        _ => start,
                    };
                    StreamEntry {
                        node: key.node,
                        channel: key.channel,
                        path: key.group_path(),
                        samples,
                        start_time_unix_ns: start,
                        end_time_unix_ns: end,
                    }
                })
                .collect();
            self.index.files[file.entry].streams = streams;
        }
        if self.config.single_file.is_some() {
            return Ok(());
        }
        self.index.save(&self.config.folder)
    }

    fn flush(&mut self) -> Result<(), StoreError> {
        if let Some(file) = &mut self.current {
            self.config.write_fault.check(file.writer.path())?;
            file.writer.flush()?;
            let live = self.stats.bytes_written + file.writer.file_size();
            self.config
                .live_bytes
                .store(live, std::sync::atomic::Ordering::Relaxed);
            self.update_index()?;
        }
        Ok(())
    }

    fn close_current(&mut self, reason: u8) -> Result<(), StoreError> {
        if self.current.is_none() {
            return Ok(());
        }
        self.update_index()?;
        let file = self.current.take().expect("checked above");
        for key in file.writer.streams() {
            // A stream re-declared with new metadata has no entry in `streams` equal to the
            // file's; it starts afresh at grid position 0 in the next file.
            if file.writer.meta(key) != self.streams.get(&key) {
                self.cursors.remove(&key);
                continue;
            }
            if let Some(cursor) = file.writer.cursor(key) {
                self.cursors.insert(key, cursor);
            }
        }
        let entry = file.entry;
        let path = file.writer.path().to_path_buf();
        file.writer.close(reason)?;
        // The size after close includes the final attributes and flushed metadata.
        self.stats.bytes_written += std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
        self.config.live_bytes.store(
            self.stats.bytes_written,
            std::sync::atomic::Ordering::Relaxed,
        );
        let e = &mut self.index.files[entry];
        e.closed = Some(iso8601_utc(now_unix_ns()));
        e.close_reason = Some(
            if reason == close_reason::ROTATED {
                "rotated"
            } else {
                "shutdown"
            }
            .into(),
        );
        if self.config.single_file.is_some() {
            return Ok(());
        }
        self.index.save(&self.config.folder)
    }
}

/// What a discarded message would have written.
#[derive(Debug, Clone, Copy, Default)]
struct Dropped {
    samples: u64,
    rows: u64,
}

impl Dropped {
    fn of(msg: &RecordMsg) -> Dropped {
        match msg {
            RecordMsg::Samples { samples, .. } => Dropped {
                samples: samples.len() as u64,
                rows: 0,
            },
            RecordMsg::Gap { len, .. } => Dropped {
                samples: *len,
                rows: 0,
            },
            RecordMsg::Window { .. } | RecordMsg::Peak { .. } | RecordMsg::Indicator { .. } => {
                Dropped {
                    samples: 0,
                    rows: 1,
                }
            }
            _ => Dropped::default(),
        }
    }
}

fn msg_stream(msg: &RecordMsg) -> Option<StreamKey> {
    match msg {
        RecordMsg::Samples { stream, .. }
        | RecordMsg::Window { stream, .. }
        | RecordMsg::Gap { stream, .. }
        | RecordMsg::Segment { stream, .. }
        | RecordMsg::Peak { stream, .. }
        | RecordMsg::Indicator { stream, .. } => Some(*stream),
        RecordMsg::OpenStream(_) | RecordMsg::Flush | RecordMsg::Shutdown => None,
    }
}

/// The sequence number of a file name `<prefix>-<stamp>-<seq>.h5`, if it is one.
fn seq_of_name(name: &str, prefix: &str) -> Option<u32> {
    let rest = name.strip_prefix(prefix)?.strip_prefix('-')?;
    let stem = rest.strip_suffix(".h5")?;
    let (_, seq) = stem.rsplit_once('-')?;
    seq.parse().ok()
}

#[cfg(test)]
mod tests {
    use super::seq_of_name;

    #[test]
    fn file_names_parse_back_to_their_sequence_number() {
        assert_eq!(seq_of_name("rec-20261201T120000Z-0007.h5", "rec"), Some(7));
        assert_eq!(seq_of_name("rec-20261201T120000Z-0007.h5", "other"), None);
        assert_eq!(seq_of_name("index.json", "rec"), None);
    }
}
