//! Linear measurement operators `A` for sparse recovery: the sampled basis `A = C Psi` that the
//! gateway uses for every window, and a dense matrix for tests and small problems.
//!
//! FISTA only needs `A x`, `A^T y` and the Lipschitz constant `L = ||A||_2^2` of the gradient of
//! `0.5 ||A x - y||^2`; [`LinearOperator`] is exactly that. Operators take `&mut self` so that
//! they can own their transform scratch and reuse it: steady-state calls do not allocate.

use crate::basis::{BasisScratch, SharedBasis};
use crate::real::Real;
use std::ops::Range;

/// A real linear map `A: R^cols -> R^rows` with its transpose.
///
/// Contract: `adjoint` is the exact transpose of `apply` (`<A x, y> = <x, A^T y>` to rounding)
/// and [`lipschitz`](LinearOperator::lipschitz) is an upper bound on `||A||_2^2` (the solvers take
/// the step `1 / L`, which is only safe if `L` is not an underestimate).
pub trait LinearOperator<T: Real> {
    /// Number of measurements `m` (length of `A x`).
    fn rows(&self) -> usize;
    /// Number of coefficients `n` (length of `x`).
    fn cols(&self) -> usize;
    /// `out = A x`.
    ///
    /// # Panics
    /// If `x.len() != cols()` or `out.len() != rows()`.
    fn apply(&mut self, x: &[T], out: &mut [T]);
    /// `out = A^T y`.
    ///
    /// # Panics
    /// If `y.len() != rows()` or `out.len() != cols()`.
    fn adjoint(&mut self, y: &[T], out: &mut [T]);
    /// The Lipschitz constant `L = ||A||_2^2` (or an upper bound on it).
    fn lipschitz(&self) -> T;
    /// Coefficient indices holding the finest-scale detail, used by the MAD noise estimate
    /// (Donoho & Johnstone 1994). The default is the upper half, which suits frequency-ordered
    /// coefficients (DCT, Fourier) and is a neutral choice for an arbitrary matrix.
    fn finest_detail_range(&self) -> Range<usize> {
        self.cols() / 2..self.cols()
    }
}

/// Why a set of sample indices was refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum IndexError {
    /// An index is not inside the window grid `[0, n)`.
    #[error("sample index {index} at position {position} is outside the window of length {len}")]
    OutOfRange {
        /// Position in the index list.
        position: usize,
        /// The offending index.
        index: u32,
        /// The window length `n`.
        len: usize,
    },
    /// An index repeats its predecessor.
    #[error("sample index {index} at position {position} is a duplicate")]
    Duplicate {
        /// Position in the index list.
        position: usize,
        /// The repeated index.
        index: u32,
    },
    /// An index is smaller than its predecessor.
    #[error("sample indices are not sorted: {index} at position {position} follows {previous}")]
    NotSorted {
        /// Position in the index list.
        position: usize,
        /// The offending index.
        index: u32,
        /// The index before it.
        previous: u32,
    },
}

/// Checks that `indices` is strictly increasing and inside `[0, len)`.
pub fn validate_indices(indices: &[u32], len: usize) -> Result<(), IndexError> {
    let mut previous: Option<u32> = None;
    for (position, &index) in indices.iter().enumerate() {
        if index as usize >= len {
            return Err(IndexError::OutOfRange {
                position,
                index,
                len,
            });
        }
        if let Some(p) = previous {
            if index == p {
                return Err(IndexError::Duplicate { position, index });
            }
            if index < p {
                return Err(IndexError::NotSorted {
                    position,
                    index,
                    previous: p,
                });
            }
        }
        previous = Some(index);
    }
    Ok(())
}

/// `A = C Psi`: synthesis by an orthonormal basis, then selection of the sampled instants.
///
/// The rows of `A` are rows of the orthonormal matrix `Psi`, so they are orthonormal:
/// `A A^T = I_m`, hence `||A||_2 = 1` and `L = 1` exactly (Beck & Teboulle 2009 take the step
/// `1/L`; CHECK-VALUES 6.6 derives `L = 1` for this operator). Both `apply` and `adjoint` cost one
/// fast transform plus O(n) copies and reuse the buffers held here.
#[derive(Debug, Clone)]
pub struct SampledBasis<T: Real> {
    basis: SharedBasis<T>,
    indices: Vec<usize>,
    grid: Vec<T>,
    scratch: BasisScratch<T>,
}

