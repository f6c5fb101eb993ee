//! O(n^2) reference definitions of every basis, computed straight from the formulas in f64.
//!
//! Kept to test the fast transforms (as RustFFT keeps its naive `Dft`) and to give benches a
//! baseline. Nothing here shares code with the fast paths: the DCT and Fourier sums use the
//! textbook definitions, the wavelet step the periodized sum with an explicit modulus.
//!
//! Sources: DCT-II/III, Ahmed, Natarajan & Rao, IEEE Trans. Computers, 1974, and Rao & Yip,
//! *Discrete Cosine Transform*, 1990 (from memory, matched against scipy); real Fourier basis,
//! the DFT definition of `numpy.fft.rfft`; periodized DWT, the sum formula that PyWavelets'
//! `mode='periodization'` computes (checked against `pywt.dwt`).

use super::wavelet::{daubechies_rec_lo, quadrature_mirror, resolve_levels};
use super::{length_mismatch, Basis, BasisError, BasisKind, BasisScratch};
use crate::real::Real;
use std::f64::consts::PI;
use std::fmt;

/// `cos(pi r / (2n))` for `r = 0..4n`: integer phase reduction first keeps the O(n^2) sums
/// accurate for large `k j` products.
fn quarter_cos_table(n: usize) -> Vec<f64> {
    (0..4 * n)
        .map(|r| (PI * r as f64 / (2.0 * n as f64)).cos())
        .collect()
}

fn dct_scale(k: usize, n: usize) -> f64 {
    if k == 0 {
        (1.0 / n as f64).sqrt()
    } else {
        (2.0 / n as f64).sqrt()
    }
}

/// Orthonormal DCT-II, `X[k] = s_k sum_j x[j] cos(pi k (2j+1) / (2n))` (scipy
/// `dct(x, type=2, norm='ortho')`).
pub fn dct2(x: &[f64]) -> Vec<f64> {
    let n = x.len();
    let table = quarter_cos_table(n);
    (0..n)
        .map(|k| {
            let sum: f64 = (0..n)
                .map(|j| x[j] * table[(k * (2 * j + 1)) % (4 * n)])
                .sum();
            dct_scale(k, n) * sum
        })
        .collect()
}

/// Orthonormal DCT-III, the inverse (and transpose) of [`dct2`]: `x[j] = sum_k s_k X[k]
/// cos(pi k (2j+1) / (2n))`.
pub fn dct3(c: &[f64]) -> Vec<f64> {
    let n = c.len();
    let table = quarter_cos_table(n);
    (0..n)
        .map(|j| {
            (0..n)
                .map(|k| dct_scale(k, n) * c[k] * table[(k * (2 * j + 1)) % (4 * n)])
                .sum()
        })
        .collect()
}

/// Value of real-Fourier basis vector `i` (order of [`super::dft`]) at sample `j`.
fn fourier_vector(i: usize, j: usize, n: usize) -> f64 {
    let nf = n as f64;
    if i == 0 {
        return (1.0 / nf).sqrt();
    }
    if n % 2 == 0 && i == n - 1 {
        return if j % 2 == 0 { 1.0 } else { -1.0 } / nf.sqrt();
    }
    let k = i.div_ceil(2);
    let theta = 2.0 * PI * ((k * j) % n) as f64 / nf;
    let pair = (2.0 / nf).sqrt();
    if i % 2 == 1 {
        pair * theta.cos()
    } else {
        pair * theta.sin()
    }
}

/// Orthonormal real-Fourier analysis by the definition: coefficient `i` is the inner product
/// of `x` with basis vector `i` (`[DC, cos_1, sin_1, ..., (Nyquist)]`, see [`super::dft`]).
pub fn fourier_analyze(x: &[f64]) -> Vec<f64> {
    let n = x.len();
    (0..n)
        .map(|i| (0..n).map(|j| fourier_vector(i, j, n) * x[j]).sum())
        .collect()
}

/// Orthonormal real-Fourier synthesis by the definition: `x = sum_i c[i] psi_i`.
pub fn fourier_synthesize(c: &[f64]) -> Vec<f64> {
    let n = c.len();
    (0..n)
        .map(|j| (0..n).map(|i| fourier_vector(i, j, n) * c[i]).sum())
        .collect()
}

/// One periodized analysis level with low-pass `h`, exactly the sum formula
/// `cA[i] = sum_k h[k] x[(2i + k - s) mod m]`, `cD[i]` likewise with `g[k] = (-1)^k h[L-1-k]`,
/// `s = L/2 - 1` (PyWavelets `dwt(x, w, mode='periodization')`).
///
/// # Panics
/// If `x.len()` is odd or zero.
pub fn dwt_periodized(x: &[f64], h: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let m = x.len();
    assert!(m > 0 && m % 2 == 0, "periodized step needs an even length");
    let l = h.len();
    let g = quadrature_mirror(h);
    let s = (l / 2 - 1) as isize;
    let at = |t: isize| x[t.rem_euclid(m as isize) as usize];
    let mut ca = vec![0.0; m / 2];
    let mut cd = vec![0.0; m / 2];
    for i in 0..m / 2 {
        for k in 0..l {
            let v = at(2 * i as isize + k as isize - s);
            ca[i] += h[k] * v;
            cd[i] += g[k] * v;
        }
    }
    (ca, cd)
}

