//! Condition-monitoring features of a block of a continuous record: averaged spectra, peaks,
//! machine fault frequencies and labels, envelope analysis, overall indicators and an
//! indicative severity zone.
//!
//! Pure computation, no I/O: the pipeline calls [`FeatureExtractor::analyze`] (or the
//! one-shot [`analyze_block`]) per block of the stitched record (say every second) and hands the
//! [`BlockFeatures`] to the sinks, which write [`PeakRow`]s and [`IndicatorRow`]s to the record
//! file and [`FeatureEvent`]s as JSON lines.
//!
//! ```text
//! block ─┬─► spectrum (Welch, Hann) ─► peaks ─► label (1X, BPFO, GMF±k ...) ─► direct peaks
//!        ├─► rfft(block) ─┬─► velocity RMS (band, ÷ j2πf) ─► severity zone
//!        │                └─► band-pass + analytic signal ─► envelope ─► Welch ─► peaks ─► label
//!        └─► RMS, peak, crest factor, kurtosis
//! ```
//!
//! ## Module map
//! - [`spectrum`]: periodic Hann, window figures, the Welch plan (scipy's scaling).
//! - [`peaks`]: prominence (scipy's definition), noise floor, interpolation, harmonic families.
//! - [`kinematics`]: shaft speed, bearing and gear configuration, fault frequencies.
//! - [`label`]: machine-frequency targets and peak labels.
//! - [`envelope`]: spectral-kurtosis band choice, envelope by the analytic signal.
//! - [`indicators`]: RMS, peak, crest factor, kurtosis, velocity RMS.
//! - [`severity`]: zone boundary tables and the zone.
//!
//! Zones and labels are indicative; every output that carries them carries [`CAUTION`].

pub mod envelope;
pub mod indicators;
pub mod kinematics;
pub mod label;
pub mod peaks;
pub mod severity;
pub mod spectrum;

use envelope::{
    candidate_bands, select_band, EnvelopeBand, EnvelopeConfig, EnvelopePlan, SelectedBand,
    SpectralKurtosisPlan,
};
use indicators::{time_indicators, velocity_rms_from_spectrum, AccelUnit, Indicators};
use kinematics::Kinematics;
use label::{label_bytes, label_peaks, targets, LabelConfig, LabelledPeak, LABEL_MAX_LEN};
use num_complex::Complex;
use peaks::{detect_peaks, dominant_harmonic_family, PeakConfig};
use realfft::{RealFftPlanner, RealToComplex};
use rustfft::FftPlanner;
use serde::{Deserialize, Serialize};
use severity::{SeverityConfig, Zone};
use spectrum::{Spectrum, WelchConfig, WelchPlan};
use std::sync::Arc;

/// The caution every output carrying a severity zone or a fault label includes.
pub const CAUTION: &str = "Indicative only: severity zones and fault labels are computed from \
default or configured tables and kinematic frequencies; they do not replace a qualified \
analyst, the machine maker's limits, or local codes.";

/// Errors of feature extraction.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum FeatureError {
    /// The block is shorter than the analysis needs.
    #[error("block too short: need at least {needed} samples, got {got}")]
    TooShort {
        /// Samples needed.
        needed: usize,
        /// Samples given.
        got: usize,
    },
    /// A parameter is out of range.
    #[error("invalid feature configuration: {0}")]
    InvalidConfig(String),
}

/// Everything feature extraction can be told (serde; every field has a documented default).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct FeatureConfig {
    /// Direct spectrum.
    pub welch: WelchConfig,
    /// Peak detection, direct and envelope spectra.
    pub peaks: PeakConfig,
    /// Labelling.
    pub label: LabelConfig,
    /// Envelope analysis.
    pub envelope: EnvelopeConfig,
    /// Unit of the samples (acceleration).
    pub accel_unit: AccelUnit,
    /// Band of the velocity RMS, Hz. 10 Hz-1 kHz is the usual broadband severity band for
    /// machines above 600 r/min (ISO 10816-1, from memory); 2 Hz for slower ones.
    pub velocity_band_hz: (f64, f64),
    /// Severity zone boundaries.
    pub severity: SeverityConfig,
    /// Harmonics searched when estimating the shaft speed.
    pub shaft_max_harmonic: u32,
    /// Members a harmonic family needs to count as the shaft's (1X plus at least one more).
    pub shaft_min_members: usize,
}

