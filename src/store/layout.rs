//! The record layout, version 1: every path, dataset and attribute name, the compound row types
//! and the code tables. `docs/hdf5-layout.md` is the prose form of this file; change both
//! together and bump [`LAYOUT_VERSION`] on any change a reader could notice.

use hdf5::types::FixedAscii;
use hdf5::H5Type;

/// Version of the layout written into the file attribute `layout_version`.
pub const LAYOUT_VERSION: u32 = 1;

/// Group holding one subgroup per node.
pub const STREAMS_GROUP: &str = "streams";

/// File attribute: layout version (u32).
pub const ATTR_LAYOUT_VERSION: &str = "layout_version";
/// File attribute: version of the writing tool (string).
pub const ATTR_TOOL_VERSION: &str = "tool_version";
/// File attribute: hex digest of the configuration, supplied by the caller (string).
pub const ATTR_CONFIG_DIGEST: &str = "config_digest";
/// File attribute: creation time, ISO-8601 UTC (string).
pub const ATTR_CREATED: &str = "created";

/// File-level dataset with one row per clean close; empty if the writer died.
pub const CLOSED_DATASET: &str = "closed";

/// Per-stream dataset: the stitched samples (f32).
pub const SAMPLES: &str = "samples";
/// Per-stream dataset: one [`WindowRow`] per reconstructed window.
pub const WINDOWS: &str = "windows";
/// Per-stream dataset: one [`GapRow`] per range of NaN samples.
pub const GAPS: &str = "gaps";
/// Per-stream dataset: one [`SegmentRow`] per segment of the sample grid.
pub const SEGMENTS: &str = "segments";
/// Per-stream dataset: spectral peaks ([`PeakRow`]).
pub const PEAKS: &str = "peaks";
/// Per-stream dataset: condition indicators ([`IndicatorRow`]).
pub const INDICATORS: &str = "indicators";

/// `samples` attribute: sample rate in Hz (f64).
pub const ATTR_SAMPLE_RATE_HZ: &str = "sample_rate_hz";
/// `samples` attribute: time of sample 0, ISO-8601 UTC with microseconds (string).
pub const ATTR_START_TIME: &str = "start_time";
/// `samples` attribute: time of sample 0 in Unix nanoseconds (i64).
pub const ATTR_START_TIME_UNIX_NS: &str = "start_time_unix_ns";
/// `samples` attribute: physical units of the values (string).
pub const ATTR_UNITS: &str = "units";
/// `samples` attribute: the sparsity basis used, or "truth" for simulator ground truth.
pub const ATTR_BASIS: &str = "basis";
/// `samples` attribute: node id (u32).
pub const ATTR_NODE: &str = "node";
/// `samples` attribute: channel number (u16).
pub const ATTR_CHANNEL: &str = "channel";

/// Path of a stream's group: `/streams/<node>/<channel>`, both in decimal.
pub fn stream_group_path(node: u32, channel: u16) -> String {
    format!("/{STREAMS_GROUP}/{node}/{channel}")
}

/// `stop_reason` codes of a [`WindowRow`].
pub mod stop_reason {
    /// Not reported.
    pub const UNKNOWN: u8 = 0;
    /// The relative duality gap fell below its tolerance.
    pub const DUALITY_GAP: u8 = 1;
    /// The relative change of the iterate fell below its tolerance.
    pub const STEP_TOLERANCE: u8 = 2;
    /// The iteration limit was reached before any tolerance was met.
    pub const ITERATION_LIMIT: u8 = 3;
    /// The iterate became non-finite; the window is not trustworthy.
    pub const DIVERGED: u8 = 4;
    /// Solved directly (no iterations), e.g. every sample of the window was sent.
    pub const EXACT: u8 = 5;
}

/// `trust` codes of a [`WindowRow`].
pub mod trust {
    /// Not assessed (written until the trust figures exist).
    pub const UNKNOWN: u8 = 0;
    /// Assessed and usable.
    pub const OK: u8 = 1;
    /// Assessed and doubtful.
    pub const LOW: u8 = 2;
}

/// `source` codes of a [`PeakRow`].
pub mod peak_source {
    /// Found in the direct spectrum.
    pub const DIRECT: u8 = 0;
    /// Found in the envelope spectrum.
    pub const ENVELOPE: u8 = 1;
}

/// `zone` codes of an [`IndicatorRow`] (severity zones A to D).
pub mod zone {
    /// Not classified.
    pub const UNKNOWN: u8 = 0;
    /// Zone A.
    pub const A: u8 = 1;
    /// Zone B.
    pub const B: u8 = 2;
    /// Zone C.
    pub const C: u8 = 3;
    /// Zone D.
    pub const D: u8 = 4;
}

/// One reconstructed window. `start_sample` indexes `samples` of the same file.
#[derive(H5Type, Clone, Copy, Debug, PartialEq)]
#[repr(C)]
pub struct WindowRow {
    /// Window sequence number as sent by the node.
    pub seq: u64,
    /// Capture the window belongs to.
    pub capture_id: u32,
    /// Index into `samples` of the window's first sample (see the writer for the mapping).
    pub start_sample: u64,
    /// Time of the window's first sample, Unix nanoseconds.
    pub t0_unix_ns: i64,
    /// Number of measurements received.
    pub m: u32,
    /// Window length in samples.
    pub n: u32,
    /// Regularisation weight used by the solver.
    pub lambda: f64,
    /// Solver iterations.
    pub iterations: u32,
    /// Relative duality gap at the end of the solve.
    pub duality_gap: f64,
    /// Relative residual `||A s - y|| / ||y||` at the end of the solve.
    pub residual: f64,
    /// Number of non-zero coefficients.
    pub support: u32,
    /// Why the solver stopped ([`stop_reason`] codes).
    pub stop_reason: u8,
    /// Wall time of the solve in microseconds.
    pub solve_time_us: f64,
    /// Cross-validation error; NaN until the trust figures are computed.
    pub cv_error: f64,
    /// Trust class ([`trust`] codes); 0 until assessed.
    pub trust: u8,
}

