//! Reconstruction trust of one window: a cross-validation estimate of its error and a check of
//! its support against the L1 phase transition. Runs inside the reconstruction job
//! ([`super::reconstruct`]) on a worker thread.
//!
//! # Cross-validation (Ward 2009)
//! R. Ward, "Compressed sensing with cross validation", IEEE Trans. Inf. Theory 55(12), 2009:
//! hold out `h` of the window's `m` samples, reconstruct from the other `m - h` with the same
//! solver settings, and predict the held-out values. Because the held-out instants are random
//! and independent of the reconstruction, the prediction error `||y_H - x_train[H]||` divided by
//! `sqrt(h)` estimates the RMS error per grid instant of `x_train`, with a relative spread of
//! about `1/sqrt(h)`. csgate stores it relative to the RMS of the received samples:
//!
//! ```text
//! cv_error = ( ||y_H - x_train[H]|| / sqrt(h) ) / ( ||y|| / sqrt(m) )
//! ```
//!
//! the relative RMS error of the window estimate (0 perfect, 1 as bad as predicting zero).
//! It includes the measurement noise on `y_H`, so on noisy data it cannot fall below the
//! noise-to-signal ratio. The final window still comes from all `m` samples (warm-started from
//! the hold-out solution); with 10% more samples its error is usually a little smaller than the
//! estimate, so the estimate errs on the safe side.
//!
//! # Phase transition (Amelunxen, Lotz, McCoy & Tropp 2014)
//! Noise-free basis pursuit recovers a `k`-sparse vector of length `n` from `m` random
//! measurements with probability about 1/2 at `m = n psi(k/n)`. [`min_measurements`]
//! interpolates the tabulated `psi` (values copied from CHECK-VALUES section 6.1, computed
//! there from the paper's formula); a window whose (effective) support needs more measurements
//! than it had is flagged. Random-row DCT sampling follows the Gaussian transition closely
//! (Donoho & Tanner 2009; CHECK-VALUES 6.2).

//!
//! # Tuning lambda by the same hold-out
//! The LASSO weight that reconstructs a stream best depends on how much of its signal is
//! sparse and how much is broadband noise: on noise-free tones the smallest `lambda` wins,
//! on a noisy machine a larger one stops the solver fitting the noise (and takes fewer
//! iterations). Hold-out prediction error is the classical way to choose such a parameter
//! (cross-validation, common practice; Ward 2009 also uses the hold-out error to choose
//! between reconstructions, recalled from memory). Every
//! `tune_every`-th window of a stream solves the hold-out problem a second time at
//! `tune_step` times (or divided by it, alternately) the stream's current fraction of
//! `lambda_max`, warm from the first solve, on the *same* held-out samples: a paired
//! comparison, so the window's content cancels out. When the probe predicts the held-out
//! samples better, the stream's fraction moves half-way (in log scale) towards it; within
//! `tune_tolerance` the larger weight wins (sparser and cheaper at no measured loss). The
//! window itself is always reconstructed at the stream's current fraction; only later
//! windows use the new one. See [`LambdaTuning`].

use serde::{Deserialize, Serialize};

/// The tuning state of one stream's LASSO weight (carried from window to window).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct LambdaTuning {
    /// The stream's fraction of `lambda_max` (`None` before its first window).
    pub fraction: Option<f64>,
    /// Windows of the stream seen with a hold-out.
    pub windows: u64,
    /// Probes won and lost (for reports).
    pub probes_won: u64,
    /// Probes lost.
    pub probes_lost: u64,
}

impl LambdaTuning {
    /// The fraction to probe on this window, if it is a probe window.
    pub fn probe(&self, cfg: &TrustConfig, current: f64) -> Option<f64> {
        let every = cfg.tune_every.max(1) as u64;
        if !cfg.tune_lambda || self.windows % every != every - 1 {
            return None;
        }
        // Alternate up and down so neither direction is favoured.
        let up = (self.windows / every) % 2 == 0;
        let f = if up {
            current * cfg.tune_step
        } else {
            current / cfg.tune_step
        };
        let f = f.clamp(cfg.tune_min_fraction, cfg.tune_max_fraction);
        (f != current).then_some(f)
    }

    /// Records the outcome of a window: the probe (if any) and whether it predicted better.
    pub fn record(&mut self, cfg: &TrustConfig, current: f64, probe: Option<(f64, bool)>) {
        self.windows += 1;
        let mut next = current;
        if let Some((f, won)) = probe {
            if won {
                self.probes_won += 1;
                next = (current * f).sqrt();
            } else {
                self.probes_lost += 1;
            }
        }
        self.fraction = Some(next.clamp(cfg.tune_min_fraction, cfg.tune_max_fraction));
    }
}

