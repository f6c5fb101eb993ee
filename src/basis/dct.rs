//! Orthonormal DCT-II (analysis) and DCT-III (synthesis), the default sparsity basis for
//! vibration windows.
//!
//! Both directions run on one n-point complex FFT after the even/odd reordering of Makhoul
//! (J. Makhoul, "A fast cosine transform in one and multiple dimensions", IEEE Trans. ASSP
//! 28(1), 1980), with the orthonormal scaling folded into precomputed twiddles.
//!
//! The inverse runs the same forward FFT on the conjugate, so one plan serves both directions.
//!
//! Why this backend: `benches/basis.rs` group `dct_backend` times one analysis plus one
//! synthesis at n = 4096 (criterion medians, 2 shared cores under other builds, so absolute
//! figures are inflated; each cell is "quieter run / loaded run", same ranking in both):
//!
//! | backend | f32 | f64 |
//! |---|---|---|
//! | Makhoul over one n-point complex FFT (this file) | 26.5 us / 71.7 us | 53.6 us / 107 us |
//! | Makhoul over realfft (half-length FFT) | 35.4 us / 95.1 us | 44.8 us / 75.2 us |
//! | rustdct `plan_dct2` / `plan_dct3` + scaling | 64.0 us / 133 us | 74.0 us / 147 us |
//!
//! f32 is the production precision of the solver loop, and there the complex-FFT route is
//! fastest; in f64 realfft is ~20-30% quicker, which is a candidate follow-up if f64 windows
//! turn out to matter.

use super::{length_mismatch, Basis, BasisError, BasisKind, BasisScratch};
use crate::real::Real;
use num_complex::Complex;
use rustfft::{Fft, FftPlanner};
use std::fmt;
use std::sync::Arc;

/// Orthonormal DCT basis: `analyze` is scipy's `dct(x, type=2, norm='ortho')`, `synthesize`
/// is `dct(X, type=3, norm='ortho')` (= `idct(X, type=2, norm='ortho')`).
///
/// - **Scaling**: `X[k] = s_k sum_j x[j] cos(pi k (2j+1) / (2n))` with `s_0 = sqrt(1/n)` and
///   `s_k = sqrt(2/n)` for `k >= 1`, so the matrix is orthogonal and `sum x^2 = sum X^2`
///   (Ahmed, Natarajan & Rao, IEEE Trans. Computers, 1974; Rao & Yip, 1990).
/// - **Coefficient order**: `k = 0..n-1`, ascending frequency; coefficient `k` is a cosine at
///   `k * fs / (2n)` Hz.
/// - **Valid lengths**: any `n >= 1`; lengths with small prime factors are fastest (RustFFT).
#[derive(Clone)]
pub struct Dct<T: Real> {
    len: usize,
    fft: Arc<dyn Fft<T>>,
    /// `s_k * exp(-i pi k / (2n))`: analysis post-twiddle with the orthonormal scale.
    twiddle_analysis: Vec<Complex<T>>,
    /// `exp(+i pi k / (2n)) / (n s_k)`, conjugated for the forward-FFT-as-inverse trick.
    twiddle_synthesis: Vec<Complex<T>>,
    fft_scratch_len: usize,
}

impl<T: Real> fmt::Debug for Dct<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Dct").field("len", &self.len).finish()
    }
}

impl<T: Real> Dct<T> {
    /// Plans an orthonormal DCT of length `len` with its own FFT planner.
    ///
    /// # Errors
    /// [`BasisError::BadLength`] if `len == 0`.
    pub fn new(len: usize) -> Result<Self, BasisError> {
        Self::with_planner(len, &mut FftPlanner::new())
    }

    /// Plans an orthonormal DCT of length `len`, taking the FFT from `planner` (so FFTs of the
    /// same length are shared).
    ///
    /// # Errors
    /// [`BasisError::BadLength`] if `len == 0`.
    pub fn with_planner(len: usize, planner: &mut FftPlanner<T>) -> Result<Self, BasisError> {
        if len == 0 {
            return Err(BasisError::BadLength {
                kind: BasisKind::Dct,
                len,
                why: "the length must be at least 1".into(),
            });
        }
        let fft = planner.plan_fft_forward(len);
        let n = len as f64;
        let scale = |k: usize| {
            if k == 0 {
                (1.0 / n).sqrt()
            } else {
                (2.0 / n).sqrt()
            }
        };
        let mut twiddle_analysis = Vec::with_capacity(len);
        let mut twiddle_synthesis = Vec::with_capacity(len);
        for k in 0..len {
            // Angles in f64 even for f32 so the twiddles are correctly rounded.
            let theta = -std::f64::consts::PI * k as f64 / (2.0 * n);
            let (s, c) = theta.sin_cos();
            let a = scale(k);
            twiddle_analysis.push(Complex::new(T::of(a * c), T::of(a * s)));
            // The inverse needs exp(+i pi k/(2n)) / (n s_k); conjugated (see `synthesize`).
            let b = 1.0 / (n * a);
            twiddle_synthesis.push(Complex::new(T::of(b * c), T::of(b * s)));
        }
        let fft_scratch_len = fft.get_inplace_scratch_len();
        Ok(Self {
            len,
            fft,
            twiddle_analysis,
            twiddle_synthesis,
            fft_scratch_len,
        })
    }
}

impl<T: Real> Basis<T> for Dct<T> {
    fn kind(&self) -> BasisKind {
        BasisKind::Dct
    }

    fn len(&self) -> usize {
        self.len
    }

