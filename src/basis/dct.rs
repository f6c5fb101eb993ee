//! Orthonormal DCT-II (analysis) and DCT-III (synthesis), the default sparsity basis for
//! vibration windows.
//!
//! Both directions follow the even/odd reordering of Makhoul (J. Makhoul, "A fast cosine
//! transform in one and multiple dimensions", IEEE Trans. ASSP 28(1), 1980), with the
//! orthonormal scaling folded into precomputed twiddles. For even n the reordered real sequence
//! is packed into n/2 complex values and transformed by one n/2-point complex FFT, with the
//! real-FFT split fused into Makhoul's twiddle pass (see `Half`); odd n use one n-point complex
//! FFT (see `Full`).
//!
//! Why this backend: `benches/basis.rs` group `dct_backend` times one analysis plus one
//! synthesis at n = 4096, and the sampled pair of one FISTA iteration (scattered analysis plus
//! synthesis read at m = n/4 instants). Criterion medians, 2026-12-03, 2-core AMD EPYC virtual
//! machine, otherwise idle (`cargo bench --bench basis -- dct_backend`):
//!
//! | backend | f32 | f64 |
//! |---|---|---|
//! | Makhoul over one n/2-point complex FFT, fused split (this file, even n) | 24.5 us | 46.0 us |
//! | the same, sampled pair | 23.3 us | 43.1 us |
//! | Makhoul over one n-point complex FFT (the previous default; odd n) | 38.5 us | 76.5 us |
//! | the same, sampled pair | 40.8 us | 71.0 us |
//! | Makhoul over realfft (half-length FFT, separate split pass) | 35.9 us | 51.6 us |
//! | rustdct `plan_dct2` / `plan_dct3` + scaling | 68.7 us | 76.9 us |

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
    path: Path<T>,
}

/// How the transform runs: even lengths on one half-length complex FFT, odd lengths on one
/// full-length complex FFT.
#[derive(Clone)]
enum Path<T: Real> {
    Full(Full<T>),
    Half(Box<Half<T>>),
}

/// Makhoul over one n-point complex FFT (odd n).
#[derive(Clone)]
struct Full<T: Real> {
    fft: Arc<dyn Fft<T>>,
    /// `s_k * exp(-i pi k / (2n))`: analysis post-twiddle with the orthonormal scale.
    twiddle_analysis: Vec<Complex<T>>,
    /// `exp(+i pi k / (2n)) / (n s_k)`, conjugated for the forward-FFT-as-inverse trick.
    twiddle_synthesis: Vec<Complex<T>>,
    fft_scratch_len: usize,
}

/// `(z, fft_scratch)` of [`Half::analysis_buffers`].
type AnalysisBuffers<'a, T> = (&'a mut [Complex<T>], &'a mut [Complex<T>]);

/// Makhoul over one (n/2)-point complex FFT (even n).
///
/// Makhoul's reordered real sequence `v` (length n) is read as n/2 complex values
/// `z[j] = v[2j] + i v[2j+1]` (the packing of a real FFT), so the real n-point FFT of `v` costs one
/// n/2-point complex FFT plus one split pass (the standard real-FFT packing; e.g. Press et
/// al., Numerical Recipes, 3rd ed., section 12.3). The split pass is fused with Makhoul's
/// twiddle and the orthonormal scale, so each direction is: one gather or scatter, one
/// half-length FFT, one fused pass. Coefficients are stored split into real and imaginary
/// arrays so the fused loops vectorize.
///
/// Why by hand: realfft does the same packing but writes the n/2 + 1 spectrum to a separate
/// buffer in its own pass, and Makhoul's twiddle then needs a second pass over it; the fused
/// pass here measured faster (`benches/basis.rs`, group `dct_backend`).
#[derive(Clone)]
struct Half<T: Real> {
    fwd: Arc<dyn Fft<T>>,
    inv: Arc<dyn Fft<T>>,
    /// Analysis, for k = 0..=n/2: `X[k] = Re(c1 Z[k] + c2 conj Z[n/2-k])`.
    c1: Split<T>,
    c2: Split<T>,
    /// Analysis, for k = 1..n/2: `X[n-k] = Re(d1 Z[k] + d2 conj Z[n/2-k])`, stored with k
    /// descending.
    d1: Split<T>,
    d2: Split<T>,
    /// Synthesis, for k = 0..n/2: `Z[k] = (X[k] - i X[n-k]) e + (X[n/2-k] + i X[n/2+k]) f`.
    e: Split<T>,
    f: Split<T>,
    fft_scratch_len: usize,
}

