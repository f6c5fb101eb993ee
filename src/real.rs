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
    + bytemuck::Pod
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
    /// The SIMD vector of this scalar (see [`Lanes`]).
    type Lanes: Lanes<Self>;
    /// Converts from `f64` (rounding for `f32`).
    fn of(x: f64) -> Self;
    /// Converts to `f64`.
    fn to_f64_(self) -> f64;
}

impl Real for f32 {
    type Lanes = wide::f32x8;
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
    type Lanes = wide::f64x4;
    #[inline]
    fn of(x: f64) -> Self {
        x
    }
    #[inline]
    fn to_f64_(self) -> f64 {
        self
    }
}

/// A fixed-width vector of [`Real`] lanes (`wide::f32x8`, `wide::f64x4`), for the O(n) passes of
/// the solver's iteration where the auto-vectorizer, given chunked scalar loops, spilled
/// registers and shuffled lanes (seen in `perf annotate` of the FISTA loop). Every operation
/// is lane-wise and in the same order as the scalar code it replaces, with no fused
/// multiply-add, so results do not depend on the CPU's features.
pub trait Lanes<T>:
    Copy
    + std::ops::Add<Output = Self>
    + std::ops::Sub<Output = Self>
    + std::ops::Mul<Output = Self>
    + std::ops::BitAnd<Output = Self>
{
    /// Lanes per vector.
    const WIDTH: usize;
    /// Every lane `v`.
    fn splat(v: T) -> Self;
    /// Loads `s[..WIDTH]`.
    ///
    /// # Panics
    /// If `s.len() != WIDTH`.
    fn load(s: &[T]) -> Self;
    /// Stores into `s[..WIDTH]`.
    ///
    /// # Panics
    /// If `s.len() != WIDTH`.
    fn store(self, s: &mut [T]);
    /// `|v|` lane-wise.
    fn abs(self) -> Self;
    /// `if self < o { o } else { self }` lane-wise (no NaN handling).
    fn max(self, o: Self) -> Self;
    /// `if o < self { o } else { self }` lane-wise (no NaN handling).
    fn min(self, o: Self) -> Self;
    /// All-ones lanes where `self > o`, zero lanes elsewhere (a mask for `&`).
    fn gt(self, o: Self) -> Self;
    /// All-ones lanes where `self != o`.
    fn ne(self, o: Self) -> Self;
    /// Sum of the lanes.
    fn sum(self) -> T;
    /// Largest lane.
    fn max_lane(self) -> T;
}

macro_rules! lanes_impl {
    ($scalar:ty, $vector:ty, $width:expr) => {
        impl Lanes<$scalar> for $vector {
            const WIDTH: usize = $width;
            #[inline(always)]
            fn splat(v: $scalar) -> Self {
                <$vector>::splat(v)
            }
            #[inline(always)]
            fn load(s: &[$scalar]) -> Self {
                let a: [$scalar; $width] = s.try_into().expect("one vector of lanes");
                <$vector>::new(a)
            }
            #[inline(always)]
            fn store(self, s: &mut [$scalar]) {
                s.copy_from_slice(self.as_array_ref());
            }
            #[inline(always)]
            fn abs(self) -> Self {
                <$vector>::abs(self)
            }
            #[inline(always)]
            fn max(self, o: Self) -> Self {
                self.fast_max(o)
            }
            #[inline(always)]
            fn min(self, o: Self) -> Self {
                self.fast_min(o)
            }
            #[inline(always)]
            fn gt(self, o: Self) -> Self {
                wide::CmpGt::cmp_gt(self, o)
            }
            #[inline(always)]
            fn ne(self, o: Self) -> Self {
                wide::CmpNe::cmp_ne(self, o)
            }
            #[inline(always)]
            fn sum(self) -> $scalar {
                self.as_array_ref().iter().fold(0.0, |a, &v| a + v)
            }
            #[inline(always)]
            fn max_lane(self) -> $scalar {
                self.as_array_ref()
                    .iter()
                    .fold(0.0, |a: $scalar, &v| a.max(v))
            }
        }
    };
}

lanes_impl!(f32, wide::f32x8, 8);
lanes_impl!(f64, wide::f64x4, 4);
