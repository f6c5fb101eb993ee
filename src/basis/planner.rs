//! `BasisPlanner`: plans each (kind, length) once and hands out shared copies.
//!
//! The reconstruction workers each ask for the basis of their window spec; planning computes
//! twiddles and FFT plans, so it happens once per (kind, length) and the result is shared as
//! an `Arc` (RustFFT's planner does the same for FFTs).

use super::{BasisError, BasisKind, Daubechies, Dct, RealFourier, SharedBasis};
use crate::real::Real;
use realfft::RealFftPlanner;
use rustfft::FftPlanner;
use std::collections::HashMap;
use std::fmt;
use std::sync::{Arc, Mutex};

/// Plans bases and caches them per (requested kind, length). Thread-safe: share it by
/// reference or in an `Arc`; planning holds a lock, applying a planned basis does not.
pub struct BasisPlanner<T: Real> {
    inner: Mutex<Inner<T>>,
}

struct Inner<T: Real> {
    cache: HashMap<(BasisKind, usize), SharedBasis<T>>,
    fft: FftPlanner<T>,
    rfft: RealFftPlanner<T>,
}

impl<T: Real> Default for BasisPlanner<T> {
    fn default() -> Self {
        Self::new()
    }
}

impl<T: Real> fmt::Debug for BasisPlanner<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let planned = self.inner.lock().map(|i| i.cache.len()).unwrap_or(0);
        f.debug_struct("BasisPlanner")
            .field("planned", &planned)
            .finish()
    }
}

impl<T: Real> BasisPlanner<T> {
    /// An empty planner.
    pub fn new() -> Self {
        Self {
            inner: Mutex::new(Inner {
                cache: HashMap::new(),
                fft: FftPlanner::new(),
                rfft: RealFftPlanner::new(),
            }),
        }
    }

    /// The basis `kind` of length `len`, planned on first request and shared afterwards.
    ///
    /// # Errors
    /// As [`plan_basis`]; failures are not cached.
    pub fn plan(&self, kind: BasisKind, len: usize) -> Result<SharedBasis<T>, BasisError> {
        // A poisoned lock only means another thread panicked while planning; the cache holds
        // only complete entries, so carry on with it.
        let mut inner = self.inner.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(b) = inner.cache.get(&(kind, len)) {
            return Ok(Arc::clone(b));
        }
        let Inner { fft, rfft, .. } = &mut *inner;
        let basis = build(kind, len, fft, rfft)?;
        inner.cache.insert((kind, len), Arc::clone(&basis));
        Ok(basis)
    }
}

/// Plans the basis `kind` of length `len` without caching.
///
/// # Errors
/// [`BasisError::BadLength`] if `len` does not suit the basis (see each basis's docs).
pub fn plan_basis<T: Real>(kind: BasisKind, len: usize) -> Result<SharedBasis<T>, BasisError> {
    build(
        kind,
        len,
        &mut FftPlanner::new(),
        &mut RealFftPlanner::new(),
    )
}

fn build<T: Real>(
    kind: BasisKind,
    len: usize,
    fft: &mut FftPlanner<T>,
    rfft: &mut RealFftPlanner<T>,
) -> Result<SharedBasis<T>, BasisError> {
    Ok(match kind {
        BasisKind::Dct => Arc::new(Dct::with_planner(len, fft)?),
        BasisKind::Fourier => Arc::new(RealFourier::with_planner(len, rfft)?),
        BasisKind::Daubechies { order, levels } => Arc::new(Daubechies::new(order, levels, len)?),
    })
}
