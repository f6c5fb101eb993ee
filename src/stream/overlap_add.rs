//! Overlap-add stitching of reconstructed windows into one continuous stream of samples.
//! Sits between the solver pool and the record sink; pure computation, no I/O.
//!
//! # Model
//! Windows of `n` samples start every `hop` samples on the stream's grid (window `k` at
//! position `k * hop` of the current segment). Each reconstructed window is a full-length
//! estimate of the signal, so no analysis window is applied: the stitcher weights each window
//! by a synthesis window `w` and adds, and divides each sample by the sum of the weights of the
//! windows that are present there:
//!
//! ```text
//! y[p] = sum_k w[p - k*hop] * x_k[p - k*hop] / sum_k w[p - k*hop]      (k over present windows)
//! ```
//!
//! With every window present and `w` COLA at this hop the denominator is the constant of the
//! constant-overlap-add identity (1 for periodic Hann at hop n/2; Allen 1977), so in the
//! interior this is plain weighted overlap-add. Dividing by the weights actually present makes
//! the edges exact as well: where one window alone covers a sample (the first and last
//! `n - hop` samples of a capture, or beside a missing window) the record holds exactly that
//! window's reconstruction, with no taper. A window that reproduces the signal returns it
//! unchanged everywhere it covers.
//!
//! # Windows
//! - [`SynthesisWindow::Hann`] (default): periodic Hann, `w[j] = 0.5 - 0.5 cos(2 pi j / n)`,
//!   valid when `n / hop` is an integer >= 2 (COLA, sum `n / (2 hop)`). Its `w[0]` is 0: a
//!   sample where every present window has weight 0 (only the first sample of a capture or of
//!   a stretch after a gap) takes the plain mean of the covering windows, which with one window
//!   is that window's value.
//! - [`SynthesisWindow::SqrtHannPair`]: the input windows already carry a sqrt-Hann analysis
//!   taper (e.g. a solver that reconstructs tapered windows); the stitcher applies sqrt-Hann
//!   again, so the product is periodic Hann, COLA at the same hops (Griffin & Lim 1984). A
//!   sample where the product weights sum to 0 cannot be untapered and is a gap of reason
//!   [`GapReason::ZeroWeight`].
//!
//! COLA is checked numerically when the stitcher is constructed.
//!
//! # Missing windows and gaps
//! A window can be declared missing ([`Stitcher::push_missing`], with a reason) or skipped (a
//! jump in start positions, reason [`GapReason::WindowMissing`]). Its neighbours still cover
//! most of its span with overlap; those samples come from the neighbours alone, renormalised as
//! above, and produce no gap item. Only samples that no present window covers are emitted as a
//! [`StitchItem::Gap`] (the record stores NaN there); samples are never invented. Adjacent
//! uncovered samples with the same reason form one gap item, emitted once the next covered
//! sample (or [`Stitcher::finish`]) shows where it ends.
//!
//! # Output and finish
//! After window `k` (present or missing) the samples before `k * hop + hop` are final, because
//! every later window starts at or after that position; they are returned as items in position
//! order, contiguous and non-overlapping. [`Stitcher::finish`] emits the rest, up to the end of
//! the last window slot pushed (uncovered tail samples of a missing last window become a gap),
//! and resets the stitcher to position 0 for the next capture.
//!
//! Accumulation is in `f64`; output samples are `f32`.

use std::collections::VecDeque;

/// Why samples are missing from a record. The `u8` codes are stored in the record's `gaps`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum GapReason {
    /// No reason given (e.g. a hole between two blocks that no gap message explained).
    Unspecified = 0,
    /// The window never arrived.
    WindowMissing = 1,
    /// The window arrived but its reconstruction was rejected.
    WindowRejected = 2,
    /// The window arrived after its samples had been written.
    Late = 3,
    /// The capture ended or restarted before the window was complete.
    CaptureRestart = 4,
    /// Covered only where every synthesis weight is 0 (sqrt-Hann pair at an edge).
    ZeroWeight = 5,
}

impl GapReason {
    /// The stored code.
    pub fn code(self) -> u8 {
        self as u8
    }

    /// The reason for a stored code, if it is one.
    pub fn from_code(code: u8) -> Option<Self> {
        Some(match code {
            0 => Self::Unspecified,
            1 => Self::WindowMissing,
            2 => Self::WindowRejected,
            3 => Self::Late,
            4 => Self::CaptureRestart,
            5 => Self::ZeroWeight,
            _ => return None,
        })
    }
}