/// Complex coefficients stored as separate real and imaginary arrays.
#[derive(Clone, Default)]
struct Split<T> {
    re: Vec<T>,
    im: Vec<T>,
}

impl<T: Real> Split<T> {
    fn from_fn(len: usize, f: impl Fn(usize) -> (f64, f64)) -> Self {
        let (re, im) = (0..len).map(f).map(|(a, b)| (T::of(a), T::of(b))).unzip();
        Self { re, im }
    }
}

/// `(re, im)` products in f64, for the coefficient tables.
fn cmul(a: (f64, f64), b: (f64, f64)) -> (f64, f64) {
    (a.0 * b.0 - a.1 * b.1, a.0 * b.1 + a.1 * b.0)
}

fn conj(a: (f64, f64)) -> (f64, f64) {
    (a.0, -a.1)
}

fn expi(theta: f64) -> (f64, f64) {
    let (s, c) = theta.sin_cos();
    (c, s)
}

impl<T: Real> fmt::Debug for Dct<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Dct")
            .field("len", &self.len)
            .field(
                "fft",
                &match self.path {
                    Path::Full(_) => "n-point complex",
                    Path::Half(_) => "n/2-point complex",
                },
            )
            .finish()
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

    /// Plans the n-point complex FFT route for any length, even where the half-length route
    /// applies: the previous default, kept for the backend comparison in `benches/basis.rs`
    /// and the agreement test.
    ///
    /// # Errors
    /// [`BasisError::BadLength`] if `len == 0`.
    pub fn with_full_length_fft(len: usize) -> Result<Self, BasisError> {
        if len == 0 {
            return Self::new(len); // the same error
        }
        Ok(Self {
            len,
            path: Path::Full(Full::new(len, &mut FftPlanner::new())),
        })
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
        let path = if len % 2 == 0 {
            Path::Half(Box::new(Half::new(len, planner)))
        } else {
            Path::Full(Full::new(len, planner))
        };
        Ok(Self { len, path })
    }
}

/// The orthonormal DCT scale `s_k`.
fn scale(n: usize, k: usize) -> f64 {
    if k == 0 {
        (1.0 / n as f64).sqrt()
    } else {
        (2.0 / n as f64).sqrt()
    }
}

impl<T: Real> Full<T> {
    fn new(len: usize, planner: &mut FftPlanner<T>) -> Self {
        let fft = planner.plan_fft_forward(len);
        let n = len as f64;
        let mut twiddle_analysis = Vec::with_capacity(len);
        let mut twiddle_synthesis = Vec::with_capacity(len);
        for k in 0..len {
            // Angles in f64 even for f32 so the twiddles are correctly rounded.
            let (c, s) = expi(-std::f64::consts::PI * k as f64 / (2.0 * n));
            let a = scale(len, k);
            twiddle_analysis.push(Complex::new(T::of(a * c), T::of(a * s)));
            // The inverse needs exp(+i pi k/(2n)) / (n s_k); conjugated (see `synthesize`).
            let b = 1.0 / (n * a);
            twiddle_synthesis.push(Complex::new(T::of(b * c), T::of(b * s)));
        }
        let fft_scratch_len = fft.get_inplace_scratch_len();
        Self {
            fft,
            twiddle_analysis,
            twiddle_synthesis,
            fft_scratch_len,
        }
    }

    /// Makhoul's inverse into `v` (length n): `v[p]` is the signal at Makhoul position `p`
    /// (grid index `2p` for `p < ceil(n/2)`, else `2(n-1-p)+1`), in the real parts.
    fn synthesize_into(&self, coeffs: &[T], v: &mut [Complex<T>], fft_scratch: &mut [Complex<T>]) {
        let n = coeffs.len();
        // Makhoul's inverse: V[k] = exp(i pi k/(2n)) (X[k] - i X[n-k]) with X unnormalized,
        // v = IFFT(V). We build conj(V) and run the forward FFT: Re(FFT(conj V)) = n Re(IFFT V),
        // and the 1/n sits in the twiddle.
        v[0] = Complex::new(coeffs[0] * self.twiddle_synthesis[0].re, T::zero());
        for k in 1..n {
            v[k] = Complex::new(coeffs[k], coeffs[n - k]) * self.twiddle_synthesis[k];
        }
        self.fft.process_with_scratch(v, fft_scratch);
    }

