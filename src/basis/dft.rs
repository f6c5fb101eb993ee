//! Orthonormal real Fourier basis (cosine/sine pairs), for tonal signals whose components are
//! closer to DFT bins than to DCT bins. Built on realfft's real-to-complex FFT.
//!
//! # Coefficient order and scaling
//!
//! For length `n`, with `theta_k[j] = 2 pi k j / n`, the basis vectors (columns of `Psi`) are,
//! in coefficient order:
//!
//! | index | vector | norm factor |
//! |---|---|---|
//! | 0 | DC: `1` | `1/sqrt(n)` |
//! | `2k-1` | `cos(theta_k)`, `k = 1..=(n-1)/2` | `sqrt(2/n)` |
//! | `2k` | `sin(theta_k)`, `k = 1..=(n-1)/2` | `sqrt(2/n)` |
//! | `n-1` (even `n` only) | Nyquist: `(-1)^j` | `1/sqrt(n)` |
//!
//! i.e. `[DC, cos_1, sin_1, cos_2, sin_2, ..., (cos_{n/2} for even n)]`. In terms of
//! `R = numpy.fft.rfft(x)` (unnormalized, `R[k] = sum_j x[j] e^{-i theta_k[j]}`), analysis gives
//! `c_0 = R[0]/sqrt(n)`, `c_{2k-1} = sqrt(2/n) Re R[k]`, `c_{2k} = -sqrt(2/n) Im R[k]` and, for
//! even `n`, `c_{n-1} = R[n/2]/sqrt(n)`. These vectors are orthonormal, so `Psi^T = Psi^-1`
//! and energy is preserved (any DSP text, e.g. Oppenheim & Schafer; from memory).

use super::{length_mismatch, Basis, BasisError, BasisKind, BasisScratch};
use crate::real::Real;
use num_complex::Complex;
use realfft::{ComplexToReal, RealFftPlanner, RealToComplex};
use std::fmt;
use std::sync::Arc;

/// Orthonormal real Fourier basis; see the [module docs](self) for the coefficient order.
///
/// - **Scaling**: orthonormal (DC and Nyquist `1/sqrt(n)`, cos/sin pairs `sqrt(2/n)`).
/// - **Coefficient order**: `[DC, cos_1, sin_1, ..., cos_m, sin_m, (Nyquist)]`; coefficient `i`
///   belongs to DFT bin `(i + 1) / 2` at `((i + 1) / 2) * fs / n` Hz.
/// - **Valid lengths**: any `n >= 1` (odd `n` has no Nyquist term).
#[derive(Clone)]
pub struct RealFourier<T: Real> {
    len: usize,
    forward: Arc<dyn RealToComplex<T>>,
    inverse: Arc<dyn ComplexToReal<T>>,
    /// `sqrt(1/n)`: DC and Nyquist.
    edge_scale: T,
    /// Analysis scale for the pairs, `sqrt(2/n)`.
    pair_analysis: T,
    /// Synthesis scale for the pairs, `1/sqrt(2n)` (the c2r FFT sums both half-spectra).
    pair_synthesis: T,
    fft_scratch_len: usize,
}

impl<T: Real> fmt::Debug for RealFourier<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("RealFourier")
            .field("len", &self.len)
            .finish()
    }
}

impl<T: Real> RealFourier<T> {
    /// Plans the basis of length `len` with its own FFT planner.
    ///
    /// # Errors
    /// [`BasisError::BadLength`] if `len == 0`.
    pub fn new(len: usize) -> Result<Self, BasisError> {
        Self::with_planner(len, &mut RealFftPlanner::new())
    }

    /// Plans the basis of length `len`, taking the real FFTs from `planner`.
    ///
    /// # Errors
    /// [`BasisError::BadLength`] if `len == 0`.
    pub fn with_planner(len: usize, planner: &mut RealFftPlanner<T>) -> Result<Self, BasisError> {
        if len == 0 {
            return Err(BasisError::BadLength {
                kind: BasisKind::Fourier,
                len,
                why: "the length must be at least 1".into(),
            });
        }
        let forward = planner.plan_fft_forward(len);
        let inverse = planner.plan_fft_inverse(len);
        let fft_scratch_len = forward.get_scratch_len().max(inverse.get_scratch_len());
        let n = len as f64;
        Ok(Self {
            len,
            forward,
            inverse,
            edge_scale: T::of((1.0 / n).sqrt()),
            pair_analysis: T::of((2.0 / n).sqrt()),
            pair_synthesis: T::of((1.0 / (2.0 * n)).sqrt()),
            fft_scratch_len,
        })
    }

    /// Number of cos/sin pairs: bins `1..=pairs` (Nyquist excluded).
    fn pairs(&self) -> usize {
        (self.len - 1) / 2
    }
}

impl<T: Real> Basis<T> for RealFourier<T> {
    fn kind(&self) -> BasisKind {
        BasisKind::Fourier
    }

    fn len(&self) -> usize {
        self.len
    }

    fn synthesize(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        let n = self.len;
        if buf.len() != n {
            length_mismatch(n, buf.len());
        }
        let bins = n / 2 + 1;
        let (_, work) = scratch.take(0, bins + self.fft_scratch_len);
        let (spec, fft_scratch) = work.split_at_mut(bins);
        // x[j] = R0 + 2 sum_k Re(R_k e^{i theta}) (+ R_{n/2} (-1)^j) is what the c2r FFT
        // computes; R_k = (c_cos - i c_sin) / sqrt(2n) gives sqrt(2/n)(c_cos cos + c_sin sin).
        spec[0] = Complex::new(buf[0] * self.edge_scale, T::zero());
        for k in 1..=self.pairs() {
            spec[k] = Complex::new(buf[2 * k - 1], -buf[2 * k]) * self.pair_synthesis;
        }
        if n % 2 == 0 && n > 1 {
            spec[n / 2] = Complex::new(buf[n - 1] * self.edge_scale, T::zero());
        }
        // The imaginary parts of DC and Nyquist are exactly zero, so realfft's input check
        // cannot fail; lengths are fixed at planning.
        self.inverse
            .process_with_scratch(spec, buf, fft_scratch)
            .expect("c2r input is valid by construction");
    }

    fn analyze(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        let n = self.len;
        if buf.len() != n {
            length_mismatch(n, buf.len());
        }
        let bins = n / 2 + 1;
        let (_, work) = scratch.take(0, bins + self.fft_scratch_len);
        let (spec, fft_scratch) = work.split_at_mut(bins);
        self.forward
            .process_with_scratch(buf, spec, fft_scratch)
            .expect("lengths fixed at planning");
        buf[0] = spec[0].re * self.edge_scale;
        for k in 1..=self.pairs() {
            buf[2 * k - 1] = spec[k].re * self.pair_analysis;
            buf[2 * k] = -spec[k].im * self.pair_analysis;
        }
        if n % 2 == 0 && n > 1 {
            buf[n - 1] = spec[n / 2].re * self.edge_scale;
        }
    }

    fn coefficient_freq_hz(&self, k: usize, sample_rate_hz: f64) -> Option<f64> {
        (k < self.len).then(|| k.div_ceil(2) as f64 * sample_rate_hz / self.len as f64)
    }
}
