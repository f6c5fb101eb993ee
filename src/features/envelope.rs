//! Envelope analysis: band-pass around a structural resonance, envelope by the analytic
//! signal, and the band chosen by spectral kurtosis when not configured.
//!
//! A local bearing defect strikes once per pass and each strike rings a structural resonance
//! (kHz); the strikes' repetition rate is in the envelope of that ringing, not in the raw
//! spectrum (Randall & Antoni 2011). The envelope spectrum is then searched for peaks and
//! labelled like the direct spectrum.
//!
//! # Band selection: a kurtogram-lite
//! Spectral kurtosis per frequency from a short-time Fourier transform,
//! `SK(f) = <|X(t,f)|⁴> / <|X(t,f)|²>² - 2` (J. Antoni, "The spectral kurtosis: a useful tool
//! for characterising non-stationary signals", MSSP 2006; Antoni & Randall, MSSP 2006, from
//! memory), is 0 for stationary Gaussian noise, −1 for a steady tone, and large where
//! impulsive ringing dominates. Candidate bands are those of the 1/3-binary tree of Antoni's fast
//! kurtogram (MSSP 2007): at level `l`, `2^l` bands of width `fs/2^(l+1)` and `3·2^(l-1)` bands
//! of width `fs/(3·2^l)`. Each band is scored by the mean STFT SK over the bins inside it; the
//! highest score wins. This is a simplification of our own: the fast kurtogram computes the
//! kurtosis of each band's filtered envelope instead; averaging the per-bin SK needs one STFT
//! for every band and keeps the same ranking idea.

use super::spectrum::hann_periodic;
use super::FeatureError;
use num_complex::Complex;
use realfft::{RealFftPlanner, RealToComplex};
use rustfft::{Fft, FftPlanner};
use serde::{Deserialize, Serialize};
use std::sync::Arc;

/// How the envelope band is chosen.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EnvelopeBand {
    /// A fixed band, e.g. around a resonance known from a tap test.
    Fixed {
        /// Lower edge, Hz.
        low_hz: f64,
        /// Upper edge, Hz.
        high_hz: f64,
    },
    /// The candidate band of highest mean spectral kurtosis (see the module docs).
    Auto {
        /// Deepest tree level searched.
        max_level: u32,
        /// Narrowest band considered, Hz: the band must hold the fault frequency and a few of its
        /// harmonics and sidebands.
        min_bandwidth_hz: f64,
        /// STFT length for spectral kurtosis, samples (hop is a quarter of it).
        stft_len: usize,
    },
}

impl Default for EnvelopeBand {
    fn default() -> Self {
        // Level 4 at 25.6 kHz is 800 Hz wide; 500 Hz leaves room for BPFI with ±1X sidebands on
        // most machines. SK only sees impacts when a frame is shorter than the gap between them
        // (Antoni 2006): 128 samples (5 ms at 25.6 kHz, 200 Hz bins) stays below the 6 ms gap
        // of a 160 Hz BPFI; 256-sample frames measured almost no SK on such a signal.
        EnvelopeBand::Auto {
            max_level: 4,
            min_bandwidth_hz: 500.0,
            stft_len: 128,
        }
    }
}

/// Parameters of envelope analysis.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct EnvelopeConfig {
    /// Whether envelope analysis runs.
    pub enabled: bool,
    /// Band choice.
    pub band: EnvelopeBand,
    /// Welch segment length of the envelope spectrum (clipped to the block length). 8192 at
    /// 25.6 kHz gives 3.125 Hz bins, fine enough to split cage-rate sidebands of fault lines.
    pub nperseg: usize,
}

impl Default for EnvelopeConfig {
    fn default() -> Self {
        Self {
            enabled: true,
            band: EnvelopeBand::default(),
            nperseg: 8192,
        }
    }
}

/// The band the envelope was taken in.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SelectedBand {
    /// Lower edge, Hz.
    pub low_hz: f64,
    /// Upper edge, Hz.
    pub high_hz: f64,
    /// Mean spectral kurtosis in the band (`None` for a fixed band).
    pub spectral_kurtosis: Option<f64>,
}

/// The candidate bands of the 1/3-binary tree down to `max_level`, at least `min_bandwidth_hz`
/// wide, coarsest first.
pub fn candidate_bands(
    sample_rate_hz: f64,
    max_level: u32,
    min_bandwidth_hz: f64,
) -> Vec<(f64, f64)> {
    let nyq = sample_rate_hz / 2.0;
    let mut out = Vec::new();
    for l in 1..=max_level {
        for count in [1usize << l, 3usize << (l - 1)] {
            let width = nyq / count as f64;
            if width < min_bandwidth_hz {
                continue;
            }
            for i in 0..count {
                out.push((i as f64 * width, (i + 1) as f64 * width));
            }
        }
    }
    out
}

