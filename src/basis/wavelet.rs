//! Periodized orthonormal Daubechies wavelets db1..db10, multi-level, for transient-rich
//! windows (impacts, bearing defects) that are sparse in time-scale rather than in frequency.
//!
//! Hand-written filter bank: no maintained crate provides a periodized orthonormal DWT that
//! matches PyWavelets, and the O(n L) convolution is simple enough that a dependency would not
//! pay for itself.
//!
//! # Definition (matches `pywt.wavedec(x, 'dbN', mode='periodization', level=J)`)
//!
//! With `h` = PyWavelets' `rec_lo` (L = 2N taps), `g[k] = (-1)^k h[L-1-k]` (`rec_hi`) and the
//! shift `s = L/2 - 1`, one level on a block of even length `M` is
//!
//! ```text
//! cA[i] = sum_k h[k] x[(2i + k - s) mod M],   cD[i] = sum_k g[k] x[(2i + k - s) mod M]
//! ```
//!
//! for `i = 0..M/2` (the modulus may wrap more than once when `M < L`, as PyWavelets does).
//! The step is orthogonal and synthesis is its transpose. Levels repeat the step on `cA`.

use super::{length_mismatch, Basis, BasisError, BasisKind, BasisScratch};
use crate::real::Real;
use std::fmt;
use std::ops::Range;

/// Highest supported Daubechies order.
pub const MAX_ORDER: u8 = 10;

/// Reconstruction low-pass filters `h` of db1..db10, exactly PyWavelets 1.9
/// `pywt.Wavelet('dbN').rec_lo` (float64, shortest round-trip repr), in the order of
/// Daubechies' Table 6.1 (I. Daubechies, SIAM 1992 monograph, CBMS-NSF Regional Conference
/// Series in Applied Mathematics 61; extremal phase, `sum h = sqrt 2`).
pub const DAUBECHIES_REC_LO: [&[f64]; 10] = [
    // pywt gives 0.7071067811865476, which is exactly the f64 value of 1/sqrt(2).
    &[
        std::f64::consts::FRAC_1_SQRT_2,
        std::f64::consts::FRAC_1_SQRT_2,
    ],
    &[
        0.48296291314453416,
        0.8365163037378079,
        0.2241438680420134,
        -0.12940952255126037,
    ],
    &[
        0.33267055295008263,
        0.8068915093110925,
        0.45987750211849154,
        -0.13501102001025458,
        -0.08544127388202666,
        0.03522629188570953,
    ],
    &[
        0.2303778133088965,
        0.7148465705529157,
        0.6308807679298589,
        -0.027983769416859854,
        -0.18703481171909309,
        0.030841381835560764,
        0.0328830116668852,
        -0.010597401785069032,
    ],
    &[
        0.16010239797419293,
        0.6038292697971896,
        0.7243085284377729,
        0.13842814590132074,
        -0.24229488706638203,
        -0.032244869584638375,
        0.07757149384004572,
        -0.006241490212798274,
        -0.012580751999081999,
        0.0033357252854737712,
    ],
    &[
        0.11154074335010947,
        0.49462389039845306,
        0.7511339080210954,
        0.31525035170919763,
        -0.22626469396543983,
        -0.12976686756726194,
        0.09750160558732304,
        0.027522865530305727,
        -0.03158203931748603,
        0.0005538422011614961,
        0.004777257510945511,
        -0.0010773010853084796,
    ],
    &[
        0.07785205408500918,
        0.3965393194819173,
        0.7291320908462351,
        0.4697822874051931,
        -0.14390600392856498,
        -0.22403618499387498,
        0.07130921926683026,
        0.08061260915108308,
        -0.03802993693501441,
        -0.01657454163066688,
        0.01255099855609984,
        0.0004295779729213665,
        -0.0018016407040474908,
        0.00035371379997452024,
    ],
    &[
        0.05441584224310401,
        0.31287159091429995,
        0.6756307362972898,
        0.5853546836542067,
        -0.015829105256349306,
        -0.2840155429615469,
        0.0004724845739132828,
        0.12874742662047847,
        -0.017369301001807547,
        -0.044088253930794755,
        0.013981027917398282,
        0.008746094047405777,
        -0.004870352993451574,
        -0.00039174037337694705,
        0.0006754494064505693,
        -0.00011747678412476953,
    ],
    &[
        0.038077947363878345,
        0.24383467461259034,
        0.6048231236901112,
        0.6572880780513005,
        0.13319738582500756,
        -0.2932737832791749,
        -0.09684078322297646,
        0.14854074933810638,
        0.03072568147933338,
        -0.06763282906132997,
        0.00025094711483145197,
        0.022361662123679096,
        -0.004723204757751397,
        -0.00428150368246343,
        0.0018476468830562265,
        0.00023038576352319597,
        -0.0002519631889427101,
        3.93473203162716e-05,
    ],
    &[
        0.026670057900555554,
        0.1881768000776915,
        0.5272011889317256,
        0.6884590394536035,
        0.2811723436605775,
        -0.24984642432731538,
        -0.19594627437737705,
        0.12736934033579325,
        0.09305736460357235,
        -0.07139414716639708,
        -0.029457536821875813,
        0.033212674059341,
        0.0036065535669561697,
        -0.010733175483330575,
        0.001395351747052901,
        0.001992405295185056,
        -0.0006858566949597116,
        -0.00011646685512928545,
        9.358867032006959e-05,
        -1.3264202894521244e-05,
    ],
];

