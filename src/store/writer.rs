//! [`RecordWriter`]: one record file with a fixed set of streams, written from one thread.
//!
//! The file is created exclusively (never overwritten) with the v1.10 file format, every group
//! and dataset is created at once, the file attributes are written, and then the file switches
//! to SWMR. From then on only appends happen, because HDF5 cannot create objects in an SWMR
//! file; end-of-file information therefore goes into the pre-created `closed` dataset.

use super::layout::{
    self, ClosedRow, GapRow, H5IndicatorRow, H5PeakRow, IndicatorRow, PeakRow, SegmentRow,
    WindowRow,
};
use super::time::{grid_time, iso8601_utc, now_unix_ns};
use super::{GapReason, StoreError};
use hdf5::types::VarLenUnicode;
use hdf5::{Dataset, File, H5Type};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Identifies a stream: a node and one of its channels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct StreamKey {
    /// Node id.
    pub node: u32,
    /// Channel number on the node.
    pub channel: u16,
}

impl StreamKey {
    /// A key for `node` and `channel`.
    pub fn new(node: u32, channel: u16) -> Self {
        Self { node, channel }
    }

    /// The stream's group path, `/streams/<node>/<channel>`.
    pub fn group_path(&self) -> String {
        layout::stream_group_path(self.node, self.channel)
    }
}

/// What the record says about a stream; written as attributes of its `samples` dataset.
#[derive(Debug, Clone, PartialEq)]
pub struct StreamMeta {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
    /// Sample rate of the stream's grid in Hz.
    pub sample_rate_hz: f64,
    /// Time of grid position 0 of the first segment, Unix nanoseconds.
    pub start_time_unix_ns: i64,
    /// Capture id of the first segment.
    pub capture_id: u32,
    /// Physical units of the samples, e.g. "m/s^2" or "Pa".
    pub units: String,
    /// Sparsity basis used for reconstruction ("dct", ...), or "truth" for ground truth.
    pub basis: String,
}

impl StreamMeta {
    /// The stream's key.
    pub fn key(&self) -> StreamKey {
        StreamKey::new(self.node, self.channel)
    }
}

/// Where a stream stands at the end of a file, so the next file of a series can continue the
/// same capture's grid (see [`RecordWriter::create_continuing`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StreamCursor {
    /// Capture in progress.
    pub capture_id: u32,
    /// Time of grid position 0 of the capture in progress.
    pub capture_t0_unix_ns: i64,
    /// Next grid position (segment-relative) that the stitcher will emit.
    pub next_position: u64,
}

/// Storage options of a record file.
#[derive(Debug, Clone, PartialEq)]
pub struct WriterOptions {
    /// Chunk length of `samples`, in samples. Default 65536 (256 KiB of f32): large enough
    /// that chunk indexing costs little, small enough that a flush rewrites little.
    pub chunk_len: usize,
    /// Chunk length of the row datasets, in rows. Default 256.
    pub row_chunk_len: usize,
    /// Deflate level (with the shuffle filter) for `samples`, or `None` for no compression.
    /// Default `None`: noisy f32 vibration data shrinks little under deflate, and the
    /// gateway's CPU goes to the solver.
    pub deflate: Option<u8>,
    /// A hole longer than this many samples is not filled with NaN; the data after it starts
    /// a new segment instead. Default 2^22 (about 87 s at 48 kHz, 16 MiB of NaN).
    pub max_nan_fill: u64,
}

impl Default for WriterOptions {
    fn default() -> Self {
        Self {
            chunk_len: 65_536,
            row_chunk_len: 256,
            deflate: None,
            max_nan_fill: 1 << 22,
        }
    }
}

/// One stretch of a capture's grid mapped onto `samples`: positions `>= from` map to
/// `position + delta`.
#[derive(Debug, Clone, Copy)]
struct Piece {
    from: u64,
    delta: i64,
}

struct StreamState {
    meta: StreamMeta,
    samples: Dataset,
    windows: Dataset,
    gaps: Dataset,
    segments: Dataset,
    peaks: Dataset,
    indicators: Dataset,
    len: u64,
    rows: [u64; 5],
    capture_id: u32,
    capture_t0_unix_ns: i64,
    pieces: Vec<Piece>,
    segment_start: u64,
    dirty: bool,
}