    /// Makhoul's forward from `v` (real parts filled in Makhoul order) into `out`.
    fn analyze_from_v(&self, v: &mut [Complex<T>], fft_scratch: &mut [Complex<T>], out: &mut [T]) {
        self.fft.process_with_scratch(v, fft_scratch);
        for ((o, z), w) in out.iter_mut().zip(v.iter()).zip(&self.twiddle_analysis) {
            *o = z.re * w.re - z.im * w.im;
        }
    }
}

impl<T: Real> Half<T> {
    fn new(len: usize, planner: &mut FftPlanner<T>) -> Self {
        use std::f64::consts::PI;
        let n = len as f64;
        let m = len / 2;
        let fwd = planner.plan_fft_forward(m);
        let inv = planner.plan_fft_inverse(m);
        // Analysis. With a = Z[k], b = conj Z[m-k] (Z[m] = Z[0]) and t_k = exp(-2 pi i k/n):
        // the even and odd half-spectra are (a + b)/2 and -i(a - b)/2, so Makhoul's
        // V[k] = P_k a + Q_k b with P_k = (1 - i t_k)/2, Q_k = (1 + i t_k)/2. Then
        // X[k] = Re(w_k V[k]) and X[n-k] = Re(w_(n-k) conj V[k]) = Re(conj(w_(n-k)) V[k]), where
        // w_k = s_k exp(-i pi k/(2n)) is Makhoul's post-twiddle with the orthonormal scale.
        let w = |k: usize| {
            let (c, s) = expi(-PI * k as f64 / (2.0 * n));
            (scale(len, k) * c, scale(len, k) * s)
        };
        let t = |k: usize| expi(-2.0 * PI * k as f64 / n);
        let p = |k: usize| {
            let it = cmul((0.0, 1.0), t(k));
            ((1.0 - it.0) / 2.0, -it.1 / 2.0)
        };
        let q = |k: usize| {
            let it = cmul((0.0, 1.0), t(k));
            ((1.0 + it.0) / 2.0, it.1 / 2.0)
        };
        let c1 = Split::from_fn(m + 1, |k| cmul(w(k), p(k)));
        let c2 = Split::from_fn(m + 1, |k| cmul(w(k), q(k)));
        // Index i holds k = i + 1 (k = 1..m-1, see `analyze_from_z`).
        let d1 = Split::from_fn(m - 1, |i| cmul(conj(w(len - (i + 1))), p(i + 1)));
        let d2 = Split::from_fn(m - 1, |i| cmul(conj(w(len - (i + 1))), q(i + 1)));
        // Synthesis. U[k] = n conj(c_k) with c_k = (X[k] + i X[n-k]) u_k,
        // u_k = exp(-i pi k/(2n)) / (n s_k) (Makhoul's inverse, as `Full`) is the Hermitian
        // spectrum of v. The half-spectra of the even and odd samples are
        // (U[k] + conj U[m-k])/2 and (U[k] - conj U[m-k]) conj(t_k)/2, and Z = even + i odd, so
        // Z[k] = (X[k] - i X[n-k]) e_k + (X[m-k] + i X[m+k]) f_k with
        // e_k = n conj(u_k) (1 + i conj t_k)/2 and f_k = n u_(m-k) (1 - i conj t_k)/2; the
        // inverse FFT is unnormalized, so 1/m is folded in too.
        let u = |k: usize| {
            let (c, s) = expi(-PI * k as f64 / (2.0 * n));
            let b = 1.0 / (n * scale(len, k));
            (b * c, b * s)
        };
        let r = |k: usize| {
            let it = cmul((0.0, 1.0), conj(t(k)));
            ((1.0 + it.0) / 2.0, it.1 / 2.0)
        };
        let s = |k: usize| {
            let it = cmul((0.0, 1.0), conj(t(k)));
            ((1.0 - it.0) / 2.0, -it.1 / 2.0)
        };
        let g = n / m as f64;
        let e = Split::from_fn(m, |k| {
            let z = cmul(conj(u(k)), r(k));
            (g * z.0, g * z.1)
        });
        let f = Split::from_fn(m, |k| {
            let z = cmul(u(m - k), s(k));
            (g * z.0, g * z.1)
        });
        let fft_scratch_len = fwd
            .get_inplace_scratch_len()
            .max(inv.get_inplace_scratch_len());
        Self {
            fwd,
            inv,
            c1,
            c2,
            d1,
            d2,
            e,
            f,
            fft_scratch_len,
        }
    }