/// A planned STFT spectral-kurtosis estimator for one frame length.
pub struct SpectralKurtosisPlan {
    len: usize,
    window: Vec<f64>,
    fft: Arc<dyn RealToComplex<f64>>,
    input: Vec<f64>,
    output: Vec<Complex<f64>>,
    scratch: Vec<Complex<f64>>,
    s2: Vec<f64>,
    s4: Vec<f64>,
}

impl std::fmt::Debug for SpectralKurtosisPlan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SpectralKurtosisPlan")
            .field("len", &self.len)
            .finish_non_exhaustive()
    }
}

impl SpectralKurtosisPlan {
    /// Plans frames of `len` samples.
    pub fn new(len: usize, planner: &mut RealFftPlanner<f64>) -> Result<Self, FeatureError> {
        if len < 8 {
            return Err(FeatureError::InvalidConfig(format!(
                "stft_len must be at least 8, got {len}"
            )));
        }
        let fft = planner.plan_fft_forward(len);
        Ok(Self {
            len,
            window: hann_periodic(len),
            input: fft.make_input_vec(),
            output: fft.make_output_vec(),
            scratch: fft.make_scratch_vec(),
            s2: vec![0.0; len / 2 + 1],
            s4: vec![0.0; len / 2 + 1],
            fft,
        })
    }

    /// Spectral kurtosis of `x` per STFT bin (bin `k` at `k fs / len`); frames every `len/4`.
    /// Bins with no energy read 0; 0 is also the value for stationary Gaussian noise in every
    /// bin, DC and Nyquist included.
    pub fn estimate(&mut self, x: &[f64]) -> Result<&[f64], FeatureError> {
        if x.len() < self.len {
            return Err(FeatureError::TooShort {
                needed: self.len,
                got: x.len(),
            });
        }
        let hop = (self.len / 4).max(1);
        let frames = (x.len() - self.len) / hop + 1;
        self.s2.fill(0.0);
        self.s4.fill(0.0);
        for f in 0..frames {
            let seg = &x[f * hop..f * hop + self.len];
            for ((d, &v), &w) in self.input.iter_mut().zip(seg).zip(&self.window) {
                *d = v * w;
            }
            self.fft
                .process_with_scratch(&mut self.input, &mut self.output, &mut self.scratch)
                .expect("buffer lengths come from the plan");
            for ((s2, s4), c) in self.s2.iter_mut().zip(self.s4.iter_mut()).zip(&self.output) {
                let p = c.norm_sqr();
                *s2 += p;
                *s4 += p * p;
            }
        }
        let nf = frames as f64;
        let last = self.len / 2;
        for (k, (s2, s4)) in self.s2.iter_mut().zip(&self.s4).enumerate() {
            let m2 = *s2 / nf;
            let m4 = s4 / nf;
            // DC and (even-length) Nyquist bins are real: Gaussian noise gives m4/m2² = 3 there,
            // not 2, so subtract 3 to keep SK = 0 for noise in every bin.
            let gaussian = if k == 0 || (self.len % 2 == 0 && k == last) {
                3.0
            } else {
                2.0
            };
            *s2 = if m2 > 0.0 {
                m4 / (m2 * m2) - gaussian
            } else {
                0.0
            };
        }
        Ok(&self.s2)
    }

    /// Frame length.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Always false: a plan has at least 8 samples per frame.
    pub fn is_empty(&self) -> bool {
        false
    }
}

/// Picks the band of highest mean SK among `bands`; `sk[k]` belongs to frequency `k * sk_bin_hz`.
pub fn select_band(sk: &[f64], sk_bin_hz: f64, bands: &[(f64, f64)]) -> Option<SelectedBand> {
    let mut best: Option<SelectedBand> = None;
    for &(lo, hi) in bands {
        let k0 = (lo / sk_bin_hz).ceil() as usize;
        let k1 = ((hi / sk_bin_hz).floor() as usize).min(sk.len().saturating_sub(1));
        if k1 < k0 {
            continue;
        }
        let score = sk[k0..=k1].iter().sum::<f64>() / (k1 - k0 + 1) as f64;
        let better = best.map_or(true, |b| score > b.spectral_kurtosis.unwrap_or(f64::MIN));
        if better {
            best = Some(SelectedBand {
                low_hz: lo,
                high_hz: hi,
                spectral_kurtosis: Some(score),
            });
        }
    }
    best
}

