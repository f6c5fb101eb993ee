//! `csgate inspect`: a summary of a record file per stream ([`summarize`], as a table by
//! [`render_table`] or as JSON through serde) and PNG plots ([`plots::write_plots`]).
//!
//! Read-only: the file is opened through [`RecordReader`] (SWMR read), so a record still being
//! written or left by a killed writer can be inspected too. Severity zones and labels come from
//! the record's `indicators` and `peaks` rows as the analytics stage wrote them; they are
//! indicative only ([`CAUTION`]).

pub mod plots;

use crate::features::CAUTION;
use crate::store::layout::{peak_source, trust, zone};
use crate::store::{RecordReader, StoreError, StreamKey};
use serde::Serialize;
use std::collections::BTreeMap;
use std::io::Read;
use std::path::{Path, PathBuf};

/// Errors of `inspect`.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum InspectError {
    /// The file does not exist.
    #[error("{0}: no such file (expected a csgate record file, e.g. rec-...-0001.h5)")]
    NotFound(PathBuf),
    /// The file could not be read.
    #[error("{path}: cannot read: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The OS error.
        #[source]
        source: std::io::Error,
    },
    /// A folder was given.
    #[error("{0}: is a folder; give one record file (.h5) of it, e.g. from its index.json")]
    IsDir(PathBuf),
    /// No HDF5 signature where HDF5 puts it.
    #[error(
        "{0}: not an HDF5 file (no HDF5 signature at byte 0, 512, 1024, ...); expected a \
         csgate record file (.h5) written by `csgate replay` or `csgate serve`"
    )]
    NotHdf5(PathBuf),
    /// An HDF5 file that is not a csgate record (or of another layout version).
    #[error("{path}: HDF5 but not a csgate record: {what}")]
    NotRecord {
        /// The file.
        path: PathBuf,
        /// What is missing or different.
        what: String,
    },
    /// Reading the record failed.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Writing a plot failed.
    #[error("plot {path}: {what}")]
    Plot {
        /// The PNG file.
        path: PathBuf,
        /// What went wrong.
        what: String,
    },
}

/// The summary of one record file (the `--json` document).
#[derive(Debug, Clone, Serialize)]
pub struct RecordSummary {
    /// The file as given.
    pub file: String,
    /// `layout_version` attribute.
    pub layout_version: u32,
    /// csgate version that wrote the file.
    pub tool_version: String,
    /// Creation time, ISO-8601 UTC.
    pub created: String,
    /// Whether the writer closed the file cleanly (a `closed` row exists).
    pub closed_cleanly: bool,
    /// One entry per stream, in (node, channel) order.
    pub streams: Vec<StreamSummary>,
    /// PNG files written by `--plots` (empty without it).
    pub plots: Vec<String>,
    /// [`CAUTION`].
    pub caution: &'static str,
}

/// The summary of one stream.
#[derive(Debug, Clone, Serialize)]
pub struct StreamSummary {
    /// Node id.
    pub node: u32,
    /// Channel number.
    pub channel: u16,
    /// Physical units of the samples.
    pub units: String,
    /// Sparsity basis of the reconstruction.
    pub basis: String,
    /// Sample rate, Hz.
    pub sample_rate_hz: f64,
    /// Time of the first sample, ISO-8601 UTC.
    pub start_time: String,
    /// Samples in the file (NaN-filled gaps included).
    pub samples: u64,
    /// From the first sample to the end of the last, s (long unfilled gaps included).
    pub duration_s: f64,
    /// Segment rows (1 + capture restarts + long gaps).
    pub segments: usize,
    /// Gap rows (runs of NaN).
    pub gaps: usize,
    /// NaN samples in all gap rows.
    pub gap_samples: u64,
    /// Window and trust figures.
    pub windows: WindowSummary,
    /// Severity zones from the `indicators` rows.
    pub severity: SeveritySummary,
    /// Labelled peaks, strongest first: up to [`TOP_PEAKS`] per spectrum, direct first.
    pub top_peaks: Vec<PeakSummary>,
}

/// Labelled peaks listed per spectrum (direct, envelope) in a [`StreamSummary`].
pub const TOP_PEAKS: usize = 4;