impl Default for FeatureConfig {
    fn default() -> Self {
        Self {
            welch: WelchConfig::default(),
            peaks: PeakConfig::default(),
            label: LabelConfig::default(),
            envelope: EnvelopeConfig::default(),
            accel_unit: AccelUnit::default(),
            velocity_band_hz: (10.0, 1000.0),
            severity: SeverityConfig::default(),
            shaft_max_harmonic: 5,
            shaft_min_members: 2,
        }
    }
}

/// Envelope results of a block.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EnvelopeFeatures {
    /// Band the envelope was taken in.
    pub band: SelectedBand,
    /// Bin spacing of the envelope spectrum, Hz.
    pub bin_hz: f64,
    /// Labelled peaks of the envelope spectrum, largest first.
    pub peaks: Vec<LabelledPeak>,
}

/// Features of one block.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BlockFeatures {
    /// Sample rate, Hz.
    pub sample_rate_hz: f64,
    /// Samples in the block.
    pub len: usize,
    /// Shaft rate used for labels, Hz (`None`: not given and not found).
    pub shaft_hz: Option<f64>,
    /// Whether `shaft_hz` was estimated from the spectrum.
    pub shaft_estimated: bool,
    /// Overall indicators.
    pub indicators: Indicators,
    /// Indicative severity zone from the velocity RMS.
    pub zone: Zone,
    /// Bin spacing of the direct spectrum, Hz.
    pub bin_hz: f64,
    /// Labelled peaks of the direct spectrum, largest first.
    pub peaks: Vec<LabelledPeak>,
    /// Envelope analysis, when enabled.
    pub envelope: Option<EnvelopeFeatures>,
    /// [`CAUTION`].
    pub caution: &'static str,
}

/// Which spectrum a peak row comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum PeakSource {
    /// The direct spectrum (code 0).
    Direct = 0,
    /// The envelope spectrum (code 1).
    Envelope = 1,
}

/// One peak as the record file stores it: the one definition of a `peaks` row. The record
/// store writes it through an HDF5 twin of the same fields (`store::layout`), so this type
/// builds without libhdf5.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PeakRow {
    /// Block time, ns since the Unix epoch.
    pub t_unix_ns: i64,
    /// Refined frequency, Hz.
    pub freq_hz: f64,
    /// Refined peak amplitude, stream units.
    pub amplitude: f64,
    /// Prominence, dB.
    pub prominence_db: f64,
    /// Label, ASCII, NUL padded (all NUL when unlabelled).
    pub label: [u8; LABEL_MAX_LEN],
    /// Harmonic number or signed sideband index (0 when unlabelled).
    pub order: i32,
    /// 0 direct, 1 envelope.
    pub source: u8,
}

/// The overall indicators of one block as the record file stores them: the one definition of
/// an `indicators` row (see [`PeakRow`] for how the store writes it).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct IndicatorRow {
    /// Block time, ns since the Unix epoch.
    pub t_unix_ns: i64,
    /// First sample of the block in the record.
    pub start_sample: u64,
    /// Samples in the block.
    pub len: u64,
    /// RMS, stream units.
    pub rms: f64,
    /// Peak, stream units.
    pub peak: f64,
    /// Crest factor.
    pub crest: f64,
    /// Kurtosis (Pearson, normal = 3).
    pub kurtosis: f64,
    /// Velocity RMS in the band, mm/s (NaN when unknown).
    pub velocity_rms_mm_s: f64,
    /// 0 unknown, 1 A, 2 B, 3 C, 4 D.
    pub zone: u8,
    /// 1 when the block's reconstruction is not trusted (set by the caller).
    pub low_trust: u8,
}

