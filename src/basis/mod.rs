//! Orthonormal bases `Psi` for sparse recovery, applied in O(n log n) without a dense matrix.
//!
//! Every basis here is **orthonormal**: `synthesize` applies `Psi` (coefficients -> signal)
//! and `analyze` applies `Psi^T = Psi^-1` (signal -> coefficients), so energy is preserved
//! (Parseval) and the sampling operator `A = C Psi` has `||A||_2 <= 1`; the FISTA step is 1.
//!
//! Transforms are planned once per (kind, length) by [`BasisPlanner`] and shared as
//! `Arc<dyn Basis<T>>` across threads. Each call takes a caller-owned [`BasisScratch`] so that
//! hot loops do not allocate: the scratch grows on first use and is reused afterwards.
//!
//! | basis | synthesis / analysis | valid lengths | coefficient order |
//! |---|---|---|---|
//! | [`BasisKind::Dct`] | DCT-III / DCT-II, orthonormal (scipy `norm='ortho'`) | any n >= 1 | k = 0..n-1, bin k at k*fs/(2n) Hz |
//! | [`BasisKind::Fourier`] | real Fourier (cos/sin pairs), orthonormal | any n >= 1 | see [`dft`] |
//! | [`BasisKind::Daubechies`] | periodized orthonormal DWT, multi-level | n divisible by 2^levels | `[cA_J, cD_J, ..., cD_1]` as PyWavelets `wavedec` |

use crate::real::Real;
use num_complex::Complex;
use std::fmt;
use std::sync::Arc;

pub mod dct;
pub mod dft;
pub mod naive;
pub mod planner;
pub mod wavelet;

pub use dct::Dct;
pub use dft::RealFourier;
pub use naive::DenseBasis;
pub use planner::{plan_basis, BasisPlanner};
pub use wavelet::Daubechies;

/// Which basis, and its parameters. Parsed from and printed as e.g. `dct`, `fourier`, `db8`,
/// `db4:5` (Daubechies 4 with 5 levels).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum BasisKind {
    /// Orthonormal DCT-II analysis / DCT-III synthesis.
    Dct,
    /// Orthonormal real Fourier basis (DC, cos/sin pairs, Nyquist for even n).
    Fourier,
    /// Periodized Daubechies wavelet `db<order>` (order = vanishing moments, 2*order taps).
    Daubechies {
        /// Number of vanishing moments, 1..=10.
        order: u8,
        /// Decomposition levels; `None` chooses the maximum from `n` and the filter length.
        levels: Option<u8>,
    },
}

impl fmt::Display for BasisKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            BasisKind::Dct => write!(f, "dct"),
            BasisKind::Fourier => write!(f, "fourier"),
            BasisKind::Daubechies {
                order,
                levels: None,
            } => write!(f, "db{order}"),
            BasisKind::Daubechies {
                order,
                levels: Some(l),
            } => write!(f, "db{order}:{l}"),
        }
    }
}

impl std::str::FromStr for BasisKind {
    type Err = BasisError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        let t = s.trim().to_ascii_lowercase();
        match t.as_str() {
            "dct" => return Ok(BasisKind::Dct),
            "fourier" | "dft" | "fft" => return Ok(BasisKind::Fourier),
            _ => {}
        }
        let bad = || BasisError::UnknownName(s.to_string());
        let rest = t.strip_prefix("db").ok_or_else(bad)?;
        let (ord, lev) = match rest.split_once(':') {
            Some((o, l)) => (o, Some(l)),
            None => (rest, None),
        };
        let order: u8 = ord.parse().map_err(|_| bad())?;
        if !(1..=10).contains(&order) {
            return Err(BasisError::UnsupportedWavelet(order));
        }
        let levels = match lev {
            Some(l) => Some(l.parse::<u8>().map_err(|_| bad())?),
            None => None,
        };
        Ok(BasisKind::Daubechies { order, levels })
    }
}

/// Errors from planning a basis.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum BasisError {
    /// The name does not name a basis.
    #[error(
        "unknown basis {0:?} (expected dct, fourier, or db1..db10, optionally db<N>:<levels>)"
    )]
    UnknownName(String),
    /// Daubechies order outside 1..=10.
    #[error("unsupported wavelet db{0} (supported: db1..db10)")]
    UnsupportedWavelet(u8),
    /// The length does not suit the basis.
    #[error("length {len} does not fit basis {kind}: {why}")]
    BadLength {
        /// The basis asked for.
        kind: BasisKind,
        /// The length asked for.
        len: usize,
        /// What is required.
        why: String,
    },
}