const ROW_WINDOWS: usize = 0;
const ROW_GAPS: usize = 1;
const ROW_SEGMENTS: usize = 2;
const ROW_PEAKS: usize = 3;
const ROW_INDICATORS: usize = 4;

/// A record file being written. Plain struct, used from one thread.
///
/// # Positions
/// Every position passed in (`start` of samples and gaps, `start_sample` of window and
/// indicator rows) is on the stream's *segment grid*: position 0 is the first instant of the
/// capture in progress, as the stitcher counts. The writer stores indices into `samples`:
/// `index = position + delta`, where `delta` changes only when a segment starts (at
/// [`begin_segment`](Self::begin_segment), after a hole longer than
/// [`WriterOptions::max_nan_fill`], and at the start of a continued file). Shorter holes are
/// filled with NaN and recorded as a gap row, so `samples` stays on the grid. A row whose
/// position falls before this file's first sample (a window that began in the previous file of
/// a series) is stored with `start_sample` 0; its `t0_unix_ns` stays exact.
pub struct RecordWriter {
    path: PathBuf,
    file: File,
    closed: Dataset,
    streams: BTreeMap<StreamKey, StreamState>,
    options: WriterOptions,
    samples_written: u64,
}

impl RecordWriter {
    /// Creates a record at `path` (which must not exist) holding `streams`, each starting at
    /// grid position 0 of its first capture, and switches it to SWMR.
    pub fn create(
        path: &Path,
        streams: &[StreamMeta],
        options: &WriterOptions,
        config_digest: &str,
    ) -> Result<Self, StoreError> {
        Self::create_continuing(path, streams, &BTreeMap::new(), options, config_digest)
    }

    /// Like [`create`](Self::create), but a stream with an entry in `cursors` continues its
    /// capture: sample 0 of this file is grid position `next_position` of that capture.
    pub fn create_continuing(
        path: &Path,
        streams: &[StreamMeta],
        cursors: &BTreeMap<StreamKey, StreamCursor>,
        options: &WriterOptions,
        config_digest: &str,
    ) -> Result<Self, StoreError> {
        if path.exists() {
            return Err(StoreError::Exists(path.to_path_buf()));
        }
        let mut seen = std::collections::BTreeSet::new();
        for meta in streams {
            if !seen.insert(meta.key()) {
                return Err(StoreError::DuplicateStream {
                    node: meta.node,
                    channel: meta.channel,
                });
            }
            if !(meta.sample_rate_hz.is_finite() && meta.sample_rate_hz > 0.0) {
                return Err(StoreError::BadMeta {
                    node: meta.node,
                    channel: meta.channel,
                    what: format!("sample rate {} Hz", meta.sample_rate_hz),
                });
            }
        }
        let h5 = StoreError::hdf5(path);
        // CreateExcl also guards the race between the check above and the create.
        let file = File::with_options()
            .with_fapl(|fapl| fapl.libver_v110())
            .create_excl(path)
            .map_err(|source| {
                if path.exists() {
                    StoreError::Exists(path.to_path_buf())
                } else {
                    StoreError::hdf5(path)(source)
                }
            })?;
        write_str_attr(&file, layout::ATTR_TOOL_VERSION, crate::VERSION).map_err(h5)?;
        let h5 = StoreError::hdf5(path);
        file.new_attr::<u32>()
            .create(layout::ATTR_LAYOUT_VERSION)
            .and_then(|a| a.write_scalar(&layout::LAYOUT_VERSION))
            .map_err(h5)?;
        let h5 = StoreError::hdf5(path);
        write_str_attr(&file, layout::ATTR_CONFIG_DIGEST, config_digest).map_err(h5)?;
        let h5 = StoreError::hdf5(path);
        write_str_attr(&file, layout::ATTR_CREATED, &iso8601_utc(now_unix_ns())).map_err(h5)?;
        let h5 = StoreError::hdf5(path);
        let closed = create_rows::<ClosedRow>(&file, layout::CLOSED_DATASET, 16).map_err(h5)?;
        let root = file
            .create_group(layout::STREAMS_GROUP)
            .map_err(StoreError::hdf5(path))?;
        let mut states = BTreeMap::new();
        for meta in streams {
            let key = meta.key();
            let cursor = cursors.get(&key).copied().unwrap_or(StreamCursor {
                capture_id: meta.capture_id,
                capture_t0_unix_ns: meta.start_time_unix_ns,
                next_position: 0,
            });
            let state =
                create_stream(&root, meta, &cursor, options).map_err(StoreError::hdf5(path))?;
            states.insert(key, state);
        }
        let mut writer = Self {
            path: path.to_path_buf(),
            file,
            closed,
            streams: states,
            options: options.clone(),
            samples_written: 0,
        };
        // The first segment row of each stream is plain data, so it can go in after SWMR
        // starts; writing it before keeps every stream's tables complete from the first flush.
        for state in writer.streams.values_mut() {
            let row = SegmentRow {
                start_sample: 0,
                capture_id: state.capture_id,
                t0_unix_ns: state.time_of_index(0),
            };
            append_rows(&state.segments, &mut state.rows[ROW_SEGMENTS], &[row])
                .map_err(StoreError::hdf5(path))?;
        }
        writer.file.start_swmr().map_err(StoreError::hdf5(path))?;
        writer.flush()?;
        Ok(writer)
    }

