//! [`RecordReader`]: read-only access to a record file, opened in SWMR read mode so that it
//! works on a file still being written and on one left by a killed writer.

use super::layout::{
    self, ClosedRow, GapRow, H5IndicatorRow, H5PeakRow, IndicatorRow, PeakRow, SegmentRow,
    WindowRow,
};
use super::writer::{StreamKey, StreamMeta};
use super::StoreError;
use hdf5::types::VarLenUnicode;
use hdf5::{File, H5Type, OpenMode};
use std::path::{Path, PathBuf};

/// The file-level attributes of a record.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FileAttrs {
    /// `layout_version`.
    pub layout_version: u32,
    /// `tool_version`.
    pub tool_version: String,
    /// `config_digest`.
    pub config_digest: String,
    /// `created`, ISO-8601 UTC.
    pub created: String,
}

/// Attempts of the HDF5 library at a metadata block whose checksum fails, in SWMR read mode.
pub const METADATA_READ_ATTEMPTS: u32 = 4;

/// An open record file (read-only).
pub struct RecordReader {
    path: PathBuf,
    file: File,
}

impl RecordReader {
    /// Opens `path` read-only in SWMR read mode and checks its layout version.
    pub fn open(path: &Path) -> Result<Self, StoreError> {
        // A SWMR reader retries a metadata block whose checksum fails (it may be racing the
        // writer); HDF5 1.10's default of 100 attempts, with a back-off that grows each time,
        // made one damaged block stall `inspect` for tens of minutes (found by the `record`
        // fuzz target). A few attempts still cover a racing writer's flush.
        let file = File::with_options()
            .with_fapl(|p| p.metadata_read_attempts(METADATA_READ_ATTEMPTS))
            .open_as(path, OpenMode::ReadSWMR)
            .map_err(StoreError::hdf5(path))?;
        let reader = Self {
            path: path.to_path_buf(),
            file,
        };
        let version = reader.attrs()?.layout_version;
        if version != layout::LAYOUT_VERSION {
            return Err(StoreError::Layout {
                path: path.to_path_buf(),
                what: format!(
                    "layout version {version}, this build reads {}",
                    layout::LAYOUT_VERSION
                ),
            });
        }
        Ok(reader)
    }