/// Multi-level periodized decomposition `[cA_J, cD_J, ..., cD_1]` (PyWavelets
/// `wavedec(x, w, mode='periodization', level=J)`, concatenated), by iterating
/// [`dwt_periodized`] on the approximation.
///
/// # Panics
/// If `x.len()` is not divisible by `2^levels`.
pub fn wavedec_periodized(x: &[f64], h: &[f64], levels: u8) -> Vec<f64> {
    let mut approx = x.to_vec();
    let mut details: Vec<Vec<f64>> = Vec::new();
    for _ in 0..levels {
        let (ca, cd) = dwt_periodized(&approx, h);
        details.push(cd);
        approx = ca;
    }
    let mut out = approx;
    for d in details.iter().rev() {
        out.extend_from_slice(d);
    }
    out
}

/// A reference transform, signal to coefficients.
type Transform = dyn Fn(&[f64]) -> Vec<f64>;

/// A basis held as a dense `n x n` matrix of f64 (rows are the basis vectors, so `analyze`
/// is `Psi^T x` = matrix times `x`). Memory is `8 n^2` bytes: for tests and small `n` only.
pub struct DenseBasis {
    kind: BasisKind,
    len: usize,
    /// Row-major; row `i` is basis vector `psi_i`.
    rows: Vec<f64>,
}

impl fmt::Debug for DenseBasis {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("DenseBasis")
            .field("kind", &self.kind)
            .field("len", &self.len)
            .finish()
    }
}

impl DenseBasis {
    /// Builds the dense matrix of `kind` at length `len` from the reference definitions above
    /// (each row is the reference analysis applied to the unit vectors, transposed).
    ///
    /// # Errors
    /// As [`super::plan_basis`].
    pub fn new(kind: BasisKind, len: usize) -> Result<Self, BasisError> {
        if len == 0 {
            return Err(BasisError::BadLength {
                kind,
                len,
                why: "the length must be at least 1".into(),
            });
        }
        let (kind, analysis): (BasisKind, Box<Transform>) = match kind {
            BasisKind::Dct => (kind, Box::new(dct2)),
            BasisKind::Fourier => (kind, Box::new(fourier_analyze)),
            BasisKind::Daubechies { order, levels } => {
                let j = resolve_levels(order, levels, len)?;
                let h = daubechies_rec_lo(order).ok_or(BasisError::UnsupportedWavelet(order))?;
                (
                    BasisKind::Daubechies {
                        order,
                        levels: Some(j),
                    },
                    Box::new(move |x: &[f64]| wavedec_periodized(x, h, j)),
                )
            }
        };
        // Column j of the analysis matrix is the analysis of e_j.
        let mut rows = vec![0.0; len * len];
        let mut e = vec![0.0; len];
        for j in 0..len {
            e[j] = 1.0;
            for (i, v) in analysis(&e).into_iter().enumerate() {
                rows[i * len + j] = v;
            }
            e[j] = 0.0;
        }
        Ok(Self { kind, len, rows })
    }

    /// Row-major matrix; row `i` is basis vector `psi_i` (so it is `Psi^T`).
    pub fn rows(&self) -> &[f64] {
        &self.rows
    }

    /// `Psi^T x` in f64.
    pub fn analyze_f64(&self, x: &[f64]) -> Vec<f64> {
        if x.len() != self.len {
            length_mismatch(self.len, x.len());
        }
        self.rows
            .chunks_exact(self.len)
            .map(|r| r.iter().zip(x).map(|(a, b)| a * b).sum())
            .collect()
    }

    /// `Psi c` in f64.
    pub fn synthesize_f64(&self, c: &[f64]) -> Vec<f64> {
        if c.len() != self.len {
            length_mismatch(self.len, c.len());
        }
        let mut x = vec![0.0; self.len];
        for (r, &ci) in self.rows.chunks_exact(self.len).zip(c) {
            for (xj, &v) in x.iter_mut().zip(r) {
                *xj += v * ci;
            }
        }
        x
    }
}

impl<T: Real> Basis<T> for DenseBasis {
    fn kind(&self) -> BasisKind {
        self.kind
    }

    fn len(&self) -> usize {
        self.len
    }

    /// Allocates per call (a reference, not a hot path).
    fn synthesize(&self, buf: &mut [T], _scratch: &mut BasisScratch<T>) {
        let c: Vec<f64> = buf.iter().map(|v| v.to_f64_()).collect();
        for (o, v) in buf.iter_mut().zip(self.synthesize_f64(&c)) {
            *o = T::of(v);
        }
    }

    /// Allocates per call (a reference, not a hot path).
    fn analyze(&self, buf: &mut [T], _scratch: &mut BasisScratch<T>) {
        let x: Vec<f64> = buf.iter().map(|v| v.to_f64_()).collect();
        for (o, v) in buf.iter_mut().zip(self.analyze_f64(&x)) {
            *o = T::of(v);
        }
    }

    fn coefficient_freq_hz(&self, _k: usize, _sample_rate_hz: f64) -> Option<f64> {
        None
    }
}