    /// The file being written.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The streams of this file, in key order.
    pub fn streams(&self) -> Vec<StreamKey> {
        self.streams.keys().copied().collect()
    }

    /// The metadata a stream was created with.
    pub fn meta(&self, key: StreamKey) -> Option<&StreamMeta> {
        self.streams.get(&key).map(|s| &s.meta)
    }

    /// Whether `key` is one of this file's streams.
    pub fn has_stream(&self, key: StreamKey) -> bool {
        self.streams.contains_key(&key)
    }

    /// Samples written so far to a stream (the length of its `samples`).
    pub fn sample_count(&self, key: StreamKey) -> Option<u64> {
        self.streams.get(&key).map(|s| s.len)
    }

    /// Where a stream stands, for continuing it in the next file.
    pub fn cursor(&self, key: StreamKey) -> Option<StreamCursor> {
        self.streams.get(&key).map(|s| StreamCursor {
            capture_id: s.capture_id,
            capture_t0_unix_ns: s.capture_t0_unix_ns,
            next_position: s.position_of_end(),
        })
    }

    /// Time of `samples[index]` of a stream, Unix nanoseconds (the segment rule of the layout).
    pub fn time_of_index(&self, key: StreamKey, index: u64) -> Option<i64> {
        self.streams.get(&key).map(|s| s.time_of_index(index))
    }

    /// Total samples (including NaN fill) written by this writer.
    pub fn samples_written(&self) -> u64 {
        self.samples_written
    }

    /// Current size of the file in bytes.
    pub fn file_size(&self) -> u64 {
        self.file.size()
    }

    fn state(&mut self, key: StreamKey) -> Result<&mut StreamState, StoreError> {
        self.streams.get_mut(&key).ok_or(StoreError::UnknownStream {
            node: key.node,
            channel: key.channel,
        })
    }

    /// Appends finished samples starting at grid position `start`. A hole between the end of
    /// what is written and `start` is filled with NaN and recorded as a gap of reason
    /// [`GapReason::Unspecified`], or starts a new segment if longer than `max_nan_fill`.
    pub fn append_samples(
        &mut self,
        key: StreamKey,
        start: u64,
        samples: &[f32],
    ) -> Result<(), StoreError> {
        let path = self.path.clone();
        let options = self.options.clone();
        let state = self.state(key)?;
        let index = state.index_of(start);
        if index < state.len as i64 {
            return Err(state.overlap(index));
        }
        let hole = index as u64 - state.len;
        let mut filled = 0;
        if hole > options.max_nan_fill {
            state
                .split_segment(start)
                .map_err(StoreError::hdf5(&path))?;
        } else if hole > 0 {
            filled = state
                .fill_gap(hole, GapReason::Unspecified, options.chunk_len)
                .map_err(StoreError::hdf5(&path))?;
        }
        state
            .write_samples(samples)
            .map_err(StoreError::hdf5(&path))?;
        self.samples_written += filled + samples.len() as u64;
        Ok(())
    }