impl<T: Real> SampledBasis<T> {
    /// Builds the operator for the sampled instants `indices` (strictly increasing, `< n`).
    pub fn new(basis: SharedBasis<T>, indices: &[u32]) -> Result<Self, IndexError> {
        let n = basis.len();
        let mut op = Self {
            basis,
            indices: Vec::with_capacity(indices.len()),
            grid: vec![T::zero(); n],
            scratch: BasisScratch::new(),
        };
        op.set_indices(indices)?;
        Ok(op)
    }

    /// Replaces the sampled instants, reusing the buffers. On error the operator is unchanged.
    pub fn set_indices(&mut self, indices: &[u32]) -> Result<(), IndexError> {
        validate_indices(indices, self.basis.len())?;
        self.indices.clear();
        self.indices.extend(indices.iter().map(|&i| i as usize));
        Ok(())
    }

    /// The sampled instants.
    pub fn indices(&self) -> &[usize] {
        &self.indices
    }

    /// The basis `Psi`.
    pub fn basis(&self) -> &SharedBasis<T> {
        &self.basis
    }

    /// `out = Psi s` on the full window grid (the signal estimate for coefficients `s`).
    ///
    /// # Panics
    /// If `s.len()` or `out.len()` differs from `n`.
    pub fn synthesize_full(&mut self, s: &[T], out: &mut [T]) {
        out.copy_from_slice(s);
        self.basis.synthesize(out, &mut self.scratch);
    }

    /// `out = Psi^T x` for a full-grid signal `x`.
    ///
    /// # Panics
    /// If `x.len()` or `out.len()` differs from `n`.
    pub fn analyze_full(&mut self, x: &[T], out: &mut [T]) {
        out.copy_from_slice(x);
        self.basis.analyze(out, &mut self.scratch);
    }
}

impl<T: Real> LinearOperator<T> for SampledBasis<T> {
    fn rows(&self) -> usize {
        self.indices.len()
    }
    fn cols(&self) -> usize {
        self.basis.len()
    }
    fn apply(&mut self, x: &[T], out: &mut [T]) {
        assert_eq!(out.len(), self.indices.len(), "apply: output length");
        self.basis
            .synthesize_at(x, &self.indices, out, &mut self.grid, &mut self.scratch);
    }
    fn adjoint(&mut self, y: &[T], out: &mut [T]) {
        assert_eq!(y.len(), self.indices.len(), "adjoint: input length");
        self.basis
            .analyze_from(&self.indices, y, out, &mut self.scratch);
    }
    fn lipschitz(&self) -> T {
        T::one()
    }
    fn finest_detail_range(&self) -> Range<usize> {
        self.basis.finest_detail_range()
    }
}

/// A dense row-major matrix, for tests and small problems. Its Lipschitz constant is estimated
/// once by power iteration ([`estimate_operator_norm`]) unless given.
#[derive(Debug, Clone)]
pub struct DenseOperator<T: Real> {
    rows: usize,
    cols: usize,
    entries: Vec<T>,
    lipschitz: T,
}

impl<T: Real> DenseOperator<T> {
    /// A `rows x cols` matrix from row-major `entries`; `L` estimated by power iteration and
    /// raised by a relative 1e-12 so that the rounding of the estimate cannot make the step
    /// too long.
    ///
    /// # Panics
    /// If `entries.len() != rows * cols`.
    pub fn new(rows: usize, cols: usize, entries: Vec<T>) -> Self {
        assert_eq!(entries.len(), rows * cols, "dense operator: entry count");
        let mut op = Self {
            rows,
            cols,
            entries,
            lipschitz: T::one(),
        };
        let norm = estimate_operator_norm(&mut op, 1000, 1e-15);
        op.lipschitz = norm * norm * T::of(1.0 + 1e-12);
        op
    }

    /// Like [`new`](Self::new) but with a known Lipschitz constant `L = ||A||_2^2`.
    ///
    /// # Panics
    /// If `entries.len() != rows * cols`.
    pub fn with_lipschitz(rows: usize, cols: usize, entries: Vec<T>, lipschitz: T) -> Self {
        assert_eq!(entries.len(), rows * cols, "dense operator: entry count");
        Self {
            rows,
            cols,
            entries,
            lipschitz,
        }
    }

    /// Row-major entries.
    pub fn entries(&self) -> &[T] {
        &self.entries
    }
}