/// The synthesis window of the stitcher.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum SynthesisWindow {
    /// Periodic Hann on synthesis only; the input windows are untapered estimates.
    #[default]
    Hann,
    /// sqrt-Hann on synthesis of windows that already carry a sqrt-Hann analysis taper.
    SqrtHannPair,
}

/// Window length, hop and synthesis window.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StitchConfig {
    /// Window length `n` in samples.
    pub window_len: usize,
    /// Hop in samples between window starts.
    pub hop_len: usize,
    /// The synthesis window.
    pub window: SynthesisWindow,
}

impl StitchConfig {
    /// Periodic Hann at 50 % overlap (hop `n / 2`), the default.
    pub fn half_overlap(window_len: usize) -> Self {
        Self {
            window_len,
            hop_len: window_len / 2,
            window: SynthesisWindow::Hann,
        }
    }
}

/// A configuration the stitcher cannot use, or input that breaks its contract.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StitchError {
    /// The hop does not divide the window length into at least two overlapping windows.
    #[error("hop {hop} does not give a COLA periodic Hann for window length {window_len}: window_len / hop must be an integer >= 2")]
    HopNotCola {
        /// Window length.
        window_len: usize,
        /// Hop.
        hop: usize,
    },
    /// The numerical COLA check failed (should not happen for a valid hop).
    #[error("overlap-add weights vary from {min} to {max} at hop {hop}")]
    NotCola {
        /// Hop.
        hop: usize,
        /// Smallest weight sum.
        min: f64,
        /// Largest weight sum.
        max: f64,
    },
    /// A window start is not a multiple of the hop.
    #[error("window start {start} is not a multiple of the hop {hop}")]
    Misaligned {
        /// The start given.
        start: u64,
        /// The hop.
        hop: usize,
    },
    /// A window start precedes the next expected start (duplicate or out of order).
    #[error("window start {start} is before the next expected start {expected}")]
    OutOfOrder {
        /// The start given.
        start: u64,
        /// The next expected start.
        expected: u64,
    },
    /// A window does not have the configured length.
    #[error("window has {got} samples, expected {expected}")]
    WrongLength {
        /// The configured length.
        expected: usize,
        /// The length given.
        got: usize,
    },
}

/// A piece of stitched output. Items come in position order without overlap.
#[derive(Debug, Clone, PartialEq)]
pub enum StitchItem {
    /// Finished samples from grid position `start`.
    Block {
        /// Position of `samples[0]`.
        start: u64,
        /// The samples.
        samples: Vec<f32>,
    },
    /// Positions no present window covers; the record holds NaN there.
    Gap {
        /// First uncovered position.
        start: u64,
        /// Number of uncovered positions.
        len: u64,
        /// Why.
        reason: GapReason,
    },
}

/// Periodic Hann of length `n`: `w[j] = 0.5 - 0.5 cos(2 pi j / n)`.
///
/// Evaluated as `0.5 + 0.5 cos(-pi + j * (2 pi / n))`, the same expression scipy's
/// `get_window('hann', n)` evaluates, so the values agree to the last bit or so rather than
/// differing by the rounding of another arrangement of the same formula.
pub fn periodic_hann(n: usize) -> Vec<f64> {
    use std::f64::consts::PI;
    let step = 2.0 * PI / n as f64;
    (0..n)
        .map(|j| 0.5 + 0.5 * (-PI + j as f64 * step).cos())
        .collect()
}

/// Symmetric Hann of length `n`: `w[j] = 0.5 - 0.5 cos(2 pi j / (n - 1))`. Not COLA; kept for
/// the tests that show why the periodic form is used.
pub fn symmetric_hann(n: usize) -> Vec<f64> {
    if n < 2 {
        return vec![1.0; n];
    }
    (0..n)
        .map(|j| 0.5 - 0.5 * (2.0 * std::f64::consts::PI * j as f64 / (n - 1) as f64).cos())
        .collect()
}

/// The overlap-add sum of `w` shifted by multiples of `hop`, at each phase `0..hop`:
/// `s[j] = sum_m w[j + m * hop]`. A window is COLA at `hop` when these are all equal.
///
/// # Panics
/// If `hop` is 0.
pub fn overlap_add_sums(w: &[f64], hop: usize) -> Vec<f64> {
    assert!(hop > 0, "hop must be positive");
    (0..hop.min(w.len()))
        .map(|j| w.iter().skip(j).step_by(hop).sum())
        .collect()
}