    /// Synthesis into `z` (length n/2): afterwards `z` holds Makhoul's reordered signal `v`
    /// packed as `v[2j] = z[j].re`, `v[2j+1] = z[j].im`.
    fn synthesize_into(&self, x: &[T], z: &mut [Complex<T>], fft_scratch: &mut [Complex<T>]) {
        let n = x.len();
        let m = n / 2;
        // k = 0: X[n] is taken as 0 and X[m + 0] = X[m - 0] = X[m].
        {
            let (xr, y) = (x[0], x[m]);
            let (er, ei, fr, fi) = (self.e.re[0], self.e.im[0], self.f.re[0], self.f.im[0]);
            z[0] = Complex::new(xr * er + y * fr - y * fi, xr * ei + y * fi + y * fr);
        }
        // k = 1..m reads X[k] and X[m+k] ascending, X[n-k] and X[m-k] descending: the
        // descending streams are the same two slices read backwards (the loop still vectorizes,
        // with a lane reversal per load, and no reversed copy is made).
        let iter = z[1..m]
            .iter_mut()
            .zip(x[1..m].iter().zip(&x[m + 1..n]))
            .zip(x[m + 1..n].iter().rev().zip(x[1..m].iter().rev()))
            .zip(self.e.re[1..m].iter().zip(&self.e.im[1..m]))
            .zip(self.f.re[1..m].iter().zip(&self.f.im[1..m]));
        for ((((o, (&xr, &yi)), (&xi, &yr)), (&er, &ei)), (&fr, &fi)) in iter {
            *o = Complex::new(
                xr * er + xi * ei + yr * fr - yi * fi,
                xr * ei - xi * er + yr * fi + yi * fr,
            );
        }
        self.inv.process_with_scratch(z, fft_scratch);
    }

    /// Synthesis of `x` into Makhoul's reordered signal `v` (length n), returned as the packed
    /// buffer read as n interleaved reals (which it is, see `synthesize_into`).
    fn synthesize_packed<'a>(&self, x: &[T], scratch: &'a mut BasisScratch<T>) -> &'a [T] {
        let n = x.len();
        let m = n / 2;
        let (_, work) = scratch.take(0, m + self.fft_scratch_len);
        let (z, fft_scratch) = work.split_at_mut(m);
        self.synthesize_into(x, z, fft_scratch);
        bytemuck::cast_slice(z)
    }

    /// The analysis buffers from `scratch`: `z` (length `m` = n/2), then the FFT's scratch.
    fn analysis_buffers<'a>(
        &self,
        m: usize,
        scratch: &'a mut BasisScratch<T>,
    ) -> AnalysisBuffers<'a, T> {
        let (_, work) = scratch.take(0, m + self.fft_scratch_len);
        work.split_at_mut(m)
    }

    /// Analysis from `z` (Makhoul's reordered samples, packed as in `synthesize_into`) into
    /// `out`.
    fn analyze_from_z(&self, z: &mut [Complex<T>], fft_scratch: &mut [Complex<T>], out: &mut [T]) {
        self.fwd.process_with_scratch(z, fft_scratch);
        let m = z.len();
        let n = out.len();
        // Re(c1 a + c2 conj b) with a = b = Z[0] for k = 0 and k = m (Z[m] = Z[0]).
        let edge = |k: usize| {
            let a = z[0];
            self.c1.re[k] * a.re - self.c1.im[k] * a.im
                + self.c2.re[k] * a.re
                + self.c2.im[k] * a.im
        };
        out[0] = edge(0);
        out[m] = edge(m);
        // k = 1..m needs a = Z[k] ascending and b = Z[m-k] descending (the same slice read
        // backwards). X[k] fills out[1..m] ascending; X[n-k] fills out[m+1..n] descending,
        // written in a second pass with the output read backwards (d1, d2 indexed by k - 1).
        let (lo, hi) = out.split_at_mut(m + 1);
        let iter = lo[1..m]
            .iter_mut()
            .zip(z[1..m].iter().zip(z[1..m].iter().rev()))
            .zip(self.c1.re[1..m].iter().zip(&self.c1.im[1..m]))
            .zip(self.c2.re[1..m].iter().zip(&self.c2.im[1..m]));
        for (((x, (a, b)), (&c1r, &c1i)), (&c2r, &c2i)) in iter {
            *x = c1r * a.re - c1i * a.im + c2r * b.re + c2i * b.im;
        }
        let iter = hi[..n - m - 1]
            .iter_mut()
            .rev()
            .zip(z[1..m].iter().zip(z[1..m].iter().rev()))
            .zip(self.d1.re.iter().zip(&self.d1.im))
            .zip(self.d2.re.iter().zip(&self.d2.im));
        for (((x, (a, b)), (&d1r, &d1i)), (&d2r, &d2i)) in iter {
            *x = d1r * a.re - d1i * a.im + d2r * b.re + d2i * b.im;
        }
    }
}