impl<T: Real> LinearOperator<T> for DenseOperator<T> {
    fn rows(&self) -> usize {
        self.rows
    }
    fn cols(&self) -> usize {
        self.cols
    }
    fn apply(&mut self, x: &[T], out: &mut [T]) {
        assert_eq!(x.len(), self.cols, "apply: input length");
        assert_eq!(out.len(), self.rows, "apply: output length");
        for (o, row) in out.iter_mut().zip(self.entries.chunks_exact(self.cols)) {
            *o = row
                .iter()
                .zip(x)
                .fold(T::zero(), |acc, (&a, &b)| acc + a * b);
        }
    }
    fn adjoint(&mut self, y: &[T], out: &mut [T]) {
        assert_eq!(y.len(), self.rows, "adjoint: input length");
        assert_eq!(out.len(), self.cols, "adjoint: output length");
        out.fill(T::zero());
        for (&v, row) in y.iter().zip(self.entries.chunks_exact(self.cols)) {
            for (o, &a) in out.iter_mut().zip(row) {
                *o += a * v;
            }
        }
    }
    fn lipschitz(&self) -> T {
        self.lipschitz
    }
}

/// Estimates `||A||_2` (the largest singular value) by power iteration on `A^T A`, from a fixed
/// deterministic start, stopping when the estimate changes by less than `rel_tol` relative or
/// after `max_iter` iterations. Allocates its own buffers (it is not a hot-path call).
///
/// Power iteration converges from below; the start vector (1, 2, 3, ...)-like with alternating
/// signs avoids being orthogonal to the top singular vector in every case met in practice.
pub fn estimate_operator_norm<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    max_iter: usize,
    rel_tol: f64,
) -> T {
    let n = op.cols();
    let m = op.rows();
    if n == 0 || m == 0 {
        return T::zero();
    }
    let mut v: Vec<T> = (0..n)
        .map(|i| {
            let s = if i % 2 == 0 { 1.0 } else { -0.7 };
            T::of(s * (1.0 + (i as f64 * 0.618_033_988_75).fract()))
        })
        .collect();
    let mut av = vec![T::zero(); m];
    let mut w = vec![T::zero(); n];
    normalize(&mut v);
    let mut estimate = T::zero();
    for _ in 0..max_iter {
        op.apply(&v, &mut av);
        op.adjoint(&av, &mut w);
        let norm_w = norm2(&w);
        if norm_w == T::zero() {
            return T::zero();
        }
        let next = norm_w.sqrt();
        for (vi, &wi) in v.iter_mut().zip(&w) {
            *vi = wi / norm_w;
        }
        let done = (next - estimate).abs() <= T::of(rel_tol) * next;
        estimate = next;
        if done {
            break;
        }
    }
    estimate
}

pub(crate) fn norm2<T: Real>(x: &[T]) -> T {
    dot(x, x).sqrt()
}

pub(crate) fn dot<T: Real>(a: &[T], b: &[T]) -> T {
    a.iter().zip(b).fold(T::zero(), |acc, (&x, &y)| acc + x * y)
}

fn normalize<T: Real>(v: &mut [T]) {
    let n = norm2(v);
    if n > T::zero() {
        for x in v.iter_mut() {
            *x /= n;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn index_validation_reports_each_fault() {
        assert_eq!(validate_indices(&[0, 3, 7], 8), Ok(()));
        assert_eq!(
            validate_indices(&[0, 8], 8),
            Err(IndexError::OutOfRange {
                position: 1,
                index: 8,
                len: 8
            })
        );
        assert_eq!(
            validate_indices(&[1, 1], 8),
            Err(IndexError::Duplicate {
                position: 1,
                index: 1
            })
        );
        assert_eq!(
            validate_indices(&[2, 1], 8),
            Err(IndexError::NotSorted {
                position: 1,
                index: 1,
                previous: 2
            })
        );
    }

    #[test]
    fn power_iteration_on_diagonal() {
        // ||diag(3, -5, 1)||_2 = 5: the largest singular value (definition).
        let mut op = DenseOperator::<f64>::new(3, 3, vec![3., 0., 0., 0., -5., 0., 0., 0., 1.]);
        let norm: f64 = estimate_operator_norm(&mut op, 1000, 1e-15);
        assert!((norm - 5.0).abs() < 1e-9, "{norm}");
    }
}
