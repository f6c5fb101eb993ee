//! HDF5 record files: the stitched samples of every stream plus the per-window solver report,
//! gaps, segments, peaks and indicators, in the layout of [`layout`] (described in
//! `docs/hdf5-layout.md`). Downstream of `stream::overlap_add`; upstream of `inspect` and of
//! anything that reads a record with h5py.
//!
//! - [`RecordWriter`]: one file, a fixed set of streams, used from one thread. It creates every
//!   object first and then switches the file to SWMR, so a reader can follow it and a killed
//!   writer leaves a file holding everything flushed before the kill.
//! - [`RecordSink`]: the writer thread. It owns every open file (the HDF5 bindings serialize
//!   all calls behind one global lock, so nothing else in the process calls HDF5), rotates to a
//!   new file when a stream appears late or a time or size limit is reached, and keeps
//!   `index.json` in the record folder.
//! - [`RecordReader`]: read-only (SWMR read) access for `inspect` and tests.
//!
//! Positions given to the writer are on the stream's segment grid (what the stitcher emits);
//! the writer maps them to indices into `samples`. See [`RecordWriter`] for the rule.

pub mod layout;
mod reader;
mod sink;
mod time;
mod writer;

pub use crate::stream::overlap_add::GapReason;
pub use layout::{ClosedRow, GapRow, IndicatorRow, PeakRow, SegmentRow, WindowRow};
pub use reader::{FileAttrs, RecordReader};
pub use sink::{
    FileEntry, RecordIndex, RecordMsg, RecordSink, SinkConfig, SinkLive, SinkStats, StreamEntry,
    WriteFault,
};
pub use time::{iso8601_utc, INDEX_FILE};
pub use writer::{RecordWriter, StreamCursor, StreamKey, StreamMeta, WriterOptions};

use std::path::PathBuf;

/// Errors of the record store.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StoreError {
    /// An HDF5 call failed (disk full, permissions, corrupt file, ...).
    #[error("hdf5 error on {path}: {source}")]
    Hdf5 {
        /// The file concerned.
        path: PathBuf,
        /// The library's error.
        #[source]
        source: hdf5::Error,
    },
    /// A filesystem call failed.
    #[error("i/o error on {path}: {source}")]
    Io {
        /// The file or folder concerned.
        path: PathBuf,
        /// The OS error.
        #[source]
        source: std::io::Error,
    },
    /// The record file already exists; records are never overwritten.
    #[error("record file {0} already exists")]
    Exists(PathBuf),
    /// The stream is not part of this file.
    #[error("stream node {node} channel {channel} is not in this record")]
    UnknownStream {
        /// Node id.
        node: u32,
        /// Channel number.
        channel: u16,
    },
    /// The same stream was given twice.
    #[error("stream node {node} channel {channel} given twice")]
    DuplicateStream {
        /// Node id.
        node: u32,
        /// Channel number.
        channel: u16,
    },
    /// Samples or a gap start before the end of what is already written.
    #[error(
        "stream node {node} channel {channel}: write at sample {start} overlaps the {len} samples already written"
    )]
    Overlap {
        /// Node id.
        node: u32,
        /// Channel number.
        channel: u16,
        /// Requested start, as an index into `samples`.
        start: i64,
        /// Samples already written.
        len: u64,
    },
    /// A stream's metadata is unusable (sample rate not positive and finite, ...).
    #[error("stream node {node} channel {channel}: {what}")]
    BadMeta {
        /// Node id.
        node: u32,
        /// Channel number.
        channel: u16,
        /// What is wrong.
        what: String,
    },
    /// The file is not a record of a layout this build reads.
    #[error("{path}: {what}")]
    Layout {
        /// The file concerned.
        path: PathBuf,
        /// What is wrong.
        what: String,
    },
    /// The record index (`index.json`) could not be read or written.
    #[error("record index {path}: {what}")]
    Index {
        /// The index file.
        path: PathBuf,
        /// What is wrong.
        what: String,
    },
    /// The writer thread has stopped (after an error or a shutdown).
    #[error("record writer thread has stopped")]
    SinkStopped,
}

impl StoreError {
    pub(crate) fn hdf5(path: &std::path::Path) -> impl FnOnce(hdf5::Error) -> StoreError + '_ {
        move |source| StoreError::Hdf5 {
            path: path.to_path_buf(),
            source,
        }
    }
}