/// Relative tolerance of the construction-time COLA check: far above rounding (sums of a few
/// cosines are exact to ~1e-15), far below any real departure from COLA (common practice).
const COLA_TOLERANCE: f64 = 1e-9;

#[derive(Debug, Clone, Copy, Default)]
struct Cell {
    weighted: f64,
    weight: f64,
    raw: f64,
    count: u32,
}

#[derive(Debug, Clone, PartialEq)]
enum Run {
    Values {
        start: u64,
        values: Vec<f64>,
    },
    Gap {
        start: u64,
        len: u64,
        reason: GapReason,
    },
}

/// Stitches the windows of one segment of one stream. See the module docs for the contract.
#[derive(Debug, Clone)]
pub struct Stitcher {
    config: StitchConfig,
    /// Weight applied to each input sample.
    synthesis: Vec<f64>,
    /// Weight the input sample carries after synthesis (analysis x synthesis), for the
    /// normaliser.
    effective: Vec<f64>,
    cells: VecDeque<Cell>,
    /// Every position before this has been emitted; `cells[0]` is this position.
    emitted: u64,
    next_start: u64,
    /// End of the last window slot pushed, present or missing.
    end: u64,
    /// Starts of runs of missing window slots and their reason, in position order.
    missing: VecDeque<(u64, GapReason)>,
    pending_gap: Option<(u64, u64, GapReason)>,
}

impl Stitcher {
    /// A stitcher at position 0 of a segment. Checks the hop and the COLA identity.
    pub fn new(config: StitchConfig) -> Result<Self, StitchError> {
        let n = config.window_len;
        let hop = config.hop_len;
        if hop == 0 || n < 2 || n % hop != 0 || n / hop < 2 {
            return Err(StitchError::HopNotCola { window_len: n, hop });
        }
        let hann = periodic_hann(n);
        let (synthesis, effective) = match config.window {
            SynthesisWindow::Hann => (hann.clone(), hann),
            SynthesisWindow::SqrtHannPair => {
                let root: Vec<f64> = hann.iter().map(|w| w.sqrt()).collect();
                let product = root.iter().map(|r| r * r).collect();
                (root, product)
            }
        };
        let sums = overlap_add_sums(&effective, hop);
        let min = sums.iter().copied().fold(f64::INFINITY, f64::min);
        let max = sums.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if (max - min).is_nan() || max - min > COLA_TOLERANCE * max.abs() {
            return Err(StitchError::NotCola { hop, min, max });
        }
        Ok(Self {
            config,
            synthesis,
            effective,
            cells: VecDeque::with_capacity(n),
            emitted: 0,
            next_start: 0,
            end: 0,
            missing: VecDeque::new(),
            pending_gap: None,
        })
    }

    /// The configuration.
    pub fn config(&self) -> &StitchConfig {
        &self.config
    }

    /// The synthesis weights applied to each input window.
    pub fn synthesis_weights(&self) -> &[f64] {
        &self.synthesis
    }

    /// Start of the next window slot expected.
    pub fn next_start(&self) -> u64 {
        self.next_start
    }

    /// Adds a reconstructed window starting at `start` and returns what is now final. Slots
    /// skipped between the previous window and `start` count as missing.
    pub fn push_window<T: Copy + Into<f64>>(
        &mut self,
        start: u64,
        samples: &[T],
    ) -> Result<Vec<StitchItem>, StitchError> {
        if samples.len() != self.config.window_len {
            return Err(StitchError::WrongLength {
                expected: self.config.window_len,
                got: samples.len(),
            });
        }
        let runs = self.push_inner(start, Some(samples))?;
        Ok(self.to_items(runs))
    }

    /// Declares the window slot at `start` missing for `reason` and returns what is now final.
    pub fn push_missing(
        &mut self,
        start: u64,
        reason: GapReason,
    ) -> Result<Vec<StitchItem>, StitchError> {
        let mut runs = self.push_inner::<f64>(start, None)?;
        // Nothing of this slot's span has been emitted yet, so the reason is in time.
        self.set_missing_reason(start, reason);
        let more = self.emit_upto(start + self.config.hop_len as u64);
        runs.extend(more);
        Ok(self.to_items(runs))
    }

    /// Emits everything left (the tail of the capture) and resets to position 0.
    pub fn finish(&mut self) -> Vec<StitchItem> {
        let mut runs = self.emit_upto(self.end);
        if let Some((start, len, reason)) = self.pending_gap.take() {
            runs.push(Run::Gap { start, len, reason });
        }
        self.cells.clear();
        self.emitted = 0;
        self.next_start = 0;
        self.end = 0;
        self.missing.clear();
        self.to_items(runs)
    }