/// Makhoul's reordering: position of grid index `i` in the reordered sequence of length `n`
/// (even samples ascending, then odd samples descending).
#[inline]
fn makhoul_pos(i: usize, n: usize) -> usize {
    let j = i >> 1;
    if i & 1 == 0 {
        j
    } else {
        n - 1 - j
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
        match &self.path {
            Path::Full(p) => {
                let (_, work) = scratch.take(0, n + p.fft_scratch_len);
                let (v, fft_scratch) = work.split_at_mut(n);
                p.synthesize_into(buf, v, fft_scratch);
                let half = n.div_ceil(2);
                for j in 0..half {
                    buf[2 * j] = v[j].re;
                }
                for j in 0..n / 2 {
                    buf[2 * j + 1] = v[n - 1 - j].re;
                }
            }
            Path::Half(p) => {
                let m = n / 2;
                let v = p.synthesize_packed(buf, scratch);
                for j in 0..m {
                    buf[2 * j] = v[j];
                    buf[2 * j + 1] = v[n - 1 - j];
                }
            }
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
        // As `synthesize`, reading the transform's output only at the sampled instants.
        match &self.path {
            Path::Full(p) => {
                let (_, work) = scratch.take(0, n + p.fft_scratch_len);
                let (v, fft_scratch) = work.split_at_mut(n);
                p.synthesize_into(coeffs, v, fft_scratch);
                for (o, &i) in out.iter_mut().zip(indices) {
                    *o = v[makhoul_pos(i, n)].re;
                }
            }
            Path::Half(p) => {
                let v = p.synthesize_packed(coeffs, scratch);
                for (o, &i) in out.iter_mut().zip(indices) {
                    *o = v[makhoul_pos(i, n)];
                }
            }
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
        // As `analyze`, scattering the samples straight into Makhoul's reordered buffer.
        match &self.path {
            Path::Full(p) => {
                let (_, work) = scratch.take(0, n + p.fft_scratch_len);
                let (v, fft_scratch) = work.split_at_mut(n);
                v.fill(Complex::new(T::zero(), T::zero()));
                for (&x, &i) in values.iter().zip(indices) {
                    v[makhoul_pos(i, n)] = Complex::new(x, T::zero());
                }
                p.analyze_from_v(v, fft_scratch, out);
            }
            Path::Half(p) => {
                let m = n / 2;
                let (z, fft_scratch) = p.analysis_buffers(m, scratch);
                z.fill(Complex::new(T::zero(), T::zero()));
                // The packed buffer read as n interleaved reals is `v`: one store per sample.
                let v: &mut [T] = bytemuck::cast_slice_mut(z);
                for (&x, &i) in values.iter().zip(indices) {
                    v[makhoul_pos(i, n)] = x;
                }
                p.analyze_from_z(z, fft_scratch, out);
            }
        }
    }

    fn analyze(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        let n = self.len;
        if buf.len() != n {
            length_mismatch(n, buf.len());
        }
        // Makhoul's reordering: even samples ascending, then odd samples descending.
        match &self.path {
            Path::Full(p) => {
                let (_, work) = scratch.take(0, n + p.fft_scratch_len);
                let (v, fft_scratch) = work.split_at_mut(n);
                let half = n.div_ceil(2);
                for j in 0..half {
                    v[j] = Complex::new(buf[2 * j], T::zero());
                }
                for j in 0..n / 2 {
                    v[n - 1 - j] = Complex::new(buf[2 * j + 1], T::zero());
                }
                p.analyze_from_v(v, fft_scratch, buf);
            }
            Path::Half(p) => {
                let m = n / 2;
                let (z, fft_scratch) = p.analysis_buffers(m, scratch);
                let v: &mut [T] = bytemuck::cast_slice_mut(z);
                for j in 0..m {
                    v[j] = buf[2 * j];
                    v[n - 1 - j] = buf[2 * j + 1];
                }
                p.analyze_from_z(z, fft_scratch, buf);
            }
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