/// Settings of the per-window trust figures (serde; every field has a documented default).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TrustConfig {
    /// Compute the trust figures. Default on. Off: `cv_error` stays NaN and `trust` 0
    /// (unknown), and no extra solve runs.
    pub enabled: bool,
    /// Run the hold-out solve on the windows whose sequence number is a multiple of this, to
    /// buy capacity with fewer trust figures. Default 1 (every window). The other windows get
    /// no figures (`cv_error` NaN, `trust` 0, as with `enabled = false`) but are solved at the
    /// stream's tuned weight; the sampling advice passes over them.
    pub every: usize,
    /// Fraction of each window's samples held out. Default 0.1 (Ward 2009 suggests a small
    /// fraction; 10% of m = 1024 gives h = 102 and an estimate within about +/-10%).
    pub holdout_fraction: f64,
    /// Fewest samples held out; windows with fewer than `2 * min_holdout` samples get no
    /// estimate (trust unknown). Default 8: below that the estimate spreads by more than 35%.
    pub min_holdout: usize,
    /// A window whose `cv_error` exceeds this is low trust. Default 0.3: a relative RMS error
    /// of 30%, an SNR of the window of about 10.5 dB.
    pub max_cv_error: f64,
    /// Also flag windows whose effective support exceeds what `m` allows by the L1 phase
    /// transition. Default on.
    pub phase_transition: bool,
    /// Energy fraction defining the effective support: the fewest largest coefficients that
    /// hold this share of the energy of the LASSO coefficients. Default 0.99. At a small
    /// `lambda` the LASSO keeps hundreds of tiny coefficients that fit noise; counting those
    /// would flag nearly every noisy window. 1.0 counts every non-zero coefficient.
    pub support_energy: f64,
    /// Tune each stream's LASSO weight by the same hold-out (see [`LambdaTuning`]). Default on.
    /// Applies to streams whose solver uses `lambda = fraction_of_max`; the configured
    /// fraction is where a stream starts.
    pub tune_lambda: bool,
    /// A tuning probe every this many windows of a stream. Default 4: one more hold-out solve
    /// per four windows, warm from the first.
    pub tune_every: usize,
    /// Factor between the stream's fraction and the probed one. Default 1.5; the stream moves
    /// by half of it (in log scale) when the probe predicts the held-out samples better.
    pub tune_step: f64,
    /// Range the tuned fraction stays in. Default 0.002 to 0.2.
    pub tune_min_fraction: f64,
    /// Upper end of that range.
    pub tune_max_fraction: f64,
    /// Relative difference of `cv_error` below which a probe counts as a tie. Default 0.01.
    /// A tie goes to the larger weight: sparser, cheaper, and no worse on the held-out samples.
    pub tune_tolerance: f64,
}

impl Default for TrustConfig {
    fn default() -> Self {
        Self {
            enabled: true,
            every: 1,
            holdout_fraction: 0.1,
            min_holdout: 8,
            max_cv_error: 0.3,
            phase_transition: true,
            support_energy: 0.99,
            tune_lambda: true,
            tune_every: 4,
            tune_step: 1.5,
            tune_min_fraction: 0.002,
            tune_max_fraction: 0.2,
            tune_tolerance: 0.01,
        }
    }
}

impl TrustConfig {
    /// Checks the ranges; the message names the field.
    pub fn check(&self) -> Result<(), String> {
        if !(self.holdout_fraction > 0.0 && self.holdout_fraction < 0.5) {
            return Err(format!(
                "trust.holdout_fraction must be in (0, 0.5), got {}",
                self.holdout_fraction
            ));
        }
        if !(self.max_cv_error.is_finite() && self.max_cv_error > 0.0) {
            return Err(format!(
                "trust.max_cv_error must be positive, got {}",
                self.max_cv_error
            ));
        }
        if !(self.support_energy > 0.0 && self.support_energy <= 1.0) {
            return Err(format!(
                "trust.support_energy must be in (0, 1], got {}",
                self.support_energy
            ));
        }
        if self.min_holdout == 0 {
            return Err("trust.min_holdout must be at least 1".into());
        }
        if !(self.tune_tolerance.is_finite() && (0.0..0.5).contains(&self.tune_tolerance)) {
            return Err(format!(
                "trust.tune_tolerance must be in [0, 0.5), got {}",
                self.tune_tolerance
            ));
        }
        if self.every == 0 {
            return Err("trust.every must be at least 1".into());
        }
        if self.tune_every == 0 {
            return Err("trust.tune_every must be at least 1".into());
        }
        if !(self.tune_step.is_finite() && self.tune_step > 1.0) {
            return Err(format!(
                "trust.tune_step must be greater than 1, got {}",
                self.tune_step
            ));
        }
        if !(self.tune_min_fraction > 0.0
            && self.tune_min_fraction < self.tune_max_fraction
            && self.tune_max_fraction < 1.0)
        {
            return Err(format!(
                "trust.tune_min_fraction and tune_max_fraction must satisfy 0 < min < max < 1, \
                 got {} and {}",
                self.tune_min_fraction, self.tune_max_fraction
            ));
        }
        Ok(())
    }