impl PeakRow {
    /// The label as the fixed 16-byte ASCII field, or `None` if it is not ASCII or longer
    /// than 16 bytes.
    pub fn label_from_str(label: &str) -> Option<[u8; LABEL_MAX_LEN]> {
        (label.is_ascii() && label.len() <= LABEL_MAX_LEN).then(|| label_bytes(label))
    }

    /// The label as text (up to the first NUL; empty when unlabelled).
    pub fn label_str(&self) -> &str {
        let end = self
            .label
            .iter()
            .position(|&b| b == 0)
            .unwrap_or(LABEL_MAX_LEN);
        std::str::from_utf8(&self.label[..end]).unwrap_or("")
    }
}

impl BlockFeatures {
    /// The peak rows of this block, direct peaks first.
    pub fn peak_rows(&self, t_unix_ns: i64) -> Vec<PeakRow> {
        let row = |p: &LabelledPeak, source: PeakSource| PeakRow {
            t_unix_ns,
            freq_hz: p.peak.freq_hz,
            amplitude: p.peak.amplitude,
            prominence_db: p.peak.prominence_db,
            label: p
                .label
                .as_ref()
                .map_or([0; LABEL_MAX_LEN], |l| label_bytes(&l.label)),
            order: p.label.as_ref().map_or(0, |l| l.order),
            source: source as u8,
        };
        let direct = self.peaks.iter().map(|p| row(p, PeakSource::Direct));
        let env = self
            .envelope
            .iter()
            .flat_map(|e| e.peaks.iter().map(|p| row(p, PeakSource::Envelope)));
        direct.chain(env).collect()
    }

    /// The indicator row of this block.
    pub fn indicator_row(
        &self,
        t_unix_ns: i64,
        start_sample: u64,
        low_trust: bool,
    ) -> IndicatorRow {
        let i = &self.indicators;
        IndicatorRow {
            t_unix_ns,
            start_sample,
            len: self.len as u64,
            rms: i.rms,
            peak: i.peak,
            crest: i.crest_factor,
            kurtosis: i.kurtosis,
            velocity_rms_mm_s: i.velocity_rms_mm_s.unwrap_or(f64::NAN),
            zone: self.zone.code(),
            low_trust: u8::from(low_trust),
        }
    }

    /// The JSON-lines event of this block for stream `(node, channel)`, with at most `top`
    /// peaks of each spectrum (labelled ones first, then by amplitude).
    pub fn event(
        &self,
        node: u32,
        channel: u16,
        t_unix_ns: i64,
        start_sample: u64,
        top: usize,
    ) -> FeatureEvent {
        let pick = |peaks: &[LabelledPeak]| {
            let mut v: Vec<EventPeak> = peaks
                .iter()
                .map(|p| EventPeak {
                    freq_hz: p.peak.freq_hz,
                    amplitude: p.peak.amplitude,
                    prominence_db: p.peak.prominence_db,
                    label: p.label.as_ref().map(|l| l.label.clone()),
                    order: p.label.as_ref().map(|l| l.order),
                    deviation_pct: p.label.as_ref().map(|l| l.deviation_pct),
                })
                .collect();
            // Stable sort: labelled first, amplitude order kept within each group.
            v.sort_by_key(|p| p.label.is_none());
            v.truncate(top);
            v
        };
        FeatureEvent {
            node,
            channel,
            t_unix_ns,
            start_sample,
            len: self.len as u64,
            shaft_hz: self.shaft_hz,
            indicators: self.indicators,
            zone: self.zone,
            peaks: pick(&self.peaks),
            envelope_peaks: self
                .envelope
                .as_ref()
                .map_or_else(Vec::new, |e| pick(&e.peaks)),
            trust: None,
            caution: CAUTION,
            version: EVENT_VERSION,
            units: String::new(),
            envelope_band_hz: self
                .envelope
                .as_ref()
                .map(|e| (e.band.low_hz, e.band.high_hz)),
        }
    }
}

