//! The floating-point scalar the numerical code is generic over (`f32` or `f64`).
//!
//! The engine is written once for both: `f64` is the reference precision the tests check
//! against published values; `f32` halves memory traffic on the hot path where the accuracy
//! it gives is enough (the benchmarks report its SNR cost).

use num_traits::{Float, FloatConst, FromPrimitive, NumAssign};
use std::fmt::{Debug, Display};

/// A real floating-point scalar usable by the transforms (through rustfft) and the solvers.
pub trait Real:
    rustfft::FftNum
    + realfft::FftNum
    + rustdct::DctNum
    + Float
    + FloatConst
    + FromPrimitive
    + NumAssign
    + Default
    + Debug
    + Display
    + Send
    + Sync
    + 'static
{
    /// Converts from `f64` (rounding for `f32`).
    fn of(x: f64) -> Self;
    /// Converts to `f64`.
    fn to_f64_(self) -> f64;
}

impl Real for f32 {
    #[inline]
    fn of(x: f64) -> Self {
        x as f32
    }
    #[inline]
    fn to_f64_(self) -> f64 {
        self as f64
    }
}

impl Real for f64 {
    #[inline]
    fn of(x: f64) -> Self {
        x
    }
    #[inline]
    fn to_f64_(self) -> f64 {
        self
    }
}