    fn check_start(&self, start: u64) -> Result<(), StitchError> {
        if start % self.config.hop_len as u64 != 0 {
            return Err(StitchError::Misaligned {
                start,
                hop: self.config.hop_len,
            });
        }
        if start < self.next_start {
            return Err(StitchError::OutOfOrder {
                start,
                expected: self.next_start,
            });
        }
        Ok(())
    }

    fn set_missing_reason(&mut self, start: u64, reason: GapReason) {
        match self.missing.back_mut() {
            Some(last) if last.0 == start => last.1 = reason,
            Some(last) if last.1 == reason && last.0 < start => {}
            _ => self.missing.push_back((start, reason)),
        }
    }

    fn push_inner<T: Copy + Into<f64>>(
        &mut self,
        start: u64,
        samples: Option<&[T]>,
    ) -> Result<Vec<Run>, StitchError> {
        self.check_start(start)?;
        let n = self.config.window_len as u64;
        let hop = self.config.hop_len as u64;
        if start > self.next_start {
            self.set_missing_reason(self.next_start, GapReason::WindowMissing);
        }
        // Nothing at or after `start` is final yet, but everything before it is: no window
        // still to come starts before `start`.
        let mut runs = self.emit_upto(start);
        self.next_start = start + hop;
        self.end = self.end.max(start + n);
        let Some(samples) = samples else {
            return Ok(runs);
        };
        if let Some(&(at, _)) = self.missing.back() {
            // A present window ends the current run of missing slots.
            if at <= start {
                self.missing.push_back((start, GapReason::Unspecified));
            }
        }
        let offset = (start - self.emitted) as usize;
        let needed = offset + n as usize;
        if self.cells.len() < needed {
            self.cells.resize(needed, Cell::default());
        }
        for (j, &x) in samples.iter().enumerate() {
            let x: f64 = x.into();
            let cell = &mut self.cells[offset + j];
            cell.weighted += self.synthesis[j] * x;
            cell.weight += self.effective[j];
            cell.raw += x;
            cell.count += 1;
        }
        runs.extend(self.emit_upto(start + hop));
        Ok(runs)
    }

    fn reason_at(&self, p: u64) -> GapReason {
        self.missing
            .iter()
            .rev()
            .find(|(at, _)| *at <= p)
            .map_or(GapReason::Unspecified, |&(_, r)| r)
    }

    fn push_gap(&mut self, runs: &mut Vec<Run>, start: u64, len: u64, reason: GapReason) {
        match &mut self.pending_gap {
            Some((s, l, r)) if *s + *l == start && *r == reason => *l += len,
            pending => {
                if let Some((s, l, r)) = pending.take() {
                    runs.push(Run::Gap {
                        start: s,
                        len: l,
                        reason: r,
                    });
                }
                *pending = Some((start, len, reason));
            }
        }
    }

    fn push_value(&mut self, runs: &mut Vec<Run>, p: u64, value: f64) {
        if let Some((s, l, r)) = self.pending_gap.take() {
            runs.push(Run::Gap {
                start: s,
                len: l,
                reason: r,
            });
        }
        match runs.last_mut() {
            Some(Run::Values { start, values }) if *start + values.len() as u64 == p => {
                values.push(value)
            }
            _ => runs.push(Run::Values {
                start: p,
                values: vec![value],
            }),
        }
    }

    fn emit_upto(&mut self, upto: u64) -> Vec<Run> {
        let mut runs = Vec::new();
        while self.emitted < upto {
            let p = self.emitted;
            if let Some(cell) = self.cells.pop_front() {
                self.emitted += 1;
                if cell.count == 0 {
                    let reason = self.reason_at(p);
                    self.push_gap(&mut runs, p, 1, reason);
                } else if cell.weight > 0.0 {
                    self.push_value(&mut runs, p, cell.weighted / cell.weight);
                } else if self.config.window == SynthesisWindow::Hann {
                    self.push_value(&mut runs, p, cell.raw / cell.count as f64);
                } else {
                    self.push_gap(&mut runs, p, 1, GapReason::ZeroWeight);
                }
            } else {
                // Beyond every window pushed: uncovered up to the next change of reason.
                let next_change = self
                    .missing
                    .iter()
                    .map(|&(at, _)| at)
                    .find(|&at| at > p)
                    .unwrap_or(upto)
                    .min(upto);
                let reason = self.reason_at(p);
                self.push_gap(&mut runs, p, next_change - p, reason);
                self.emitted = next_change;
            }
        }
        let n = self.config.window_len as u64;
        // Reasons of slots whose span is fully emitted are no longer needed, except the last
        // one, which still names a run that may be going on.
        while self.missing.len() > 1 && self.missing[1].0 + n <= self.emitted {
            self.missing.pop_front();
        }
        runs
    }