/// A peak as a [`FeatureEvent`] lists it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EventPeak {
    /// Frequency, Hz.
    pub freq_hz: f64,
    /// Peak amplitude, stream units.
    pub amplitude: f64,
    /// Prominence, dB.
    pub prominence_db: f64,
    /// Label, if any.
    pub label: Option<String>,
    /// Order of the label.
    pub order: Option<i32>,
    /// Deviation from the labelled frequency, percent.
    pub deviation_pct: Option<f64>,
}

/// Version of the [`FeatureEvent`] JSON format (`docs/events.md`); bumped on any change a
/// reader could notice.
pub const EVENT_VERSION: u32 = 1;

/// Reconstruction trust of the windows behind one block.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct BlockTrust {
    /// Whether any window overlapping the block was low trust (the `low_trust` of the
    /// block's indicator row).
    pub low_trust: bool,
    /// Windows overlapping the block.
    pub windows: u32,
    /// Of those, windows assessed as low trust.
    pub low_trust_windows: u32,
    /// Of those, windows with no assessment (trust off, or too few samples).
    pub unassessed_windows: u32,
    /// Largest cross-validation error among them (`None` when none was assessed).
    pub max_cv_error: Option<f64>,
}

/// One JSON-lines object per block per stream.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureEvent {
    /// Format version, [`EVENT_VERSION`].
    pub version: u32,
    /// Node id of the stream.
    pub node: u32,
    /// Channel of the stream on its node.
    pub channel: u16,
    /// Block time, ns since the Unix epoch.
    pub t_unix_ns: i64,
    /// First sample of the block in the record.
    pub start_sample: u64,
    /// Samples in the block.
    pub len: u64,
    /// Units of the stream's samples (amplitudes and RMS are in these units); empty when not
    /// known.
    pub units: String,
    /// Shaft rate used, Hz.
    pub shaft_hz: Option<f64>,
    /// Band of the envelope analysis, Hz (`None` without one).
    pub envelope_band_hz: Option<(f64, f64)>,
    /// Overall indicators.
    pub indicators: Indicators,
    /// Indicative severity zone.
    pub zone: Zone,
    /// Top peaks of the direct spectrum.
    pub peaks: Vec<EventPeak>,
    /// Top peaks of the envelope spectrum.
    pub envelope_peaks: Vec<EventPeak>,
    /// Reconstruction trust of the block's windows, filled in by the pipeline.
    pub trust: Option<BlockTrust>,
    /// [`CAUTION`].
    pub caution: &'static str,
}

/// Feature extraction with its plans and buffers kept between blocks: one per stream (or per
/// worker). Blocks of a new length or sample rate re-plan on the spot; the FFT planners cache
/// plans by length.
pub struct FeatureExtractor {
    config: FeatureConfig,
    real_planner: RealFftPlanner<f64>,
    complex_planner: FftPlanner<f64>,
    welch: WelchPlan,
    env_welch: Option<WelchPlan>,
    sk: Option<SpectralKurtosisPlan>,
    block_fft: Option<Arc<dyn RealToComplex<f64>>>,
    envelope: Option<EnvelopePlan>,
    x: Vec<f64>,
    fft_in: Vec<f64>,
    fft_out: Vec<Complex<f64>>,
    fft_scratch: Vec<Complex<f64>>,
    env: Vec<f64>,
}

impl std::fmt::Debug for FeatureExtractor {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FeatureExtractor")
            .field("config", &self.config)
            .finish_non_exhaustive()
    }
}