    /// Records `len` missing samples from grid position `start`: NaN in `samples` plus a gap
    /// row, or a new segment after the gap if `len` exceeds `max_nan_fill` (then no gap row
    /// is written: the segment boundary shows the hole). The part of a gap that falls before
    /// this file's first sample is dropped.
    pub fn append_gap(
        &mut self,
        key: StreamKey,
        start: u64,
        len: u64,
        reason: GapReason,
    ) -> Result<(), StoreError> {
        let path = self.path.clone();
        let options = self.options.clone();
        let state = self.state(key)?;
        let after = start + len;
        let index = state.index_of(start);
        let end = index + len as i64;
        if end <= 0 {
            return Ok(());
        }
        let index = index.max(0);
        if index < state.len as i64 {
            return Err(state.overlap(index));
        }
        let hole_before = index as u64 - state.len;
        let len = (end - index) as u64;
        let mut filled = 0;
        if hole_before + len > options.max_nan_fill {
            state
                .split_segment(after)
                .map_err(StoreError::hdf5(&path))?;
        } else {
            if hole_before > 0 {
                filled += state
                    .fill_gap(hole_before, GapReason::Unspecified, options.chunk_len)
                    .map_err(StoreError::hdf5(&path))?;
            }
            filled += state
                .fill_gap(len, reason, options.chunk_len)
                .map_err(StoreError::hdf5(&path))?;
        }
        self.samples_written += filled;
        Ok(())
    }

    /// Starts a new segment for a capture restart: grid position 0 of capture `capture_id`
    /// (at `t0_unix_ns`) becomes the current end of `samples`. If the current segment holds
    /// no samples yet, its row is replaced instead of adding an empty segment.
    pub fn begin_segment(
        &mut self,
        key: StreamKey,
        capture_id: u32,
        t0_unix_ns: i64,
    ) -> Result<(), StoreError> {
        let path = self.path.clone();
        let state = self.state(key)?;
        state.capture_id = capture_id;
        state.capture_t0_unix_ns = t0_unix_ns;
        state.pieces = vec![Piece {
            from: 0,
            delta: state.len as i64,
        }];
        let row = SegmentRow {
            start_sample: state.len,
            capture_id,
            t0_unix_ns,
        };
        state.put_segment_row(row).map_err(StoreError::hdf5(&path))
    }

    /// Appends a window row; its `start_sample` is a grid position, stored as an index.
    pub fn append_window(&mut self, key: StreamKey, row: WindowRow) -> Result<(), StoreError> {
        let path = self.path.clone();
        let state = self.state(key)?;
        let mut row = row;
        row.start_sample = state.index_of(row.start_sample).max(0) as u64;
        state
            .append(ROW_WINDOWS, &[row])
            .map_err(StoreError::hdf5(&path))
    }

    /// Appends a peak row.
    pub fn append_peak(&mut self, key: StreamKey, row: PeakRow) -> Result<(), StoreError> {
        let path = self.path.clone();
        let state = self.state(key)?;
        state
            .append(ROW_PEAKS, &[H5PeakRow::from(&row)])
            .map_err(StoreError::hdf5(&path))
    }

    /// Appends an indicator row; its `start_sample` is a grid position, stored as an index.
    pub fn append_indicator(
        &mut self,
        key: StreamKey,
        row: IndicatorRow,
    ) -> Result<(), StoreError> {
        let path = self.path.clone();
        let state = self.state(key)?;
        let mut row = row;
        row.start_sample = state.index_of(row.start_sample).max(0) as u64;
        state
            .append(ROW_INDICATORS, &[H5IndicatorRow::from(&row)])
            .map_err(StoreError::hdf5(&path))
    }

    /// Flushes every dataset changed since the last flush, then the file. After this returns,
    /// a reader (or the file left by a killed writer) holds everything appended so far.
    pub fn flush(&mut self) -> Result<(), StoreError> {
        let h5 = StoreError::hdf5(&self.path);
        let result: hdf5::Result<()> = (|| {
            for state in self.streams.values_mut() {
                if state.dirty {
                    for ds in [
                        &state.samples,
                        &state.windows,
                        &state.gaps,
                        &state.segments,
                        &state.peaks,
                        &state.indicators,
                    ] {
                        ds.flush()?;
                    }
                    state.dirty = false;
                }
            }
            self.file.flush()
        })();
        result.map_err(h5)
    }

