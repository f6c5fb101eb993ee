//! Labels for detected peaks: which machine frequency (shaft harmonic, bearing fault
//! frequency, gear mesh or sideband) a peak lies on, its order and its deviation.
//!
//! # Label scheme (ASCII, at most 16 bytes)
//! - shaft harmonics `1X`, `2X`, ... (order = harmonic number);
//! - bearing lines `BPFO`, `2xBPFO`, `BPFI`, `BSF`, `2xBSF`, `FTF`, ... (order = harmonic);
//! - gear mesh `GMF`, `2xGMF`, ... (order = harmonic) and its sidebands `GMF-1`, `GMF+2`,
//!   `2xGMF-1` at `n GMF ± k f_shaft` (order = signed sideband index `k`);
//! - with more than one bearing or gear, `#i` (1-based) follows: `2xBPFO#2`.
//!
//! Labels are indicative: they say a peak sits where a kinematic frequency falls, not that the
//! component is faulty (see [`super::CAUTION`]).

use super::kinematics::Kinematics;
use super::peaks::SpectralPeak;
use serde::{Deserialize, Serialize};

/// Longest label, in ASCII bytes (the record file's fixed string width).
pub const LABEL_MAX_LEN: usize = 16;

/// Parameters of labelling.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LabelConfig {
    /// Relative tolerance. ±2%: slip puts bearing lines 1-2% off their kinematic values
    /// (Randall & Antoni 2011, memory), and ±2% search windows are usual practice.
    pub tolerance_frac: f64,
    /// Minimum absolute tolerance in bins of the spectrum searched: below about one bin the
    /// relative tolerance is finer than the spectrum can resolve.
    pub min_tolerance_bins: f64,
    /// Highest shaft harmonic labelled.
    pub max_shaft_harmonic: u32,
    /// Highest harmonic of each bearing frequency labelled.
    pub max_bearing_harmonic: u32,
    /// Highest GMF harmonic labelled.
    pub max_gmf_harmonic: u32,
    /// Sidebands `±1..=k` labelled around each GMF harmonic.
    pub max_sideband: u32,
}

impl Default for LabelConfig {
    fn default() -> Self {
        Self {
            tolerance_frac: 0.02,
            min_tolerance_bins: 1.0,
            max_shaft_harmonic: 10,
            max_bearing_harmonic: 5,
            max_gmf_harmonic: 3,
            max_sideband: 3,
        }
    }
}

/// What kind of machine frequency a target is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum TargetKind {
    /// Shaft harmonic.
    Shaft,
    /// Bearing outer race.
    Bpfo,
    /// Bearing inner race.
    Bpfi,
    /// Ball spin.
    Bsf,
    /// Cage.
    Ftf,
    /// Gear mesh harmonic.
    Gmf,
    /// Gear mesh sideband.
    GmfSideband,
}

/// A machine frequency a peak can be labelled with.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Target {
    /// Label (see the module docs).
    pub label: String,
    /// Frequency, Hz.
    pub freq_hz: f64,
    /// Harmonic number, or the signed sideband index for sidebands.
    pub order: i32,
    /// Kind.
    pub kind: TargetKind,
}

/// The label given to one peak.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PeakLabel {
    /// Label (see the module docs).
    pub label: String,
    /// Harmonic number or signed sideband index.
    pub order: i32,
    /// Kind of target.
    pub kind: TargetKind,
    /// Kinematic frequency of the target, Hz.
    pub target_hz: f64,
    /// Peak frequency minus target frequency, Hz.
    pub deviation_hz: f64,
    /// Deviation relative to the target, percent.
    pub deviation_pct: f64,
}

/// A detected peak with its label, if it lies on a machine frequency.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LabelledPeak {
    /// The peak.
    #[serde(flatten)]
    pub peak: SpectralPeak,
    /// Its label.
    pub label: Option<PeakLabel>,
}

fn harmonic_label(n: u32, base: &str) -> String {
    if n == 1 {
        base.to_string()
    } else {
        format!("{n}x{base}")
    }
}

fn suffix(i: usize, count: usize) -> String {
    if count > 1 {
        format!("#{}", i + 1)
    } else {
        String::new()
    }
}