impl FeatureExtractor {
    /// Checks `config` and plans the direct spectrum.
    pub fn new(config: FeatureConfig) -> Result<Self, FeatureError> {
        let b = config.severity.boundaries;
        if !b.is_ordered() {
            return Err(FeatureError::InvalidConfig(format!(
                "zone boundaries must increase strictly: {b:?}"
            )));
        }
        if !(config.velocity_band_hz.0 > 0.0
            && config.velocity_band_hz.0 < config.velocity_band_hz.1)
        {
            return Err(FeatureError::InvalidConfig(format!(
                "velocity band must satisfy 0 < low < high, got {:?}",
                config.velocity_band_hz
            )));
        }
        if let EnvelopeBand::Fixed { low_hz, high_hz } = config.envelope.band {
            if !(low_hz >= 0.0 && low_hz < high_hz) {
                return Err(FeatureError::InvalidConfig(format!(
                    "envelope band must satisfy 0 <= low < high, got {low_hz}..{high_hz}"
                )));
            }
        }
        let mut real_planner = RealFftPlanner::new();
        let welch = WelchPlan::new(&config.welch, &mut real_planner)?;
        Ok(Self {
            config,
            real_planner,
            complex_planner: FftPlanner::new(),
            welch,
            env_welch: None,
            sk: None,
            block_fft: None,
            envelope: None,
            x: Vec::new(),
            fft_in: Vec::new(),
            fft_out: Vec::new(),
            fft_scratch: Vec::new(),
            env: Vec::new(),
        })
    }

    /// The configuration.
    pub fn config(&self) -> &FeatureConfig {
        &self.config
    }

    /// Features of one block of `samples` at `sample_rate_hz` for a machine described by
    /// `kinematics`. The block must hold at least `welch.nperseg` samples.
    pub fn analyze<S: Copy + Into<f64>>(
        &mut self,
        samples: &[S],
        sample_rate_hz: f64,
        kinematics: &Kinematics,
    ) -> Result<BlockFeatures, FeatureError> {
        let cfg = self.config;
        let n = samples.len();
        self.x.clear();
        self.x.extend(samples.iter().map(|&v| v.into()));
        let spectrum = self.welch.estimate(&self.x, sample_rate_hz)?;
        let mut indicators = time_indicators(&self.x);

        self.block_spectrum();
        indicators.velocity_rms_mm_s = velocity_rms_from_spectrum(
            &self.fft_out,
            n,
            sample_rate_hz,
            cfg.velocity_band_hz,
            cfg.accel_unit.to_m_s2(),
        );
        let zone = indicators
            .velocity_rms_mm_s
            .map_or(Zone::Unknown, |v| cfg.severity.boundaries.classify(v));

        let direct = detect_peaks(&spectrum, &cfg.peaks);
        let (shaft_hz, shaft_estimated) = match kinematics.shaft {
            kinematics::ShaftSpeed::Estimate { min_hz, max_hz } => {
                let fam = dominant_harmonic_family(
                    &direct,
                    (min_hz, max_hz),
                    cfg.shaft_max_harmonic,
                    cfg.shaft_min_members,
                    cfg.label.tolerance_frac,
                    cfg.label.min_tolerance_bins * spectrum.bin_hz,
                );
                (fam.map(|f| f.fundamental_hz), true)
            }
            given => (given.given_hz(), false),
        };
        let nyq = sample_rate_hz / 2.0;
        let tgts = shaft_hz.map_or_else(Vec::new, |f| targets(kinematics, f, nyq, &cfg.label));
        let peaks = label_peaks(direct, &tgts, spectrum.bin_hz, &cfg.label);

        let envelope = if cfg.envelope.enabled {
            Some(self.envelope_features(sample_rate_hz, &tgts)?)
        } else {
            None
        };

        Ok(BlockFeatures {
            sample_rate_hz,
            len: n,
            shaft_hz,
            shaft_estimated,
            indicators,
            zone,
            bin_hz: spectrum.bin_hz,
            peaks,
            envelope,
            caution: CAUTION,
        })
    }