/// A range of `samples` that holds NaN because no window covers it.
#[derive(H5Type, Clone, Copy, Debug, PartialEq, Eq)]
#[repr(C)]
pub struct GapRow {
    /// Index into `samples` of the first NaN sample.
    pub start_sample: u64,
    /// Number of NaN samples.
    pub length: u64,
    /// Why the samples are missing ([`crate::stream::overlap_add::GapReason`] codes).
    pub reason: u8,
}

/// Start of a segment: a stretch of `samples` on one uninterrupted sample grid.
#[derive(H5Type, Clone, Copy, Debug, PartialEq, Eq)]
#[repr(C)]
pub struct SegmentRow {
    /// Index into `samples` of the segment's first sample.
    pub start_sample: u64,
    /// Capture the segment belongs to.
    pub capture_id: u32,
    /// Time of the segment's first sample, Unix nanoseconds.
    pub t0_unix_ns: i64,
}

pub use crate::features::{IndicatorRow, PeakRow};

/// The on-disk form of a [`PeakRow`] (the one definition of the row's fields is the plain
/// type in `features`, which builds without libhdf5). The conversions destructure every field,
/// so a field added to one and not the other does not compile.
#[derive(H5Type, Clone, Copy, Debug, PartialEq)]
#[repr(C)]
pub(crate) struct H5PeakRow {
    t_unix_ns: i64,
    freq_hz: f64,
    amplitude: f64,
    prominence_db: f64,
    label: FixedAscii<16>,
    order: i32,
    source: u8,
}

impl From<&PeakRow> for H5PeakRow {
    fn from(r: &PeakRow) -> Self {
        let PeakRow {
            t_unix_ns,
            freq_hz,
            amplitude,
            prominence_db,
            label,
            order,
            source,
        } = *r;
        // Non-ASCII bytes were replaced by `label_bytes`; any left become '?'.
        let ascii = label.map(|b| if b.is_ascii() { b } else { b'?' });
        let end = ascii.iter().position(|&b| b == 0).unwrap_or(ascii.len());
        Self {
            t_unix_ns,
            freq_hz,
            amplitude,
            prominence_db,
            label: FixedAscii::from_ascii(&ascii[..end]).unwrap_or_default(),
            order,
            source,
        }
    }
}

impl From<&H5PeakRow> for PeakRow {
    fn from(r: &H5PeakRow) -> Self {
        let H5PeakRow {
            t_unix_ns,
            freq_hz,
            amplitude,
            prominence_db,
            label,
            order,
            source,
        } = *r;
        let mut bytes = [0u8; crate::features::label::LABEL_MAX_LEN];
        for (d, s) in bytes.iter_mut().zip(label.as_bytes()) {
            *d = *s;
        }
        Self {
            t_unix_ns,
            freq_hz,
            amplitude,
            prominence_db,
            label: bytes,
            order,
            source,
        }
    }
}

/// The on-disk form of an [`IndicatorRow`] (see [`H5PeakRow`]).
#[derive(H5Type, Clone, Copy, Debug, PartialEq)]
#[repr(C)]
pub(crate) struct H5IndicatorRow {
    t_unix_ns: i64,
    start_sample: u64,
    len: u64,
    rms: f64,
    peak: f64,
    crest: f64,
    kurtosis: f64,
    velocity_rms_mm_s: f64,
    zone: u8,
    low_trust: u8,
}

impl From<&IndicatorRow> for H5IndicatorRow {
    fn from(r: &IndicatorRow) -> Self {
        let IndicatorRow {
            t_unix_ns,
            start_sample,
            len,
            rms,
            peak,
            crest,
            kurtosis,
            velocity_rms_mm_s,
            zone,
            low_trust,
        } = *r;
        Self {
            t_unix_ns,
            start_sample,
            len,
            rms,
            peak,
            crest,
            kurtosis,
            velocity_rms_mm_s,
            zone,
            low_trust,
        }
    }
}

impl From<&H5IndicatorRow> for IndicatorRow {
    fn from(r: &H5IndicatorRow) -> Self {
        let H5IndicatorRow {
            t_unix_ns,
            start_sample,
            len,
            rms,
            peak,
            crest,
            kurtosis,
            velocity_rms_mm_s,
            zone,
            low_trust,
        } = *r;
        Self {
            t_unix_ns,
            start_sample,
            len,
            rms,
            peak,
            crest,
            kurtosis,
            velocity_rms_mm_s,
            zone,
            low_trust,
        }
    }
}

/// Why a file was closed, the `reason` of a [`ClosedRow`].
pub mod close_reason {
    /// The writer shut down cleanly.
    pub const SHUTDOWN: u8 = 1;
    /// The writer continued in the next file of the series.
    pub const ROTATED: u8 = 2;
}

/// Row of the file-level `closed` dataset, written once on a clean close.
#[derive(H5Type, Clone, Copy, Debug, PartialEq, Eq)]
#[repr(C)]
pub struct ClosedRow {
    /// Time of the close, Unix nanoseconds.
    pub t_unix_ns: i64,
    /// [`close_reason`] code.
    pub reason: u8,
}