    /// Writes the `closed` row with `reason` (a [`layout::close_reason`] code), flushes and
    /// closes the file.
    pub fn close(mut self, reason: u8) -> Result<(), StoreError> {
        let row = ClosedRow {
            t_unix_ns: now_unix_ns(),
            reason,
        };
        let mut n = 0;
        append_rows(&self.closed, &mut n, &[row]).map_err(StoreError::hdf5(&self.path))?;
        self.closed.flush().map_err(StoreError::hdf5(&self.path))?;
        self.flush()?;
        let path = self.path.clone();
        let Self {
            file,
            streams,
            closed,
            ..
        } = self;
        drop(streams);
        drop(closed);
        file.close().map_err(StoreError::hdf5(&path))
    }
}

impl StreamState {
    fn index_of(&self, position: u64) -> i64 {
        let piece = self
            .pieces
            .iter()
            .rev()
            .find(|p| p.from <= position)
            .unwrap_or(&self.pieces[0]);
        position as i64 + piece.delta
    }

    fn position_of_end(&self) -> u64 {
        let last = self.pieces.last().expect("a stream always has a piece");
        (self.len as i64 - last.delta).max(0) as u64
    }

    fn time_of_index(&self, index: u64) -> i64 {
        // Time runs on the capture's grid, so the time of an index is the time of its position.
        let piece = self
            .pieces
            .iter()
            .rev()
            .find(|p| p.from as i64 + p.delta <= index as i64)
            .unwrap_or(&self.pieces[0]);
        let position = (index as i64 - piece.delta).max(0) as u64;
        grid_time(self.capture_t0_unix_ns, position, self.meta.sample_rate_hz)
    }

    fn overlap(&self, index: i64) -> StoreError {
        StoreError::Overlap {
            node: self.meta.node,
            channel: self.meta.channel,
            start: index,
            len: self.len,
        }
    }

    fn append<T: H5Type>(&mut self, which: usize, rows: &[T]) -> hdf5::Result<()> {
        let ds = match which {
            ROW_WINDOWS => &self.windows,
            ROW_GAPS => &self.gaps,
            ROW_SEGMENTS => &self.segments,
            ROW_PEAKS => &self.peaks,
            _ => &self.indicators,
        };
        append_rows(ds, &mut self.rows[which], rows)?;
        self.dirty = true;
        Ok(())
    }

    fn put_segment_row(&mut self, row: SegmentRow) -> hdf5::Result<()> {
        if self.segment_start == self.len && self.rows[ROW_SEGMENTS] > 0 {
            let last = (self.rows[ROW_SEGMENTS] - 1) as usize;
            self.segments.write_slice(&[row], last..last + 1)?;
            self.dirty = true;
        } else {
            self.append(ROW_SEGMENTS, &[row])?;
        }
        self.segment_start = self.len;
        Ok(())
    }

    /// Continues the capture at grid position `position` from the current end of `samples`.
    fn split_segment(&mut self, position: u64) -> hdf5::Result<()> {
        self.pieces.push(Piece {
            from: position,
            delta: self.len as i64 - position as i64,
        });
        let row = SegmentRow {
            start_sample: self.len,
            capture_id: self.capture_id,
            t0_unix_ns: grid_time(self.capture_t0_unix_ns, position, self.meta.sample_rate_hz),
        };
        self.put_segment_row(row)
    }

    fn write_samples(&mut self, samples: &[f32]) -> hdf5::Result<()> {
        if samples.is_empty() {
            return Ok(());
        }
        let start = self.len as usize;
        let end = start + samples.len();
        self.samples.resize(end)?;
        self.samples.write_slice(samples, start..end)?;
        self.len = end as u64;
        self.dirty = true;
        Ok(())
    }