    fn to_items(&self, runs: Vec<Run>) -> Vec<StitchItem> {
        runs.into_iter()
            .map(|run| match run {
                Run::Values { start, values } => StitchItem::Block {
                    start,
                    samples: values.into_iter().map(|v| v as f32).collect(),
                },
                Run::Gap { start, len, reason } => StitchItem::Gap { start, len, reason },
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A deterministic test signal: two tones plus a small pseudo-random part, so that every
    /// sample differs and a misplaced sample shows.
    fn signal(len: usize) -> Vec<f64> {
        let mut state: u64 = 0x2545_f491_4f6c_dd1d;
        (0..len)
            .map(|i| {
                state = state
                    .wrapping_mul(6_364_136_223_846_793_005)
                    .wrapping_add(1_442_695_040_888_963_407);
                let noise = (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5;
                let t = i as f64;
                (0.3 * t).sin() + 0.5 * (0.071 * t + 1.0).cos() + 0.1 * noise
            })
            .collect()
    }

    fn cut(x: &[f64], start: usize, n: usize) -> Vec<f64> {
        x[start..start + n].to_vec()
    }

    /// Flattens items into (position -> value) with NaN for gaps, checking that they are
    /// contiguous from 0 and do not overlap.
    fn flatten(items: &[StitchItem]) -> (Vec<f32>, Vec<(u64, u64, GapReason)>) {
        let mut out = Vec::new();
        let mut gaps = Vec::new();
        for item in items {
            match item {
                StitchItem::Block { start, samples } => {
                    assert_eq!(*start as usize, out.len(), "blocks contiguous");
                    assert!(!samples.is_empty());
                    out.extend_from_slice(samples);
                }
                StitchItem::Gap { start, len, reason } => {
                    assert_eq!(*start as usize, out.len(), "gaps contiguous");
                    assert!(*len > 0);
                    out.extend(std::iter::repeat_n(f32::NAN, *len as usize));
                    gaps.push((*start, *len, *reason));
                }
            }
        }
        (out, gaps)
    }

    // Periodic Hann N = 8, CHECK-VALUES 3.1 (= scipy.signal.get_window('hann', 8)).
    const HANN8_PERIODIC: [f64; 8] = [
        0.0,
        0.14644660940672627,
        0.5,
        0.8535533905932737,
        1.0,
        0.8535533905932737,
        0.5,
        0.14644660940672627,
    ];
    // Symmetric Hann N = 8 (scipy.signal.windows.hann(8)), CHECK-VALUES 3.1.
    const HANN8_SYMMETRIC_HALF: [f64; 4] = [
        0.0,
        0.18825509907063326,
        0.6112604669781572,
        0.9504844339512095,
    ];

    #[test]
    fn periodic_hann_matches_scipy_values() {
        let w = periodic_hann(8);
        for (a, b) in w.iter().zip(HANN8_PERIODIC) {
            assert!((a - b).abs() <= 1e-16, "{a} vs {b}");
            assert!(*a >= 0.0);
        }
        let s = symmetric_hann(8);
        for j in 0..4 {
            assert!((s[j] - HANN8_SYMMETRIC_HALF[j]).abs() <= 1e-15);
            assert!((s[7 - j] - HANN8_SYMMETRIC_HALF[j]).abs() <= 1e-15);
        }
    }

    // COLA identities, CHECK-VALUES 3.2 (Allen 1977; Griffin & Lim 1984).
    #[test]
    fn periodic_hann_at_half_hop_sums_to_one() {
        for s in overlap_add_sums(&periodic_hann(8), 4) {
            assert_eq!(s, 1.0, "exactly 1 at N = 8");
        }
        // CHECK-VALUES 3.2 says "within 4.4e-16"; scipy's own worst case there is exactly
        // 2^-51 = 4.44e-16 (two ulps of 1.0), so that is the bound asserted.
        let bound = f64::EPSILON * 2.0;
        for n in [1024, 4096] {
            for s in overlap_add_sums(&periodic_hann(n), n / 2) {
                assert!((s - 1.0).abs() <= bound, "N = {n}: {s}");
            }
        }
    }

    #[test]
    fn symmetric_hann_is_not_cola() {
        let sums = overlap_add_sums(&symmetric_hann(8), 4);
        let (lo, hi) = min_max(&sums);
        // CHECK-VALUES 3.2: 0.7995..0.9505 at N = 8.
        assert!(
            (lo - 0.7995).abs() < 1e-4 && (hi - 0.9505).abs() < 1e-4,
            "{lo} {hi}"
        );
        let sums = overlap_add_sums(&symmetric_hann(1024), 512);
        let (lo, hi) = min_max(&sums);
        // CHECK-VALUES 3.2: 0.99846..0.999998 at N = 1024.
        assert!(
            (lo - 0.99846).abs() < 1e-5 && (hi - 0.999998).abs() < 1e-6,
            "{lo} {hi}"
        );
    }

    #[test]
    fn sqrt_hann_pair_product_is_cola_but_the_root_is_not() {
        let w = periodic_hann(1024);
        let root: Vec<f64> = w.iter().map(|v| v.sqrt()).collect();
        let product: Vec<f64> = root.iter().map(|r| r * r).collect();
        for s in overlap_add_sums(&product, 512) {
            // 2^-51, as in periodic_hann_at_half_hop_sums_to_one.
            assert!((s - 1.0).abs() <= 2.0 * f64::EPSILON, "{s}");
        }
        let (lo, hi) = min_max(&overlap_add_sums(&root, 512));
        assert!(hi - lo > 0.1, "sqrt-Hann alone is not COLA: {lo}..{hi}");
    }

    #[test]
    fn hann_hann_needs_quarter_hop_and_sums_to_one_and_a_half() {
        let n = 1024;
        let w = periodic_hann(n);
        let sq: Vec<f64> = w.iter().map(|v| v * v).collect();
        let (lo, hi) = min_max(&overlap_add_sums(&sq, n / 2));
        // CHECK-VALUES 3.2: sum w^2 swings 0.5..1.0 at hop N/2.
        assert!(
            (lo - 0.5).abs() < 1e-12 && (hi - 1.0).abs() < 1e-12,
            "{lo} {hi}"
        );
        for s in overlap_add_sums(&sq, n / 4) {
            assert!((s - 1.5).abs() < 1e-14, "{s}");
        }
        for s in overlap_add_sums(&w, n / 4) {
            assert!((s - 2.0).abs() < 1e-14, "{s}");
        }
    }

    fn min_max(v: &[f64]) -> (f64, f64) {
        v.iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &x| {
                (a.min(x), b.max(x))
            })
    }

    #[test]
    fn construction_checks_the_hop() {
        let bad = |n, hop| {
            Stitcher::new(StitchConfig {
                window_len: n,
                hop_len: hop,
                window: SynthesisWindow::Hann,
            })
            .unwrap_err()
        };
        assert_eq!(
            bad(8, 3),
            StitchError::HopNotCola {
                window_len: 8,
                hop: 3
            }
        );
        assert!(matches!(bad(8, 8), StitchError::HopNotCola { .. }));
        assert!(matches!(bad(8, 0), StitchError::HopNotCola { .. }));
        for hop in [4, 2, 1] {
            assert!(Stitcher::new(StitchConfig {
                window_len: 8,
                hop_len: hop,
                window: SynthesisWindow::SqrtHannPair,
            })
            .is_ok());
        }
    }

    /// Runs the identity "solver" through the f64 path and returns every emitted value.
    fn stitch_identity_f64(x: &[f64], config: StitchConfig, windows: usize) -> Vec<f64> {
        let mut st = Stitcher::new(config).unwrap();
        let (n, hop) = (config.window_len, config.hop_len);
        let mut runs = Vec::new();
        for k in 0..windows {
            runs.extend(
                st.push_inner(k as u64 * hop as u64, Some(&cut(x, k * hop, n)))
                    .unwrap(),
            );
        }
        let end = st.end;
        runs.extend(st.emit_upto(end));
        let mut out = Vec::new();
        for run in runs {
            match run {
                Run::Values { start, values } => {
                    assert_eq!(start as usize, out.len());
                    out.extend(values);
                }
                Run::Gap { .. } => panic!("no gaps expected"),
            }
        }
        out
    }

    #[test]
    fn identity_windows_come_back_exactly_in_f64() {
        for (n, hop) in [(64, 32), (64, 16), (1024, 512), (8, 4)] {
            let windows = 9;
            let total = (windows - 1) * hop + n;
            let x = signal(total);
            let out = stitch_identity_f64(
                &x,
                StitchConfig {
                    window_len: n,
                    hop_len: hop,
                    window: SynthesisWindow::Hann,
                },
                windows,
            );
            assert_eq!(out.len(), total, "n {n} hop {hop}: capture edges included");
            for (p, (a, b)) in out.iter().zip(&x).enumerate() {
                assert!((a - b).abs() <= 1e-12, "n {n} hop {hop} p {p}: {a} vs {b}");
            }
        }
    }

    #[test]
    fn identity_windows_come_back_in_f32_across_boundaries_and_edges() {
        let (n, hop, windows) = (256, 128, 12);
        let total = (windows - 1) * hop + n;
        let x = signal(total);
        let mut st = Stitcher::new(StitchConfig::half_overlap(n)).unwrap();
        let mut items = Vec::new();
        for k in 0..windows {
            let w: Vec<f32> = cut(&x, k * hop, n).iter().map(|&v| v as f32).collect();
            let got = st.push_window(k as u64 * hop as u64, &w).unwrap();
            // Only samples before the next window's start may be final.
            for item in &got {
                if let StitchItem::Block { start, samples } = item {
                    assert!(*start as usize + samples.len() <= (k + 1) * hop);
                }
            }
            items.extend(got);
        }
        items.extend(st.finish());
        let (out, gaps) = flatten(&items);
        assert!(gaps.is_empty());
        assert_eq!(out.len(), total);
        for (p, (a, b)) in out.iter().zip(&x).enumerate() {
            assert!((*a as f64 - b).abs() <= 1e-6, "p {p}: {a} vs {b}");
        }
        // The first and last half-windows are the single covering window's values, untapered.
        assert_eq!(out[0], x[0] as f32);
        assert_eq!(out[total - 1], x[total - 1] as f32);
    }

    #[test]
    fn sqrt_hann_pair_returns_analysis_tapered_input_except_the_zero_weight_sample() {
        let (n, hop, windows) = (64, 32, 6);
        let total = (windows - 1) * hop + n;
        let x = signal(total);
        let root: Vec<f64> = periodic_hann(n).iter().map(|v| v.sqrt()).collect();
        let mut st = Stitcher::new(StitchConfig {
            window_len: n,
            hop_len: hop,
            window: SynthesisWindow::SqrtHannPair,
        })
        .unwrap();
        let mut items = Vec::new();
        for k in 0..windows {
            let w: Vec<f64> = (0..n).map(|j| root[j] * x[k * hop + j]).collect();
            items.extend(st.push_window(k as u64 * hop as u64, &w).unwrap());
        }
        items.extend(st.finish());
        let (out, gaps) = flatten(&items);
        assert_eq!(gaps, vec![(0, 1, GapReason::ZeroWeight)]);
        for p in 1..total {
            assert!((out[p] as f64 - x[p]).abs() <= 1e-6, "p {p}");
        }
    }

    fn run_with_missing(
        n: usize,
        hop: usize,
        windows: usize,
        missing: &[(usize, Option<GapReason>)],
    ) -> (Vec<f64>, Vec<f32>, Vec<(u64, u64, GapReason)>) {
        let total = (windows - 1) * hop + n;
        let x = signal(total);
        let mut st = Stitcher::new(StitchConfig {
            window_len: n,
            hop_len: hop,
            window: SynthesisWindow::Hann,
        })
        .unwrap();
        let mut items = Vec::new();
        for k in 0..windows {
            let start = (k * hop) as u64;
            match missing.iter().find(|(m, _)| *m == k) {
                Some((_, Some(reason))) => items.extend(st.push_missing(start, *reason).unwrap()),
                Some((_, None)) => {} // skipped: the next start jumps
                None => items.extend(st.push_window(start, &cut(&x, k * hop, n)).unwrap()),
            }
        }
        items.extend(st.finish());
        let (out, gaps) = flatten(&items);
        (x, out, gaps)
    }

    fn assert_equal_outside(x: &[f64], out: &[f32], gaps: &[(u64, u64, GapReason)]) {
        for (p, v) in out.iter().enumerate() {
            let in_gap = gaps
                .iter()
                .any(|&(s, l, _)| (p as u64) >= s && (p as u64) < s + l);
            if in_gap {
                assert!(v.is_nan(), "p {p} should be NaN");
            } else {
                assert!((*v as f64 - x[p]).abs() <= 1e-6, "p {p}: {v} vs {}", x[p]);
            }
        }
    }

    #[test]
    fn one_missing_window_is_covered_by_its_neighbours() {
        // n 8, hop 4: window 2 spans 8..16; window 1 covers 4..12 and window 3 covers 12..20.
        let (x, out, gaps) = run_with_missing(8, 4, 6, &[(2, Some(GapReason::WindowMissing))]);
        assert!(gaps.is_empty());
        assert_eq!(out.len(), x.len());
        assert_equal_outside(&x, &out, &gaps);
    }

    #[test]
    fn two_missing_windows_leave_a_gap_of_the_uncovered_samples_only() {
        // Windows 2 (8..16) and 3 (12..20) missing: window 1 ends at 12, window 4 starts at
        // 16, so 12..16 is uncovered; 8..12 and 16..20 come from one window each.
        let (x, out, gaps) = run_with_missing(
            8,
            4,
            7,
            &[
                (2, Some(GapReason::WindowRejected)),
                (3, Some(GapReason::WindowRejected)),
            ],
        );
        assert_eq!(gaps, vec![(12, 4, GapReason::WindowRejected)]);
        assert_eq!(out.len(), x.len());
        assert_equal_outside(&x, &out, &gaps);
    }

    #[test]
    fn skipped_windows_become_one_gap_of_reason_window_missing() {
        // Windows 2..=9 skipped at n 8, hop 4: window 1 ends at 12, window 10 starts at 40.
        let skipped: Vec<(usize, Option<GapReason>)> = (2..=9).map(|k| (k, None)).collect();
        let (x, out, gaps) = run_with_missing(8, 4, 12, &skipped);
        assert_eq!(gaps, vec![(12, 28, GapReason::WindowMissing)]);
        assert_equal_outside(&x, &out, &gaps);
    }

    #[test]
    fn missing_first_and_last_windows_give_gaps_at_the_capture_edges() {
        // Window 0 (0..8) missing: 0..4 uncovered. Last window 5 (20..28) missing: window 4
        // ends at 24, so 24..28 is uncovered and finish() reports it.
        let (x, out, gaps) = run_with_missing(
            8,
            4,
            6,
            &[
                (0, Some(GapReason::CaptureRestart)),
                (5, Some(GapReason::WindowMissing)),
            ],
        );
        assert_eq!(
            gaps,
            vec![
                (0, 4, GapReason::CaptureRestart),
                (24, 4, GapReason::WindowMissing)
            ]
        );
        assert_eq!(out.len(), 28);
        assert_equal_outside(&x, &out, &gaps);
    }

    #[test]
    fn contract_violations_are_typed_errors() {
        let mut st = Stitcher::new(StitchConfig::half_overlap(8)).unwrap();
        assert_eq!(
            st.push_window(3, &[0.0f32; 8]).unwrap_err(),
            StitchError::Misaligned { start: 3, hop: 4 }
        );
        assert_eq!(
            st.push_window(0, &[0.0f32; 7]).unwrap_err(),
            StitchError::WrongLength {
                expected: 8,
                got: 7
            }
        );
        st.push_window(4, &[1.0f32; 8]).unwrap();
        assert_eq!(
            st.push_window(4, &[1.0f32; 8]).unwrap_err(),
            StitchError::OutOfOrder {
                start: 4,
                expected: 8
            }
        );
    }

    #[test]
    fn finish_resets_for_the_next_capture() {
        let mut st = Stitcher::new(StitchConfig::half_overlap(8)).unwrap();
        st.push_window(0, &[2.0f32; 8]).unwrap();
        let tail = st.finish();
        assert_eq!(
            tail,
            vec![StitchItem::Block {
                start: 4,
                samples: vec![2.0; 4]
            }]
        );
        assert_eq!(st.next_start(), 0);
        let again = st.push_window(0, &[3.0f32; 8]).unwrap();
        assert_eq!(
            again,
            vec![StitchItem::Block {
                start: 0,
                samples: vec![3.0; 4]
            }]
        );
    }

    #[test]
    fn gap_reason_codes_round_trip() {
        for code in 0..=5u8 {
            assert_eq!(GapReason::from_code(code).unwrap().code(), code);
        }
        assert_eq!(GapReason::from_code(6), None);
    }
}