    fn h5(&self) -> impl FnOnce(hdf5::Error) -> StoreError + '_ {
        StoreError::hdf5(&self.path)
    }

    /// The file-level attributes.
    pub fn attrs(&self) -> Result<FileAttrs, StoreError> {
        let f = &self.file;
        let result: hdf5::Result<FileAttrs> = (|| {
            Ok(FileAttrs {
                layout_version: f.attr(layout::ATTR_LAYOUT_VERSION)?.read_scalar()?,
                tool_version: read_str_attr(f, layout::ATTR_TOOL_VERSION)?,
                config_digest: read_str_attr(f, layout::ATTR_CONFIG_DIGEST)?,
                created: read_str_attr(f, layout::ATTR_CREATED)?,
            })
        })();
        result.map_err(self.h5())
    }

    /// The streams in the file, in key order.
    pub fn streams(&self) -> Result<Vec<StreamKey>, StoreError> {
        let result: hdf5::Result<Vec<StreamKey>> = (|| {
            let root = self.file.group(layout::STREAMS_GROUP)?;
            let mut keys = Vec::new();
            for node_name in root.member_names()? {
                let Ok(node) = node_name.parse::<u32>() else {
                    continue;
                };
                for channel_name in root.group(&node_name)?.member_names()? {
                    if let Ok(channel) = channel_name.parse::<u16>() {
                        keys.push(StreamKey::new(node, channel));
                    }
                }
            }
            keys.sort();
            Ok(keys)
        })();
        result.map_err(self.h5())
    }

    fn dataset(&self, key: StreamKey, name: &str) -> Result<hdf5::Dataset, StoreError> {
        let path = format!("{}/{name}", key.group_path());
        self.file
            .dataset(&path)
            .map_err(|_| StoreError::UnknownStream {
                node: key.node,
                channel: key.channel,
            })
    }

    /// A stream's metadata as recorded in the attributes of its `samples`. The start time and
    /// capture id are those of this file's first sample and first segment.
    pub fn stream_meta(&self, key: StreamKey) -> Result<StreamMeta, StoreError> {
        let ds = self.dataset(key, layout::SAMPLES)?;
        let first_capture = self.segments(key)?.first().map_or(0, |s| s.capture_id);
        let result: hdf5::Result<StreamMeta> = (|| {
            Ok(StreamMeta {
                node: ds.attr(layout::ATTR_NODE)?.read_scalar()?,
                channel: ds.attr(layout::ATTR_CHANNEL)?.read_scalar()?,
                sample_rate_hz: ds.attr(layout::ATTR_SAMPLE_RATE_HZ)?.read_scalar()?,
                start_time_unix_ns: ds.attr(layout::ATTR_START_TIME_UNIX_NS)?.read_scalar()?,
                capture_id: first_capture,
                units: read_str_attr(&ds, layout::ATTR_UNITS)?,
                basis: read_str_attr(&ds, layout::ATTR_BASIS)?,
            })
        })();
        result.map_err(self.h5())
    }

    /// The `start_time` attribute (ISO-8601) of a stream's `samples`.
    pub fn start_time_iso(&self, key: StreamKey) -> Result<String, StoreError> {
        let ds = self.dataset(key, layout::SAMPLES)?;
        read_str_attr(&ds, layout::ATTR_START_TIME).map_err(self.h5())
    }

    /// Number of samples of a stream.
    pub fn sample_count(&self, key: StreamKey) -> Result<u64, StoreError> {
        Ok(self.dataset(key, layout::SAMPLES)?.size() as u64)
    }

    /// All samples of a stream.
    pub fn samples(&self, key: StreamKey) -> Result<Vec<f32>, StoreError> {
        self.rows(key, layout::SAMPLES)
    }

    /// `len` samples of a stream from index `start` (clipped to what exists).
    pub fn samples_range(
        &self,
        key: StreamKey,
        start: u64,
        len: u64,
    ) -> Result<Vec<f32>, StoreError> {
        let ds = self.dataset(key, layout::SAMPLES)?;
        let size = ds.size() as u64;
        let start = start.min(size) as usize;
        let end = (start as u64 + len).min(size) as usize;
        if start == end {
            return Ok(Vec::new());
        }
        ds.read_slice_1d::<f32, _>(start..end)
            .map(|a| a.to_vec())
            .map_err(self.h5())
    }

    /// The window rows of a stream.
    pub fn windows(&self, key: StreamKey) -> Result<Vec<WindowRow>, StoreError> {
        self.rows(key, layout::WINDOWS)
    }

    /// The gap rows of a stream.
    pub fn gaps(&self, key: StreamKey) -> Result<Vec<GapRow>, StoreError> {
        self.rows(key, layout::GAPS)
    }

    /// The segment rows of a stream.
    pub fn segments(&self, key: StreamKey) -> Result<Vec<SegmentRow>, StoreError> {
        self.rows(key, layout::SEGMENTS)
    }

    /// The peak rows of a stream.
    pub fn peaks(&self, key: StreamKey) -> Result<Vec<PeakRow>, StoreError> {
        let rows: Vec<H5PeakRow> = self.rows(key, layout::PEAKS)?;
        Ok(rows.iter().map(PeakRow::from).collect())
    }

    /// The indicator rows of a stream.
    pub fn indicators(&self, key: StreamKey) -> Result<Vec<IndicatorRow>, StoreError> {
        let rows: Vec<H5IndicatorRow> = self.rows(key, layout::INDICATORS)?;
        Ok(rows.iter().map(IndicatorRow::from).collect())
    }

    /// The `closed` rows: one if the writer closed the file cleanly, none if it died.
    pub fn closed(&self) -> Result<Vec<ClosedRow>, StoreError> {
        let ds = self
            .file
            .dataset(layout::CLOSED_DATASET)
            .map_err(self.h5())?;
        read_all(&ds).map_err(self.h5())
    }

    /// Time of `samples[index]` of a stream by the segment rule: the last segment starting at
    /// or before `index` gives `t0 + round((index - start) * 1e9 / sample_rate_hz)`.
    pub fn time_of_index(&self, key: StreamKey, index: u64) -> Result<i64, StoreError> {
        let rate = self.stream_meta(key)?.sample_rate_hz;
        let segments = self.segments(key)?;
        let seg = segments
            .iter()
            .rev()
            .find(|s| s.start_sample <= index)
            .or(segments.first())
            .ok_or_else(|| StoreError::Layout {
                path: self.path.clone(),
                what: "stream has no segment row".into(),
            })?;
        let k = index.saturating_sub(seg.start_sample);
        Ok(super::time::grid_time(seg.t0_unix_ns, k, rate))
    }

    fn rows<T: H5Type>(&self, key: StreamKey, name: &str) -> Result<Vec<T>, StoreError> {
        let ds = self.dataset(key, name)?;
        read_all(&ds).map_err(self.h5())
    }
}

fn read_all<T: H5Type>(ds: &hdf5::Dataset) -> hdf5::Result<Vec<T>> {
    if ds.size() == 0 {
        return Ok(Vec::new());
    }
    ds.read_raw::<T>()
}

fn read_str_attr(loc: &hdf5::Location, name: &str) -> hdf5::Result<String> {
    let value: VarLenUnicode = loc.attr(name)?.read_scalar()?;
    Ok(value.as_str().to_owned())
}