    fn fill_gap(&mut self, len: u64, reason: GapReason, chunk_len: usize) -> hdf5::Result<u64> {
        if len == 0 {
            return Ok(0);
        }
        let row = GapRow {
            start_sample: self.len,
            length: len,
            reason: reason.code(),
        };
        let nan = vec![f32::NAN; (len as usize).min(chunk_len.max(1))];
        let mut left = len as usize;
        while left > 0 {
            let n = left.min(nan.len());
            self.write_samples(&nan[..n])?;
            left -= n;
        }
        self.append(ROW_GAPS, &[row])?;
        Ok(len)
    }
}

fn write_str_attr(loc: &hdf5::Location, name: &str, value: &str) -> hdf5::Result<()> {
    let value: VarLenUnicode = value
        .parse()
        .map_err(|e| hdf5::Error::from(format!("attribute {name}: {e}")))?;
    loc.new_attr::<VarLenUnicode>()
        .create(name)?
        .write_scalar(&value)
}

fn write_scalar_attr<T: H5Type>(loc: &hdf5::Location, name: &str, value: &T) -> hdf5::Result<()> {
    loc.new_attr::<T>().create(name)?.write_scalar(value)
}

fn create_rows<T: H5Type>(group: &hdf5::Group, name: &str, chunk: usize) -> hdf5::Result<Dataset> {
    group
        .new_dataset::<T>()
        .chunk(chunk.max(1))
        .shape(0..)
        .create(name)
}

fn append_rows<T: H5Type>(ds: &Dataset, count: &mut u64, rows: &[T]) -> hdf5::Result<()> {
    if rows.is_empty() {
        return Ok(());
    }
    let start = *count as usize;
    let end = start + rows.len();
    ds.resize(end)?;
    ds.write_slice(rows, start..end)?;
    *count = end as u64;
    Ok(())
}

fn create_stream(
    root: &hdf5::Group,
    meta: &StreamMeta,
    cursor: &StreamCursor,
    options: &WriterOptions,
) -> hdf5::Result<StreamState> {
    let node_name = meta.node.to_string();
    let node = if root.link_exists(&node_name) {
        root.group(&node_name)?
    } else {
        root.create_group(&node_name)?
    };
    let group = node.create_group(&meta.channel.to_string())?;
    let builder = group
        .new_dataset::<f32>()
        .chunk(options.chunk_len.max(1))
        .fill_value(f32::NAN);
    let builder = match options.deflate {
        Some(level) => builder.shuffle().deflate(level.min(9)),
        None => builder,
    };
    let samples = builder.shape(0..).create(layout::SAMPLES)?;
    let start_time = grid_time(
        cursor.capture_t0_unix_ns,
        cursor.next_position,
        meta.sample_rate_hz,
    );
    write_scalar_attr(&samples, layout::ATTR_SAMPLE_RATE_HZ, &meta.sample_rate_hz)?;
    write_str_attr(&samples, layout::ATTR_START_TIME, &iso8601_utc(start_time))?;
    write_scalar_attr(&samples, layout::ATTR_START_TIME_UNIX_NS, &start_time)?;
    write_str_attr(&samples, layout::ATTR_UNITS, &meta.units)?;
    write_str_attr(&samples, layout::ATTR_BASIS, &meta.basis)?;
    write_scalar_attr(&samples, layout::ATTR_NODE, &meta.node)?;
    write_scalar_attr(&samples, layout::ATTR_CHANNEL, &meta.channel)?;
    let rc = options.row_chunk_len;
    Ok(StreamState {
        meta: meta.clone(),
        samples,
        windows: create_rows::<WindowRow>(&group, layout::WINDOWS, rc)?,
        gaps: create_rows::<GapRow>(&group, layout::GAPS, rc)?,
        segments: create_rows::<SegmentRow>(&group, layout::SEGMENTS, rc)?,
        peaks: create_rows::<H5PeakRow>(&group, layout::PEAKS, rc)?,
        indicators: create_rows::<H5IndicatorRow>(&group, layout::INDICATORS, rc)?,
        len: 0,
        rows: [0; 5],
        capture_id: cursor.capture_id,
        capture_t0_unix_ns: cursor.capture_t0_unix_ns,
        pieces: vec![Piece {
            from: cursor.next_position,
            delta: -(cursor.next_position as i64),
        }],
        segment_start: 0,
        dirty: true,
    })
}