/// Builds envelopes from the spectrum of a whole block: an ideal band-pass (bins outside the
/// band set to zero) and the analytic signal in one inverse FFT, as `scipy.signal.hilbert` forms
/// it (positive frequencies doubled, negative ones zeroed, DC and Nyquist kept once).
pub struct EnvelopePlan {
    len: usize,
    ifft: Arc<dyn Fft<f64>>,
    buffer: Vec<Complex<f64>>,
    scratch: Vec<Complex<f64>>,
}

impl std::fmt::Debug for EnvelopePlan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("EnvelopePlan")
            .field("len", &self.len)
            .finish_non_exhaustive()
    }
}

impl EnvelopePlan {
    /// Plans envelopes of `len`-sample blocks.
    pub fn new(len: usize, planner: &mut FftPlanner<f64>) -> Self {
        let ifft = planner.plan_fft_inverse(len);
        Self {
            len,
            buffer: vec![Complex::default(); len],
            scratch: vec![Complex::default(); ifft.get_inplace_scratch_len()],
            ifft,
        }
    }

    /// Block length.
    pub fn len(&self) -> usize {
        self.len
    }

    /// True for an empty block length.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Writes into `out` the envelope `|z|` of the band `[low_hz, high_hz]` (edges included) of
    /// the block whose one-sided spectrum `rfft(x)` is `spectrum`, mean removed.
    ///
    /// # Panics
    /// If `spectrum.len() != len/2 + 1`.
    pub fn envelope(
        &mut self,
        spectrum: &[Complex<f64>],
        sample_rate_hz: f64,
        low_hz: f64,
        high_hz: f64,
        out: &mut Vec<f64>,
    ) {
        let n = self.len;
        assert_eq!(
            spectrum.len(),
            n / 2 + 1,
            "spectrum length must be len/2 + 1"
        );
        let bin_hz = sample_rate_hz / n as f64;
        self.buffer.fill(Complex::default());
        for (k, xk) in spectrum.iter().enumerate() {
            let f = k as f64 * bin_hz;
            if f < low_hz || f > high_hz {
                continue;
            }
            let edge = k == 0 || (n % 2 == 0 && k == n / 2);
            self.buffer[k] = if edge { *xk } else { 2.0 * xk };
        }
        self.ifft
            .process_with_scratch(&mut self.buffer, &mut self.scratch);
        let inv_n = 1.0 / n as f64;
        out.clear();
        out.extend(self.buffer.iter().map(|z| z.norm() * inv_n));
        let mean = out.iter().sum::<f64>() / n as f64;
        out.iter_mut().for_each(|v| *v -= mean);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn candidate_band_widths() {
        let b = candidate_bands(25600.0, 2, 0.0);
        // level 1: 2 bands of 6400 Hz and 3 of 4266.7 Hz; level 2: 4 of 3200 and 6 of 2133.3.
        assert_eq!(b.len(), 2 + 3 + 4 + 6);
        assert_eq!(b[0], (0.0, 6400.0));
        assert_eq!(
            candidate_bands(25600.0, 4, 1000.0).len(),
            2 + 3 + 4 + 6 + 8 + 12
        );
    }

    #[test]
    fn envelope_of_a_modulated_tone() {
        // x = (1 + 0.5 cos(2 pi 10 t)) cos(2 pi 1000 t): |z| = 1 + 0.5 cos(2 pi 10 t) (derived).
        let n = 4000;
        let fs = 4000.0;
        let x: Vec<f64> = (0..n)
            .map(|j| {
                let t = j as f64 / fs;
                (1.0 + 0.5 * (2.0 * std::f64::consts::PI * 10.0 * t).cos())
                    * (2.0 * std::f64::consts::PI * 1000.0 * t).cos()
            })
            .collect();
        let mut rp = RealFftPlanner::new();
        let fft = rp.plan_fft_forward(n);
        let mut input = x.clone();
        let mut spec = fft.make_output_vec();
        fft.process(&mut input, &mut spec).unwrap();
        let mut plan = EnvelopePlan::new(n, &mut FftPlanner::new());
        let mut env = Vec::new();
        plan.envelope(&spec, fs, 500.0, 1500.0, &mut env);
        for (j, e) in env.iter().enumerate() {
            let t = j as f64 / fs;
            let want = 0.5 * (2.0 * std::f64::consts::PI * 10.0 * t).cos();
            assert!((e - want).abs() < 1e-9, "{j}: {e} vs {want}");
        }
    }
}