/// The windows of a stream.
#[derive(Debug, Clone, Serialize)]
pub struct WindowSummary {
    /// Window rows.
    pub count: usize,
    /// Windows whose trust was assessed (`trust` 1 or 2).
    pub assessed: usize,
    /// Windows with trust ok.
    pub trust_ok: usize,
    /// Windows with low trust.
    pub trust_low: usize,
    /// Mean `cv_error` over the assessed windows (`null` when none).
    pub mean_cv_error: Option<f64>,
    /// Largest `cv_error` (`null` when none).
    pub worst_cv_error: Option<f64>,
    /// `seq` of the window with the largest `cv_error`.
    pub worst_cv_error_seq: Option<u64>,
    /// Mean relative residual of the solves.
    pub mean_residual: Option<f64>,
    /// Mean measurements per window.
    pub mean_m: Option<f64>,
    /// Window length (of the first window).
    pub n: Option<u32>,
}

/// Severity zones of a stream (indicative only).
#[derive(Debug, Clone, Serialize)]
pub struct SeveritySummary {
    /// Analysed blocks (`indicators` rows).
    pub blocks: usize,
    /// Blocks per zone: unknown, A, B, C, D.
    pub blocks_per_zone: [usize; 5],
    /// Worst zone of any block: `A`..`D`, `unknown` (no classified block), `none` (no block).
    pub worst_zone: String,
    /// Zone of the last block.
    pub last_zone: String,
    /// Largest velocity RMS of a block, mm/s (`null` when not computed).
    pub max_velocity_rms_mm_s: Option<f64>,
    /// Largest block RMS, stream units.
    pub max_rms: Option<f64>,
    /// Blocks overlapping a low-trust window.
    pub low_trust_blocks: usize,
}

/// One labelled peak line aggregated over the blocks of a stream.
#[derive(Debug, Clone, Serialize)]
pub struct PeakSummary {
    /// Label (`1X`, `BPFO`, `GMF+1`, ...).
    pub label: String,
    /// `direct` or `envelope`.
    pub source: &'static str,
    /// Blocks in which the label was found.
    pub blocks: usize,
    /// Mean frequency, Hz.
    pub freq_hz: f64,
    /// Mean amplitude, stream units (of the envelope for `envelope`).
    pub mean_amplitude: f64,
    /// Largest amplitude.
    pub max_amplitude: f64,
}

/// The zone letter of an `indicators` zone code.
pub fn zone_name(code: u8) -> &'static str {
    match code {
        zone::A => "A",
        zone::B => "B",
        zone::C => "C",
        zone::D => "D",
        _ => "unknown",
    }
}

/// The 8-byte HDF5 file signature (HDF5 File Format Specification, section "Superblock").
const HDF5_SIGNATURE: [u8; 8] = [0x89, b'H', b'D', b'F', b'\r', b'\n', 0x1a, b'\n'];

/// Checks that `path` exists and carries the HDF5 signature at 0 or a power of two from 512
/// (where the specification allows the superblock), before libhdf5 sees it, so that the user
/// gets a plain message rather than the library's error stack.
fn check_hdf5(path: &Path) -> Result<(), InspectError> {
    let io = |source| InspectError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut file = match std::fs::File::open(path) {
        Ok(f) => f,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(InspectError::NotFound(path.to_path_buf()))
        }
        Err(e) => return Err(io(e)),
    };
    let meta = file.metadata().map_err(io)?;
    if meta.is_dir() {
        return Err(InspectError::IsDir(path.to_path_buf()));
    }
    let len = meta.len();
    let mut offset = 0u64;
    while offset + 8 <= len {
        use std::io::Seek;
        file.seek(std::io::SeekFrom::Start(offset)).map_err(io)?;
        let mut sig = [0u8; 8];
        file.read_exact(&mut sig).map_err(io)?;
        if sig == HDF5_SIGNATURE {
            return Ok(());
        }
        offset = if offset == 0 { 512 } else { offset * 2 };
    }
    Err(InspectError::NotHdf5(path.to_path_buf()))
}

/// Opens a record for inspection with the errors of [`InspectError`].
pub fn open_record(path: &Path) -> Result<RecordReader, InspectError> {
    check_hdf5(path)?;
    let not_record = |what: String| InspectError::NotRecord {
        path: path.to_path_buf(),
        what,
    };
    let reader = RecordReader::open(path).map_err(|e| match e {
        StoreError::Layout { what, .. } => not_record(what),
        other => not_record(format!(
            "no readable `layout_version` attribute ({})",
            first_line(&other.to_string())
        )),
    })?;
    reader
        .streams()
        .map_err(|_| not_record("no `/streams` group".into()))?;
    Ok(reader)
}

fn first_line(s: &str) -> &str {
    s.lines().next().unwrap_or("")
}