    /// Whether the window with sequence number `seq` gets a hold-out solve (see
    /// [`TrustConfig::every`]).
    pub fn samples(&self, seq: u64) -> bool {
        self.enabled && seq % self.every.max(1) as u64 == 0
    }

    /// Samples to hold out of `m`, or `None` when the window is too small for an estimate.
    pub fn holdout_len(&self, m: usize) -> Option<usize> {
        if m < 2 * self.min_holdout {
            return None;
        }
        let h = (self.holdout_fraction * m as f64).round() as usize;
        Some(h.clamp(self.min_holdout, m / 2))
    }
}

/// `(rho = k/n, psi(rho) = min m/n)` of the L1 phase transition: CHECK-VALUES 6.1, computed
/// there from the statistical-dimension formula of Amelunxen, Lotz, McCoy & Tropp,
/// "Living on the edge", Information and Inference, 2014.
pub const PHASE_TRANSITION: [(f64, f64); 8] = [
    (0.005, 0.035_424_13),
    (0.01, 0.061_243_96),
    (0.02, 0.104_181_39),
    (0.05, 0.203_899_86),
    (0.1, 0.328_793_51),
    (0.2, 0.511_129_61),
    (0.3, 0.645_572_29),
    (0.5, 0.831_299_91),
];

/// Measurements at the phase transition for a `k`-sparse vector of length `n`: `n psi(k/n)`,
/// `psi` interpolated linearly in the table, from `(0, 0)` below its first row and towards
/// `(1, 1)` above its last (`psi` is concave, so the chords lie below it: the interpolation
/// errs towards trusting the window).
pub fn min_measurements(k: usize, n: usize) -> f64 {
    if n == 0 {
        return 0.0;
    }
    let rho = (k as f64 / n as f64).clamp(0.0, 1.0);
    let mut prev = (0.0, 0.0);
    for &(r, p) in PHASE_TRANSITION.iter().chain(std::iter::once(&(1.0, 1.0))) {
        if rho <= r {
            let t = (rho - prev.0) / (r - prev.0);
            return n as f64 * (prev.1 + t * (p - prev.1));
        }
        prev = (r, p);
    }
    n as f64
}

/// The fewest largest-magnitude coefficients of `s` holding `energy` of `sum s^2` (the count
/// of non-zeros for `energy >= 1`).
pub fn effective_support(s: &[f64], energy: f64) -> usize {
    let nonzero = s.iter().filter(|v| **v != 0.0).count();
    if energy >= 1.0 || nonzero == 0 {
        return nonzero;
    }
    let mut sq: Vec<f64> = s.iter().filter(|v| **v != 0.0).map(|v| v * v).collect();
    sq.sort_unstable_by(|a, b| b.total_cmp(a));
    let total: f64 = sq.iter().sum();
    let mut acc = 0.0;
    for (i, v) in sq.iter().enumerate() {
        acc += v;
        if acc >= energy * total {
            return i + 1;
        }
    }
    nonzero
}

/// A deterministic seed for the hold-out set of window `seq` of a stream: the same window
/// always holds out the same samples (reproducible records), different windows differ.
pub fn holdout_seed(node: u32, channel: u16, seq: u64) -> u64 {
    // splitmix64 finaliser (Steele, Lea & Flood, "Fast splittable pseudorandom number
    // generators", OOPSLA 2014) over the packed stream id and sequence number.
    let mut z =
        (u64::from(node) << 16 | u64::from(channel)).wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ seq;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// `cv_error` from the held-out values `y_h`, their predictions and the norm of all `m`
/// received values (see the module docs). NaN when `y` is all zero.
pub fn cv_error(y_h: &[f64], predicted: &[f64], y_norm: f64, m: usize) -> f64 {
    let h = y_h.len();
    if h == 0 || y_norm <= 0.0 {
        return f64::NAN;
    }
    let err: f64 = y_h
        .iter()
        .zip(predicted)
        .map(|(a, b)| (a - b) * (a - b))
        .sum::<f64>()
        .sqrt();
    (err / (h as f64).sqrt()) / (y_norm / (m as f64).sqrt())
}

/// Why a window is low trust (both can hold).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize)]
pub struct LowTrustReasons {
    /// `cv_error` above `max_cv_error`.
    pub cv_error: bool,
    /// Effective support beyond the phase transition for this `m`.
    pub phase_transition: bool,
}

/// Trust figures of one window.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WindowTrust {
    /// The cross-validation estimate (see the module docs).
    pub cv_error: f64,
    /// Samples held out.
    pub holdout: usize,
    /// Effective support of the final LASSO solution.
    pub effective_support: usize,
    /// Measurements the phase transition asks for at that support.
    pub min_measurements: f64,
    /// Why it is low trust, if it is.
    pub reasons: LowTrustReasons,
    /// FISTA iterations of the hold-out solve (the extra cost), with the tuning probe's.
    pub holdout_iterations: usize,
    /// The fraction of `lambda_max` the window was reconstructed with, when tuned.
    pub lambda_fraction: Option<f64>,
}