    fn synthesize(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        let n = self.len;
        if buf.len() != n {
            length_mismatch(n, buf.len());
        }
        let (_, work) = scratch.take(0, n + self.fft_scratch_len);
        let (v, fft_scratch) = work.split_at_mut(n);
        // Makhoul's inverse: V[k] = exp(i pi k/(2n)) (X[k] - i X[n-k]) with X unnormalized,
        // v = IFFT(V). We build conj(V) and run the forward FFT: Re(FFT(conj V)) = n Re(IFFT V),
        // and the 1/n sits in the twiddle.
        v[0] = Complex::new(buf[0] * self.twiddle_synthesis[0].re, T::zero());
        for k in 1..n {
            let z = Complex::new(buf[k], buf[n - k]); // conj(X[k] - i X[n-k])
            v[k] = z * self.twiddle_synthesis[k];
        }
        self.fft.process_with_scratch(v, fft_scratch);
        let half = n.div_ceil(2);
        for j in 0..half {
            buf[2 * j] = v[j].re;
        }
        for j in 0..n / 2 {
            buf[2 * j + 1] = v[n - 1 - j].re;
        }
    }

    fn synthesize_at(
        &self,
        coeffs: &[T],
        indices: &[usize],
        out: &mut [T],
        _grid: &mut [T],
        scratch: &mut BasisScratch<T>,
    ) {
        let n = self.len;
        if coeffs.len() != n {
            length_mismatch(n, coeffs.len());
        }
        let (_, work) = scratch.take(0, n + self.fft_scratch_len);
        let (v, fft_scratch) = work.split_at_mut(n);
        // As `synthesize`, reading the coefficients in place and the FFT output only at the
        // sampled instants: grid index 2j is v[j], 2j + 1 is v[n - 1 - j].
        v[0] = Complex::new(coeffs[0] * self.twiddle_synthesis[0].re, T::zero());
        for k in 1..n {
            v[k] = Complex::new(coeffs[k], coeffs[n - k]) * self.twiddle_synthesis[k];
        }
        self.fft.process_with_scratch(v, fft_scratch);
        for (o, &i) in out.iter_mut().zip(indices) {
            let j = i >> 1;
            *o = v[if i & 1 == 0 { j } else { n - 1 - j }].re;
        }
    }

    fn analyze_from(
        &self,
        indices: &[usize],
        values: &[T],
        out: &mut [T],
        scratch: &mut BasisScratch<T>,
    ) {
        let n = self.len;
        if out.len() != n {
            length_mismatch(n, out.len());
        }
        let (_, work) = scratch.take(0, n + self.fft_scratch_len);
        let (v, fft_scratch) = work.split_at_mut(n);
        // As `analyze`, scattering the samples straight into Makhoul's reordered buffer.
        v.fill(Complex::new(T::zero(), T::zero()));
        for (&x, &i) in values.iter().zip(indices) {
            let j = i >> 1;
            v[if i & 1 == 0 { j } else { n - 1 - j }] = Complex::new(x, T::zero());
        }
        self.fft.process_with_scratch(v, fft_scratch);
        for ((o, z), w) in out.iter_mut().zip(v.iter()).zip(&self.twiddle_analysis) {
            *o = z.re * w.re - z.im * w.im;
        }
    }

    fn analyze(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        let n = self.len;
        if buf.len() != n {
            length_mismatch(n, buf.len());
        }
        let (_, work) = scratch.take(0, n + self.fft_scratch_len);
        let (v, fft_scratch) = work.split_at_mut(n);
        // Makhoul's reordering: even samples ascending, then odd samples descending.
        let half = n.div_ceil(2);
        for j in 0..half {
            v[j] = Complex::new(buf[2 * j], T::zero());
        }
        for j in 0..n / 2 {
            v[n - 1 - j] = Complex::new(buf[2 * j + 1], T::zero());
        }
        self.fft.process_with_scratch(v, fft_scratch);
        for ((out, z), w) in buf.iter_mut().zip(v.iter()).zip(&self.twiddle_analysis) {
            *out = z.re * w.re - z.im * w.im;
        }
    }

    fn coefficient_freq_hz(&self, k: usize, sample_rate_hz: f64) -> Option<f64> {
        (k < self.len).then(|| k as f64 * sample_rate_hz / (2.0 * self.len as f64))
    }
}

#[cfg(test)]
// Reference values are copied digit for digit as published, trailing zeros included.
#[allow(clippy::excessive_precision)]
mod tests {
    use super::*;

    // scipy.fft.dct(x, type=2, norm='ortho') for x = [1, -2, 3, 0.5, -1, 4, 2, -3] (scipy 1.17.1).
    const X8: [f64; 8] = [1.0, -2.0, 3.0, 0.5, -1.0, 4.0, 2.0, -3.0];
    const DCT_X8: [f64; 8] = [
        1.590990257669732,
        0.167163961203666,
        -2.032301662661279,
        2.126834834074261,
        -3.358757210636100,
        3.598768075064510,
        2.946565789515686,
        0.349997343617765,
    ];

    #[test]
    fn matches_scipy_n8_and_round_trips() {
        let dct = Dct::<f64>::new(8).unwrap();
        let mut s = BasisScratch::new();
        let mut b = X8;
        dct.analyze(&mut b, &mut s);
        for (got, want) in b.iter().zip(DCT_X8) {
            assert!((got - want).abs() < 1e-12, "{got} vs {want}");
        }
        dct.synthesize(&mut b, &mut s);
        for (got, want) in b.iter().zip(X8) {
            assert!((got - want).abs() < 1e-12);
        }
    }
}