/// Summarizes the record file `path`.
pub fn summarize(path: &Path) -> Result<RecordSummary, InspectError> {
    let reader = open_record(path)?;
    let attrs = reader.attrs()?;
    let closed_cleanly = !reader.closed()?.is_empty();
    let mut streams = Vec::new();
    for key in reader.streams()? {
        streams.push(summarize_stream(&reader, key)?);
    }
    Ok(RecordSummary {
        file: path.display().to_string(),
        layout_version: attrs.layout_version,
        tool_version: attrs.tool_version,
        created: attrs.created,
        closed_cleanly,
        streams,
        plots: Vec::new(),
        caution: CAUTION,
    })
}

fn mean(values: impl Iterator<Item = f64>) -> Option<f64> {
    let (sum, count) = values.fold((0.0, 0usize), |(s, c), v| (s + v, c + 1));
    (count > 0).then(|| sum / count as f64)
}

fn max_finite(values: impl Iterator<Item = f64>) -> Option<f64> {
    values.filter(|v| v.is_finite()).reduce(f64::max)
}

fn summarize_stream(reader: &RecordReader, key: StreamKey) -> Result<StreamSummary, InspectError> {
    let meta = reader.stream_meta(key)?;
    let samples = reader.sample_count(key)?;
    let segments = reader.segments(key)?;
    let gaps = reader.gaps(key)?;
    let windows = reader.windows(key)?;
    let indicators = reader.indicators(key)?;
    let peaks = reader.peaks(key)?;
    let rate = meta.sample_rate_hz;

    let duration_s = if samples > 0 {
        let first = reader.time_of_index(key, 0)?;
        let last = reader.time_of_index(key, samples - 1)?;
        (last - first) as f64 * 1e-9 + 1.0 / rate
    } else {
        0.0
    };

    let assessed: Vec<_> = windows
        .iter()
        .filter(|w| w.trust != trust::UNKNOWN && w.cv_error.is_finite())
        .collect();
    let worst = assessed
        .iter()
        .max_by(|a, b| a.cv_error.total_cmp(&b.cv_error));
    let window_summary = WindowSummary {
        count: windows.len(),
        assessed: assessed.len(),
        trust_ok: windows.iter().filter(|w| w.trust == trust::OK).count(),
        trust_low: windows.iter().filter(|w| w.trust == trust::LOW).count(),
        mean_cv_error: mean(assessed.iter().map(|w| w.cv_error)),
        worst_cv_error: worst.map(|w| w.cv_error),
        worst_cv_error_seq: worst.map(|w| w.seq),
        mean_residual: mean(windows.iter().map(|w| w.residual).filter(|r| r.is_finite())),
        mean_m: mean(windows.iter().map(|w| f64::from(w.m))),
        n: windows.first().map(|w| w.n),
    };

    let mut blocks_per_zone = [0usize; 5];
    for row in &indicators {
        blocks_per_zone[usize::from(row.zone.min(4))] += 1;
    }
    let worst_zone = if indicators.is_empty() {
        "none"
    } else {
        zone_name(indicators.iter().map(|r| r.zone.min(4)).max().unwrap_or(0))
    };
    let severity = SeveritySummary {
        blocks: indicators.len(),
        blocks_per_zone,
        worst_zone: worst_zone.to_string(),
        last_zone: indicators
            .last()
            .map_or("none", |r| zone_name(r.zone))
            .to_string(),
        max_velocity_rms_mm_s: max_finite(indicators.iter().map(|r| r.velocity_rms_mm_s)),
        max_rms: max_finite(indicators.iter().map(|r| r.rms)),
        low_trust_blocks: indicators.iter().filter(|r| r.low_trust != 0).count(),
    };

    Ok(StreamSummary {
        node: key.node,
        channel: key.channel,
        units: meta.units,
        basis: meta.basis,
        sample_rate_hz: rate,
        start_time: reader.start_time_iso(key)?,
        samples,
        duration_s,
        segments: segments.len(),
        gaps: gaps.len(),
        gap_samples: gaps.iter().map(|g| g.length).sum(),
        windows: window_summary,
        severity,
        top_peaks: top_peaks(&peaks),
    })
}