/// The reconstruction low-pass filter `h` (PyWavelets `rec_lo`) of `db<order>`, or `None`
/// outside 1..=10.
pub fn daubechies_rec_lo(order: u8) -> Option<&'static [f64]> {
    DAUBECHIES_REC_LO
        .get(usize::from(order).checked_sub(1)?)
        .copied()
}

/// The quadrature-mirror high-pass `g[k] = (-1)^k h[L-1-k]` (PyWavelets `rec_hi`).
pub fn quadrature_mirror(h: &[f64]) -> Vec<f64> {
    let l = h.len();
    (0..l)
        .map(|k| {
            if k % 2 == 0 {
                h[l - 1 - k]
            } else {
                -h[l - 1 - k]
            }
        })
        .collect()
}

/// `pywt.dwt_max_level(n, filter_len)`: `floor(log2(n / (filter_len - 1)))`, 0 when
/// `n < filter_len - 1` (PyWavelets documentation; it is the deepest level at which the
/// coarsest block is still at least one filter span long).
pub fn dwt_max_level(n: usize, filter_len: usize) -> u32 {
    if filter_len < 2 || n < filter_len - 1 {
        return 0;
    }
    (n / (filter_len - 1)).ilog2()
}

/// Resolves the number of levels for `db<order>` at length `len`.
///
/// - Explicit `Some(J)`: requires `J >= 1` and `len` divisible by `2^J` (each level halves an
///   even block, so every level's input has length >= 2). Deeper than
///   [`dwt_max_level`] is allowed, as PyWavelets allows it with a warning.
/// - `None` (automatic): the largest `J <= max(1, dwt_max_level(len, 2*order))` with `len`
///   divisible by `2^J`; at least 1, so `len` must be even.
///
/// # Errors
/// [`BasisError::UnsupportedWavelet`] for an order outside 1..=10, [`BasisError::BadLength`]
/// when the length does not allow the levels.
pub fn resolve_levels(order: u8, levels: Option<u8>, len: usize) -> Result<u8, BasisError> {
    let h = daubechies_rec_lo(order).ok_or(BasisError::UnsupportedWavelet(order))?;
    let kind = BasisKind::Daubechies { order, levels };
    let bad = |why: String| BasisError::BadLength { kind, len, why };
    let twos = if len == 0 { 0 } else { len.trailing_zeros() };
    match levels {
        Some(0) => Err(bad("the number of levels must be at least 1".into())),
        Some(j) if u32::from(j) > twos => Err(bad(format!(
            "{j} levels need a positive length that is a multiple of 2^{j}"
        ))),
        Some(j) => Ok(j),
        None => {
            if len == 0 || len % 2 != 0 {
                return Err(bad(
                    "a periodized wavelet needs an even length (a multiple of 2^levels)".into(),
                ));
            }
            let max = dwt_max_level(len, h.len()).max(1);
            Ok(max.min(twos) as u8)
        }
    }
}

/// Periodized orthonormal Daubechies wavelet basis, `db1..db10`, `J` levels.
///
/// - **Scaling**: orthonormal (filters with `sum h = sqrt 2`, `sum h^2 = 1`).
/// - **Coefficient order**: PyWavelets `wavedec` concatenated, `[cA_J, cD_J, cD_{J-1}, ...,
///   cD_1]`; block `cD_j` has `n / 2^j` coefficients and starts at `n / 2^j`, `cA_J` is the
///   first `n / 2^J`.
/// - **Valid lengths**: `n` divisible by `2^J`; see [`resolve_levels`] for the automatic `J`.
/// - **Frequencies**: [`Basis::coefficient_freq_hz`] gives the centre of the coefficient's
///   nominal octave band: `3 fs / 2^(j+2)` for `cD_j` (band `fs/2^(j+1) .. fs/2^j`), and
///   `fs / 2^(J+2)` for `cA_J` (band `0 .. fs/2^(J+1)`).
#[derive(Clone)]
pub struct Daubechies<T: Real> {
    len: usize,
    order: u8,
    levels: u8,
    /// Analysis low-pass, `h` (applied as a correlation, see the module docs).
    lo: Vec<T>,
    /// Analysis high-pass, `g`.
    hi: Vec<T>,
}

impl<T: Real> fmt::Debug for Daubechies<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Daubechies")
            .field("len", &self.len)
            .field("order", &self.order)
            .field("levels", &self.levels)
            .finish()
    }
}