/// Every machine frequency of `kinematics` at shaft rate `shaft_hz` up to the harmonics in
/// `config`, below `max_hz`.
pub fn targets(
    kinematics: &Kinematics,
    shaft_hz: f64,
    max_hz: f64,
    config: &LabelConfig,
) -> Vec<Target> {
    let mut out = Vec::new();
    let mut push = |label: String, freq_hz: f64, order: i32, kind: TargetKind| {
        if freq_hz > 0.0 && freq_hz <= max_hz {
            debug_assert!(label.len() <= LABEL_MAX_LEN && label.is_ascii());
            out.push(Target {
                label,
                freq_hz,
                order,
                kind,
            });
        }
    };
    for n in 1..=config.max_shaft_harmonic {
        push(
            format!("{n}X"),
            n as f64 * shaft_hz,
            n as i32,
            TargetKind::Shaft,
        );
    }
    let nb = kinematics.bearings.len();
    for (i, b) in kinematics.bearings.iter().enumerate() {
        let f = b.frequencies(shaft_hz);
        let sfx = suffix(i, nb);
        for n in 1..=config.max_bearing_harmonic {
            let m = n as f64;
            for (base, hz, kind) in [
                ("BPFO", f.bpfo_hz, TargetKind::Bpfo),
                ("BPFI", f.bpfi_hz, TargetKind::Bpfi),
                ("BSF", f.bsf_hz, TargetKind::Bsf),
                ("FTF", f.ftf_hz, TargetKind::Ftf),
            ] {
                push(
                    format!("{}{sfx}", harmonic_label(n, base)),
                    m * hz,
                    n as i32,
                    kind,
                );
            }
        }
    }
    let ng = kinematics.gears.len();
    for (i, g) in kinematics.gears.iter().enumerate() {
        let gmf = g.frequencies(shaft_hz).gmf_hz;
        let sfx = suffix(i, ng);
        for n in 1..=config.max_gmf_harmonic {
            let centre = n as f64 * gmf;
            let base = harmonic_label(n, "GMF");
            push(format!("{base}{sfx}"), centre, n as i32, TargetKind::Gmf);
            for k in 1..=config.max_sideband {
                let dk = k as f64 * shaft_hz;
                push(
                    format!("{base}-{k}{sfx}"),
                    centre - dk,
                    -(k as i32),
                    TargetKind::GmfSideband,
                );
                push(
                    format!("{base}+{k}{sfx}"),
                    centre + dk,
                    k as i32,
                    TargetKind::GmfSideband,
                );
            }
        }
    }
    out
}

/// Labels each peak with the target nearest to it, measured in units of each target's
/// tolerance `max(tolerance_frac f_target, min_tolerance_bins bin_hz)`; a peak outside every
/// tolerance stays unlabelled. Where targets overlap (say 4X and BPFO on a 9-ball bearing),
/// the nearer one relative to its tolerance wins.
pub fn label_peaks(
    peaks: Vec<SpectralPeak>,
    targets: &[Target],
    bin_hz: f64,
    config: &LabelConfig,
) -> Vec<LabelledPeak> {
    let min_tol = config.min_tolerance_bins * bin_hz;
    peaks
        .into_iter()
        .map(|peak| {
            let best = targets
                .iter()
                .filter_map(|t| {
                    let tol = (config.tolerance_frac * t.freq_hz).max(min_tol);
                    let dev = peak.freq_hz - t.freq_hz;
                    (dev.abs() <= tol).then_some((dev.abs() / tol, t, dev))
                })
                .min_by(|a, b| a.0.total_cmp(&b.0));
            let label = best.map(|(_, t, dev)| PeakLabel {
                label: t.label.clone(),
                order: t.order,
                kind: t.kind,
                target_hz: t.freq_hz,
                deviation_hz: dev,
                deviation_pct: 100.0 * dev / t.freq_hz,
            });
            LabelledPeak { peak, label }
        })
        .collect()
}

/// A label as the fixed 16-byte ASCII field of the record file (NUL padded; non-ASCII bytes
/// become `?`, longer labels are cut).
pub fn label_bytes(label: &str) -> [u8; LABEL_MAX_LEN] {
    let mut out = [0u8; LABEL_MAX_LEN];
    for (dst, b) in out.iter_mut().zip(label.bytes()) {
        *dst = if b.is_ascii() { b } else { b'?' };
    }
    out
}