/// Reusable work space for [`Basis`] calls. Grows on first use; steady-state calls do not
/// allocate. One per thread (it is not shared).
#[derive(Debug, Default, Clone)]
pub struct BasisScratch<T: Real> {
    /// Real work space.
    pub real: Vec<T>,
    /// Complex work space.
    pub complex: Vec<Complex<T>>,
}

impl<T: Real> BasisScratch<T> {
    /// An empty scratch; it grows on first use.
    pub fn new() -> Self {
        Self {
            real: Vec::new(),
            complex: Vec::new(),
        }
    }

    /// Makes sure at least `real` reals and `complex` complex values are available and returns
    /// both slices of exactly those lengths.
    pub fn take(&mut self, real: usize, complex: usize) -> (&mut [T], &mut [Complex<T>]) {
        if self.real.len() < real {
            self.real.resize(real, T::zero());
        }
        if self.complex.len() < complex {
            self.complex
                .resize(complex, Complex::new(T::zero(), T::zero()));
        }
        (&mut self.real[..real], &mut self.complex[..complex])
    }
}

/// An orthonormal basis of `R^n`, applied in place.
///
/// Contract: `synthesize(analyze(x)) == x` to rounding, and `<synthesize(a), b> ==
/// <a, analyze(b)>` (the two are transposes). Both panic if `buf.len() != self.len()`.
pub trait Basis<T: Real>: Send + Sync + fmt::Debug {
    /// The kind (with resolved parameters, e.g. the wavelet level actually used).
    fn kind(&self) -> BasisKind;
    /// The length `n` this basis was planned for.
    fn len(&self) -> usize;
    /// Always false: a planned basis has n >= 1.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Coefficients -> signal (`Psi s`), in place.
    ///
    /// # Panics
    /// If `buf.len() != self.len()`.
    fn synthesize(&self, buf: &mut [T], scratch: &mut BasisScratch<T>);
    /// Signal -> coefficients (`Psi^T x`), in place.
    ///
    /// # Panics
    /// If `buf.len() != self.len()`.
    fn analyze(&self, buf: &mut [T], scratch: &mut BasisScratch<T>);

    /// `out[i] = (Psi coeffs)[indices[i]]`: synthesis read at the sampled instants only, the
    /// forward operator of sparse recovery. `grid` (length n) is scratch. The default
    /// synthesizes the whole grid and gathers; a basis may skip the full-grid write.
    fn synthesize_at(
        &self,
        coeffs: &[T],
        indices: &[usize],
        out: &mut [T],
        grid: &mut [T],
        scratch: &mut BasisScratch<T>,
    ) {
        grid.copy_from_slice(coeffs);
        self.synthesize(grid, scratch);
        for (o, &i) in out.iter_mut().zip(indices) {
            *o = grid[i];
        }
    }

    /// `out = Psi^T x` where `x` is zero except `x[indices[i]] = values[i]`: the adjoint of
    /// [`Basis::synthesize_at`]. The default scatters into `out` and analyzes it.
    fn analyze_from(
        &self,
        indices: &[usize],
        values: &[T],
        out: &mut [T],
        scratch: &mut BasisScratch<T>,
    ) {
        out.fill(T::zero());
        for (&v, &i) in values.iter().zip(indices) {
            out[i] = v;
        }
        self.analyze(out, scratch);
    }
    /// The frequency in Hz that coefficient `k` represents at the given sample rate, where that
    /// has a meaning (DCT, Fourier); for wavelets the centre of the coefficient's octave band.
    fn coefficient_freq_hz(&self, k: usize, sample_rate_hz: f64) -> Option<f64>;
    /// Indices of the finest-scale detail coefficients, used for the MAD noise estimate
    /// (Donoho & Johnstone 1994). For DCT/Fourier: the upper half of the coefficients.
    fn finest_detail_range(&self) -> std::ops::Range<usize> {
        self.len() / 2..self.len()
    }
}

/// A shared, planned basis.
pub type SharedBasis<T> = Arc<dyn Basis<T>>;

#[cold]
#[inline(never)]
pub(crate) fn length_mismatch(expected: usize, got: usize) -> ! {
    panic!("basis buffer length mismatch: planned for {expected}, got {got}")
}