impl<T: Real> Daubechies<T> {
    /// Plans `db<order>` with `levels` levels (`None`: automatic, see [`resolve_levels`]) for
    /// length `len`.
    ///
    /// # Errors
    /// [`BasisError::UnsupportedWavelet`] for an order outside 1..=10; [`BasisError::BadLength`]
    /// if `len` is not divisible by `2^levels` or is odd (automatic levels).
    pub fn new(order: u8, levels: Option<u8>, len: usize) -> Result<Self, BasisError> {
        let levels = resolve_levels(order, levels, len)?;
        let h = daubechies_rec_lo(order).ok_or(BasisError::UnsupportedWavelet(order))?;
        Ok(Self {
            len,
            order,
            levels,
            lo: h.iter().map(|&v| T::of(v)).collect(),
            hi: quadrature_mirror(h).into_iter().map(T::of).collect(),
        })
    }

    /// The number of decomposition levels `J` actually used.
    pub fn levels(&self) -> u8 {
        self.levels
    }

    /// The Daubechies order (vanishing moments); the filters have `2 * order` taps.
    pub fn order(&self) -> u8 {
        self.order
    }

    /// Index range of block `cD_j`, `j = 1..=levels`.
    pub fn detail_range(&self, j: u8) -> Range<usize> {
        let m = self.len >> j;
        m..2 * m
    }

    fn scratch_len(&self) -> usize {
        self.len + self.lo.len()
    }

    /// Periodic extension of `x`: `ext[t] = x[(t - s) mod m]`, `t = 0..m + L - 2`.
    fn extend(&self, x: &[T], ext: &mut [T]) {
        let m = x.len();
        let s = self.lo.len() / 2 - 1;
        // (t - s) mod m computed without signed arithmetic: start at (m - s mod m) mod m.
        let mut src = (m - s % m) % m;
        for e in ext.iter_mut() {
            *e = x[src];
            src += 1;
            if src == m {
                src = 0;
            }
        }
    }
}

impl<T: Real> Basis<T> for Daubechies<T> {
    fn kind(&self) -> BasisKind {
        BasisKind::Daubechies {
            order: self.order,
            levels: Some(self.levels),
        }
    }

    fn len(&self) -> usize {
        self.len
    }

    fn analyze(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        if buf.len() != self.len {
            length_mismatch(self.len, buf.len());
        }
        let taps = self.lo.len();
        let (work, _) = scratch.take(self.scratch_len(), 0);
        let mut m = self.len;
        for _ in 0..self.levels {
            let ext = &mut work[..m + taps - 2];
            self.extend(&buf[..m], ext);
            let (ca, rest) = buf[..m].split_at_mut(m / 2);
            for (i, (a, d)) in ca.iter_mut().zip(rest.iter_mut()).enumerate() {
                let win = &ext[2 * i..2 * i + taps];
                let (mut sa, mut sd) = (T::zero(), T::zero());
                for ((&x, &h), &g) in win.iter().zip(&self.lo).zip(&self.hi) {
                    sa += h * x;
                    sd += g * x;
                }
                *a = sa;
                *d = sd;
            }
            m /= 2;
        }
    }

    fn synthesize(&self, buf: &mut [T], scratch: &mut BasisScratch<T>) {
        if buf.len() != self.len {
            length_mismatch(self.len, buf.len());
        }
        let taps = self.lo.len();
        let s = taps / 2 - 1;
        let (work, _) = scratch.take(self.scratch_len(), 0);
        let mut m = self.len >> (self.levels - 1);
        for _ in 0..self.levels {
            // Transpose of `analyze`: scatter into the extended domain, then fold it back
            // periodically onto the block.
            let ext = &mut work[..m + taps - 2];
            ext.fill(T::zero());
            let (ca, cd) = buf[..m].split_at(m / 2);
            for (i, (&a, &d)) in ca.iter().zip(cd).enumerate() {
                let win = &mut ext[2 * i..2 * i + taps];
                for ((y, &h), &g) in win.iter_mut().zip(&self.lo).zip(&self.hi) {
                    *y += h * a + g * d;
                }
            }
            let out = &mut buf[..m];
            out.fill(T::zero());
            let mut dst = (m - s % m) % m;
            for &y in ext.iter() {
                out[dst] += y;
                dst += 1;
                if dst == m {
                    dst = 0;
                }
            }
            m *= 2;
        }
    }

    fn coefficient_freq_hz(&self, k: usize, sample_rate_hz: f64) -> Option<f64> {
        if k >= self.len {
            return None;
        }
        let approx = self.len >> self.levels;
        if k < approx {
            return Some(sample_rate_hz / 2f64.powi(i32::from(self.levels) + 2));
        }
        // cD_j occupies [n/2^j, n/2^(j-1)).
        let j = (1..=self.levels)
            .find(|&j| k >= self.len >> j)
            .unwrap_or(self.levels);
        Some(3.0 * sample_rate_hz / 2f64.powi(i32::from(j) + 2))
    }

    fn finest_detail_range(&self) -> Range<usize> {
        self.detail_range(1)
    }
}