impl WindowTrust {
    /// Whether any reason holds.
    pub fn low(&self) -> bool {
        self.reasons.cv_error || self.reasons.phase_transition
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn phase_transition_matches_the_table_edges() {
        // CHECK-VALUES 6.1 "absolute edges": n = 4096, k = 41 -> 251.0; n = 4096, k = 205 ->
        // 835.8; n = 1024, k = 51 -> 208.2; n = 256, k = 13 -> 52.8. k/n is not exactly a table
        // row, so linear interpolation is allowed 1% here.
        for (k, n, m) in [
            (41, 4096, 251.0),
            (205, 4096, 835.8),
            (51, 1024, 208.2),
            (13, 256, 52.8),
        ] {
            let got = min_measurements(k, n);
            assert!((got - m).abs() / m < 0.01, "k {k} n {n}: {got} vs {m}");
        }
        // Exactly on a row: n psi(rho).
        assert!((min_measurements(100, 1000) - 328.79351).abs() < 1e-9);
        assert_eq!(min_measurements(0, 1000), 0.0);
        assert_eq!(min_measurements(1000, 1000), 1000.0);
    }

    #[test]
    fn effective_support_counts_energy() {
        let s = [3.0, 0.0, -4.0, 0.1, 0.0];
        assert_eq!(effective_support(&s, 1.0), 3);
        // 16 of 25.01 is 64%, 25 of 25.01 is 99.96%.
        assert_eq!(effective_support(&s, 0.5), 1);
        assert_eq!(effective_support(&s, 0.99), 2);
        assert_eq!(effective_support(&[0.0; 4], 0.99), 0);
    }

    #[test]
    fn cv_error_is_relative_rms() {
        // Prediction error RMS 0.1 against received RMS 1: 0.1.
        let y_h = [1.0, -1.0, 1.0, -1.0];
        let p = [0.9, -0.9, 1.1, -1.1];
        let e = cv_error(&y_h, &p, (16.0f64).sqrt(), 16);
        assert!((e - 0.1).abs() < 1e-12, "{e}");
        assert!(cv_error(&[], &[], 1.0, 4).is_nan());
    }

    #[test]
    fn tuning_probes_alternate_and_moves_half_way() {
        let cfg = TrustConfig::default();
        let mut t = LambdaTuning::default();
        // Windows 0..2 are not probes; window 3 probes up, window 7 down.
        for _ in 0..3 {
            assert_eq!(t.probe(&cfg, 0.01), None);
            t.record(&cfg, 0.01, None);
        }
        let up = t.probe(&cfg, 0.01).unwrap();
        assert!((up - 0.015).abs() < 1e-12);
        t.record(&cfg, 0.01, Some((up, true)));
        // Geometric mean of 0.01 and 0.015.
        let f = t.fraction.unwrap();
        assert!((f - (0.01f64 * 0.015).sqrt()).abs() < 1e-12);
        for _ in 0..3 {
            t.record(&cfg, f, None);
        }
        let down = t.probe(&cfg, f).unwrap();
        assert!((down - f / 1.5).abs() < 1e-12);
        t.record(&cfg, f, Some((down, false)));
        assert_eq!(t.fraction, Some(f));
        assert_eq!((t.probes_won, t.probes_lost), (1, 1));
        // Bounds hold, and a probe clamped to the current value is no probe.
        let mut edge = LambdaTuning {
            windows: 3,
            ..LambdaTuning::default()
        };
        assert_eq!(edge.probe(&cfg, cfg.tune_max_fraction), None);
        edge.record(&cfg, 0.5, None);
        assert_eq!(edge.fraction, Some(cfg.tune_max_fraction));
        let off = TrustConfig {
            tune_lambda: false,
            ..TrustConfig::default()
        };
        assert_eq!(
            LambdaTuning {
                windows: 3,
                ..LambdaTuning::default()
            }
            .probe(&off, 0.01),
            None
        );
    }

    #[test]
    fn holdout_is_a_fraction_within_bounds() {
        let c = TrustConfig::default();
        assert_eq!(c.holdout_len(1024), Some(102));
        assert_eq!(c.holdout_len(15), None);
        assert_eq!(c.holdout_len(40), Some(8));
        assert_ne!(holdout_seed(1, 0, 5), holdout_seed(1, 0, 6));
        assert_ne!(holdout_seed(1, 0, 5), holdout_seed(2, 0, 5));
    }
}
