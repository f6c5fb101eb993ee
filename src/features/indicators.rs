//! Overall indicators of a block: RMS, peak, crest factor, kurtosis, and the in-band velocity
//! RMS by frequency-domain integration of acceleration.
//!
//! The severity zone ([`super::severity`]) is read from the velocity RMS.

use num_complex::Complex;
use realfft::RealFftPlanner;
use serde::{Deserialize, Serialize};

/// Standard gravity, m/s² (the defined value of 1 g).
pub const STANDARD_GRAVITY_M_S2: f64 = 9.80665;

/// Unit of the acceleration samples.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AccelUnit {
    /// m/s².
    #[default]
    MetresPerSecondSquared,
    /// Standard gravity, 1 g = 9.80665 m/s².
    G,
}

impl AccelUnit {
    /// Factor from this unit to m/s².
    pub fn to_m_s2(self) -> f64 {
        match self {
            AccelUnit::MetresPerSecondSquared => 1.0,
            AccelUnit::G => STANDARD_GRAVITY_M_S2,
        }
    }
}

/// Overall indicators of one block.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Indicators {
    /// RMS about the block mean, in the stream's units. The mean is removed because a
    /// reconstructed record can carry an offset that is not vibration.
    pub rms: f64,
    /// Largest `|x - mean|`, in the stream's units.
    pub peak: f64,
    /// Crest factor `peak / rms` (√2 for a sine).
    pub crest_factor: f64,
    /// Kurtosis `m4 / m2²` with population central moments: Pearson's definition, 3 for a
    /// Gaussian, 1.5 for a sine (as `scipy.stats.kurtosis(x, fisher=False, bias=True)`).
    pub kurtosis: f64,
    /// Velocity RMS in the configured band, mm/s (`None` when the band holds no bins).
    pub velocity_rms_mm_s: Option<f64>,
}

/// RMS, peak, crest factor and kurtosis of `x` (see [`Indicators`]); the velocity is left
/// `None`. An empty or constant block gives zeros (crest factor and kurtosis 0).
pub fn time_indicators(x: &[f64]) -> Indicators {
    let n = x.len();
    if n == 0 {
        return Indicators {
            rms: 0.0,
            peak: 0.0,
            crest_factor: 0.0,
            kurtosis: 0.0,
            velocity_rms_mm_s: None,
        };
    }
    let mean = x.iter().sum::<f64>() / n as f64;
    let (mut m2, mut m4, mut peak) = (0.0, 0.0, 0.0f64);
    for &v in x {
        let d = v - mean;
        let d2 = d * d;
        m2 += d2;
        m4 += d2 * d2;
        peak = peak.max(d.abs());
    }
    m2 /= n as f64;
    m4 /= n as f64;
    let rms = m2.sqrt();
    Indicators {
        rms,
        peak,
        crest_factor: if rms > 0.0 { peak / rms } else { 0.0 },
        kurtosis: if m2 > 0.0 { m4 / (m2 * m2) } else { 0.0 },
        velocity_rms_mm_s: None,
    }
}

/// Velocity RMS in mm/s over `[band_hz.0, band_hz.1]` (edges included) from the unnormalized
/// one-sided spectrum `rfft(a)` of an `n`-sample acceleration block, `accel_to_m_s2` converting
/// the samples to m/s².
///
/// `V_k = A_k / (j 2 pi f_k)` with bins outside the band zeroed first (else DC and 1/f noise
/// blow up), and `v_rms² = (2/n²) sum_{band, 0<k<n/2} |V_k|²` (plus `|V_{n/2}|²/n²` at Nyquist),
/// as CHECK-VALUES 8.2 states it (derived from one-sided Parseval). A rectangular window is
/// right here: the block is the whole record span, and leakage only moves energy between
/// neighbouring bins. Returns `None` when no bin lies in the band.
pub fn velocity_rms_from_spectrum(
    spectrum: &[Complex<f64>],
    n: usize,
    sample_rate_hz: f64,
    band_hz: (f64, f64),
    accel_to_m_s2: f64,
) -> Option<f64> {
    let bin_hz = sample_rate_hz / n as f64;
    let mut sum = 0.0;
    let mut any = false;
    for (k, a) in spectrum.iter().enumerate().skip(1) {
        let f = k as f64 * bin_hz;
        if f < band_hz.0 || f > band_hz.1 {
            continue;
        }
        any = true;
        let w = 2.0 * std::f64::consts::PI * f;
        let v2 = a.norm_sqr() / (w * w);
        let c = if n % 2 == 0 && k == n / 2 { 1.0 } else { 2.0 };
        sum += c * v2;
    }
    any.then(|| 1000.0 * accel_to_m_s2 * sum.sqrt() / n as f64)
}

/// Velocity RMS in mm/s of the acceleration block `a` (see [`velocity_rms_from_spectrum`]).
/// Plans its own FFT; the pipeline uses [`super::FeatureExtractor`], which keeps the plan.
pub fn velocity_rms_mm_s(
    a: &[f64],
    sample_rate_hz: f64,
    band_hz: (f64, f64),
    unit: AccelUnit,
) -> Option<f64> {
    if a.len() < 2 {
        return None;
    }
    let fft = RealFftPlanner::<f64>::new().plan_fft_forward(a.len());
    let mut input = a.to_vec();
    let mut out = fft.make_output_vec();
    fft.process(&mut input, &mut out)
        .expect("buffer lengths come from the plan");
    velocity_rms_from_spectrum(&out, a.len(), sample_rate_hz, band_hz, unit.to_m_s2())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sine_crest_and_kurtosis() {
        // Sine over whole periods: crest sqrt(2), Pearson kurtosis 3/2 (derived: E[sin^4] = 3/8).
        let n = 1000;
        let x: Vec<f64> = (0..n)
            .map(|j| (2.0 * std::f64::consts::PI * 5.0 * j as f64 / n as f64).sin())
            .collect();
        let ind = time_indicators(&x);
        assert!((ind.rms - 0.5f64.sqrt()).abs() < 1e-12);
        assert!((ind.crest_factor - 2f64.sqrt()).abs() < 1e-9);
        assert!((ind.kurtosis - 1.5).abs() < 1e-12);
    }
}