    /// `rfft` of the mean-removed block into `fft_out` (shared by velocity and envelope).
    fn block_spectrum(&mut self) {
        let n = self.x.len();
        if self.block_fft.as_ref().map_or(true, |f| f.len() != n) {
            let fft = self.real_planner.plan_fft_forward(n);
            self.fft_in = fft.make_input_vec();
            self.fft_out = fft.make_output_vec();
            self.fft_scratch = fft.make_scratch_vec();
            self.block_fft = Some(fft);
        }
        let mean = self.x.iter().sum::<f64>() / n as f64;
        for (d, &v) in self.fft_in.iter_mut().zip(&self.x) {
            *d = v - mean;
        }
        let fft = self.block_fft.as_ref().expect("planned above");
        fft.process_with_scratch(&mut self.fft_in, &mut self.fft_out, &mut self.fft_scratch)
            .expect("buffer lengths come from the plan");
    }

    fn envelope_features(
        &mut self,
        sample_rate_hz: f64,
        tgts: &[label::Target],
    ) -> Result<EnvelopeFeatures, FeatureError> {
        let cfg = self.config;
        let n = self.x.len();
        let band = match cfg.envelope.band {
            EnvelopeBand::Fixed { low_hz, high_hz } => SelectedBand {
                low_hz,
                high_hz: high_hz.min(sample_rate_hz / 2.0),
                spectral_kurtosis: None,
            },
            EnvelopeBand::Auto {
                max_level,
                min_bandwidth_hz,
                stft_len,
            } => {
                if self.sk.as_ref().map_or(true, |p| p.len() != stft_len) {
                    self.sk = Some(SpectralKurtosisPlan::new(stft_len, &mut self.real_planner)?);
                }
                let sk = self.sk.as_mut().expect("planned above").estimate(&self.x)?;
                let bands = candidate_bands(sample_rate_hz, max_level, min_bandwidth_hz);
                select_band(sk, sample_rate_hz / stft_len as f64, &bands).ok_or_else(|| {
                    FeatureError::InvalidConfig(format!(
                        "no envelope candidate band is at least {min_bandwidth_hz} Hz wide"
                    ))
                })?
            }
        };
        if self.envelope.as_ref().map_or(true, |p| p.len() != n) {
            self.envelope = Some(EnvelopePlan::new(n, &mut self.complex_planner));
        }
        let plan = self.envelope.as_mut().expect("planned above");
        plan.envelope(
            &self.fft_out,
            sample_rate_hz,
            band.low_hz,
            band.high_hz,
            &mut self.env,
        );
        let nperseg = cfg.envelope.nperseg.min(n);
        if self
            .env_welch
            .as_ref()
            .map_or(true, |p| p.nperseg() != nperseg)
        {
            let wc = WelchConfig {
                nperseg,
                noverlap: None,
            };
            self.env_welch = Some(WelchPlan::new(&wc, &mut self.real_planner)?);
        }
        let spec: Spectrum = self
            .env_welch
            .as_mut()
            .expect("planned above")
            .estimate(&self.env, sample_rate_hz)?;
        let peaks = detect_peaks(&spec, &cfg.peaks);
        let peaks = label_peaks(peaks, tgts, spec.bin_hz, &cfg.label);
        Ok(EnvelopeFeatures {
            band,
            bin_hz: spec.bin_hz,
            peaks,
        })
    }
}

/// One-shot [`FeatureExtractor::analyze`]: plans, analyzes one block, drops the plans. The
/// pipeline keeps a [`FeatureExtractor`] per stream instead.
pub fn analyze_block<S: Copy + Into<f64>>(
    samples: &[S],
    sample_rate_hz: f64,
    config: &FeatureConfig,
    kinematics: &Kinematics,
) -> Result<BlockFeatures, FeatureError> {
    FeatureExtractor::new(*config)?.analyze(samples, sample_rate_hz, kinematics)
}
