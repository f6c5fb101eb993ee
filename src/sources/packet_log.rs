//! Replays a packet-log file as a source: every complete frame, authenticated and validated as
//! the TCP ingest would, sent to the pipeline's bounded channel.
//!
//! File reading is blocking, so it runs on tokio's blocking pool and uses `blocking_send`,
//! which gives the same back-pressure as the TCP readers.

use crate::packet::log::{LogError, LogReadStats, LogReader};
use crate::packet::{DecodeError, Frame, KeyRing, Limits, Packet};
use std::path::PathBuf;
use tokio::sync::mpsc;

/// How many authentication failures of one log are logged one by one.
const WARN_EACH: u64 = 3;

/// What a replay met.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ReplaySummary {
    /// The reader's counts: records, garbage, cut tail.
    pub log: LogReadStats,
    /// Windows sent on.
    pub windows: u64,
    /// Records that failed authentication.
    pub auth_failures: u64,
    /// Records that did not parse.
    pub decode_errors: u64,
    /// Windows that broke a validation rule.
    pub validation_errors: u64,
    /// Records of other frame kinds (acks, control), skipped.
    pub other_frames: u64,
    /// Whether the receiver went away before the end.
    pub receiver_closed: bool,
}

/// Reads `path` to the end, sending its windows to `tx`.
pub async fn replay(
    path: PathBuf,
    limits: Limits,
    keys: KeyRing,
    tx: mpsc::Sender<Packet>,
) -> Result<ReplaySummary, LogError> {
    tokio::task::spawn_blocking(move || replay_blocking(&path, &limits, &keys, &tx))
        .await
        .expect("replay task panicked")
}

/// The blocking body of [`replay`], for callers already off the async runtime.
pub fn replay_blocking(
    path: &std::path::Path,
    limits: &Limits,
    keys: &KeyRing,
    tx: &mpsc::Sender<Packet>,
) -> Result<ReplaySummary, LogError> {
    let mut reader = LogReader::open(path)?;
    let mut summary = ReplaySummary::default();
    while let Some(record) = reader.next_record()? {
        if let Err(e) = keys.check(record.frame.as_bytes()) {
            summary.auth_failures += 1;
            // The first few are logged one by one; a log from an unknown node would otherwise
            // print a line per frame. The total is in the summary.
            if summary.auth_failures <= WARN_EACH {
                tracing::warn!(offset = record.offset, error = %e, "log record failed authentication");
            }
            continue;
        }
        match record.frame.parse(limits) {
            Ok(Frame::Window(p)) => {
                if tx.blocking_send(p).is_err() {
                    summary.receiver_closed = true;
                    break;
                }
                summary.windows += 1;
            }
            Ok(_) => summary.other_frames += 1,
            Err(DecodeError::Wire(e)) => {
                summary.decode_errors += 1;
                tracing::warn!(offset = record.offset, error = %e, "log record does not parse");
            }
            Err(DecodeError::Invalid(e)) => {
                summary.validation_errors += 1;
                tracing::warn!(offset = record.offset, error = %e, "log record is invalid");
            }
        }
    }
    if summary.auth_failures > WARN_EACH {
        tracing::warn!(
            path = %path.display(),
            failed = summary.auth_failures,
            "log records failed authentication in all (only the first {WARN_EACH} were logged)"
        );
    }
    summary.log = reader.stats().clone();
    Ok(summary)
}