/// Labelled peaks grouped by (spectrum, label): blocks found, mean frequency and amplitude;
/// per spectrum the [`TOP_PEAKS`] of largest mean amplitude.
fn top_peaks(peaks: &[crate::store::PeakRow]) -> Vec<PeakSummary> {
    // (source, label) -> (blocks, sum f, sum a, max a)
    let mut groups: BTreeMap<(u8, String), (usize, f64, f64, f64)> = BTreeMap::new();
    for p in peaks {
        let label = p.label_str();
        if label.is_empty() || !p.freq_hz.is_finite() || !p.amplitude.is_finite() {
            continue;
        }
        let g =
            groups
                .entry((p.source, label.to_string()))
                .or_insert((0, 0.0, 0.0, f64::NEG_INFINITY));
        g.0 += 1;
        g.1 += p.freq_hz;
        g.2 += p.amplitude;
        g.3 = g.3.max(p.amplitude);
    }
    let mut out = Vec::new();
    for source in [peak_source::DIRECT, peak_source::ENVELOPE] {
        let mut list: Vec<PeakSummary> = groups
            .iter()
            .filter(|((s, _), _)| *s == source)
            .map(|((_, label), &(n, f, a, max))| PeakSummary {
                label: label.clone(),
                source: if source == peak_source::DIRECT {
                    "direct"
                } else {
                    "envelope"
                },
                blocks: n,
                freq_hz: f / n as f64,
                mean_amplitude: a / n as f64,
                max_amplitude: max,
            })
            .collect();
        list.sort_by(|a, b| b.mean_amplitude.total_cmp(&a.mean_amplitude));
        list.truncate(TOP_PEAKS);
        out.extend(list);
    }
    out
}

fn opt(v: Option<f64>, digits: usize) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.digits$}"))
}

/// The human-readable form of a summary: one two-column table per stream, then the caution.
pub fn render_table(s: &RecordSummary) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "record {}  (layout {}, csgate {}, created {}, {})",
        s.file,
        s.layout_version,
        s.tool_version,
        s.created,
        if s.closed_cleanly {
            "closed cleanly"
        } else {
            "not closed: writer still running or died"
        }
    );
    for st in &s.streams {
        let w = &st.windows;
        let sev = &st.severity;
        let mut rows: Vec<(String, String)> = vec![
            ("start".into(), st.start_time.clone()),
            (
                "duration".into(),
                format!("{:.3} s ({} samples)", st.duration_s, st.samples),
            ),
            ("sample rate".into(), format!("{} Hz", st.sample_rate_hz)),
            (
                "units / basis".into(),
                format!("{} / {}", st.units, st.basis),
            ),
            (
                "gaps".into(),
                format!(
                    "{} ({} samples), {} segment(s)",
                    st.gaps, st.gap_samples, st.segments
                ),
            ),
            (
                "windows".into(),
                format!(
                    "{} (n {}, mean m {})",
                    w.count,
                    w.n.map_or("-".into(), |n| n.to_string()),
                    opt(w.mean_m, 1)
                ),
            ),
            (
                "trust".into(),
                format!(
                    "{} ok, {} low, {} not assessed",
                    w.trust_ok,
                    w.trust_low,
                    w.count - w.trust_ok - w.trust_low
                ),
            ),
            (
                "cv_error".into(),
                format!(
                    "mean {}, worst {}{}",
                    opt(w.mean_cv_error, 4),
                    opt(w.worst_cv_error, 4),
                    w.worst_cv_error_seq
                        .map_or(String::new(), |q| format!(" (window seq {q})"))
                ),
            ),
            (
                "severity zone".into(),
                format!(
                    "worst {}, last {} over {} blocks (A {} B {} C {} D {} unknown {})",
                    sev.worst_zone,
                    sev.last_zone,
                    sev.blocks,
                    sev.blocks_per_zone[1],
                    sev.blocks_per_zone[2],
                    sev.blocks_per_zone[3],
                    sev.blocks_per_zone[4],
                    sev.blocks_per_zone[0]
                ),
            ),
            (
                "velocity RMS".into(),
                format!("max {} mm/s", opt(sev.max_velocity_rms_mm_s, 3)),
            ),
            (
                "RMS".into(),
                format!("max {} {}", opt(sev.max_rms, 4), st.units),
            ),
        ];
        if st.top_peaks.is_empty() {
            rows.push(("labelled peaks".into(), "none".into()));
        }
        for (i, p) in st.top_peaks.iter().enumerate() {
            rows.push((
                if i == 0 {
                    "labelled peaks".into()
                } else {
                    String::new()
                },
                format!(
                    "{:<8} {:<9} {:>9.2} Hz  mean {:.4} {}  in {} block(s)",
                    p.label, p.source, p.freq_hz, p.mean_amplitude, st.units, p.blocks
                ),
            ));
        }
        let width = rows.iter().map(|(k, _)| k.len()).max().unwrap_or(0);
        let _ = writeln!(out, "\nstream node {} channel {}", st.node, st.channel);
        for (k, v) in rows {
            let _ = writeln!(out, "  {k:<width$}  {v}");
        }
    }
    if s.streams.is_empty() {
        let _ = writeln!(out, "\n(no streams)");
    }
    let _ = writeln!(out, "\n{CAUTION}");
    out
}
