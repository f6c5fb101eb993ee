//! Integration tests of the orthonormal bases: fast transforms against the O(n^2) references
//! in `basis::naive` over many lengths, against published values (scipy, numpy, PyWavelets,
//! copied here with the call that produced them), and the algebraic properties every
//! orthonormal basis must have (orthonormality, Parseval, adjoint identity).

// Reference values are copied digit for digit as published, trailing zeros included.
#![allow(clippy::excessive_precision)]

use csgate::basis::naive::{self, DenseBasis};
use csgate::basis::wavelet::{daubechies_rec_lo, dwt_max_level, quadrature_mirror};
use csgate::basis::{
    plan_basis, Basis, BasisError, BasisKind, BasisPlanner, BasisScratch, Daubechies, Dct,
    RealFourier, SharedBasis,
};
use csgate::real::Real;
use std::sync::Arc;

/// Deterministic uniform(-1, 1) values (splitmix64; common practice for seeded test data).
fn signal(n: usize, seed: u64) -> Vec<f64> {
    let mut s = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ 0xD1B5_4A32_D192_ED03;
    (0..n)
        .map(|_| {
            s = s.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = s;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            z ^= z >> 31;
            (z >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
        })
        .collect()
}

fn norm(x: &[f64]) -> f64 {
    x.iter().map(|v| v * v).sum::<f64>().sqrt()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// max |got - want| / max(||want||, 1e-300).
fn rel_err(got: &[f64], want: &[f64]) -> f64 {
    assert_eq!(got.len(), want.len());
    let e = got
        .iter()
        .zip(want)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    e / norm(want).max(1e-300)
}

/// A scratch pre-filled with NaN so that any read of stale scratch poisons the result
/// (RustFFT's test style: run again with dirty scratch).
fn dirty_scratch<T: Real>(n: usize) -> BasisScratch<T> {
    BasisScratch {
        real: vec![T::nan(); 3 * n + 64],
        complex: vec![num_complex::Complex::new(T::nan(), T::nan()); 3 * n + 64],
    }
}

fn apply<T: Real>(b: &dyn Basis<T>, x: &[f64], forward: bool, s: &mut BasisScratch<T>) -> Vec<f64> {
    let mut buf: Vec<T> = x.iter().map(|&v| T::of(v)).collect();
    if forward {
        b.analyze(&mut buf, s);
    } else {
        b.synthesize(&mut buf, s);
    }
    buf.into_iter().map(|v| v.to_f64_()).collect()
}

/// Checks `b` against reference analysis / synthesis on a seeded signal, with a fresh and
/// then a dirty scratch, to relative tolerance `tol`.
fn check_against<T: Real>(
    b: &dyn Basis<T>,
    analysis: &dyn Fn(&[f64]) -> Vec<f64>,
    synthesis: &dyn Fn(&[f64]) -> Vec<f64>,
    tol: f64,
) {
    let n = b.len();
    let x = signal(n, n as u64);
    let want_a = analysis(&x);
    let want_s = synthesis(&x);
    let mut fresh = BasisScratch::new();
    let mut dirty = dirty_scratch::<T>(n);
    for (label, s) in [("fresh", &mut fresh), ("dirty", &mut dirty)] {
        let ea = rel_err(&apply(b, &x, true, s), &want_a);
        let es = rel_err(&apply(b, &x, false, s), &want_s);
        assert!(
            ea < tol,
            "{:?} n={n} analyze ({label} scratch): {ea:e}",
            b.kind()
        );
        assert!(
            es < tol,
            "{:?} n={n} synthesize ({label} scratch): {es:e}",
            b.kind()
        );
    }
}

fn sweep_lengths() -> Vec<usize> {
    let mut v: Vec<usize> = (1..=64).collect();
    v.extend([100, 127, 128, 255, 256, 1000, 1024, 4096]);
    v
}

// f64: rounding of an O(n log n) transform is a few eps * log2(n) relative to the norm;
// 1e-12 leaves a wide margin (common practice). f32: the same argument with eps = 1.2e-7.
const TOL_F64: f64 = 1e-12;
const TOL_F32: f64 = 2e-5;

#[test]
fn dct_matches_definition_over_lengths() {
    for n in sweep_lengths() {
        let b64 = Dct::<f64>::new(n).unwrap();
        check_against(&b64, &naive::dct2, &naive::dct3, TOL_F64);
        let b32 = Dct::<f32>::new(n).unwrap();
        check_against(&b32, &naive::dct2, &naive::dct3, TOL_F32);
    }
}

#[test]
fn fourier_matches_definition_over_lengths() {
    for n in sweep_lengths() {
        let b64 = RealFourier::<f64>::new(n).unwrap();
        check_against(
            &b64,
            &naive::fourier_analyze,
            &naive::fourier_synthesize,
            TOL_F64,
        );
        let b32 = RealFourier::<f32>::new(n).unwrap();
        check_against(
            &b32,
            &naive::fourier_analyze,
            &naive::fourier_synthesize,
            TOL_F32,
        );
    }
}

// CHECK-VALUES 1.3: scipy.fft.dct(x, type=2, norm='ortho'), scipy 1.17.1, float64.
const X8: [f64; 8] = [1.0, -2.0, 3.0, 0.5, -1.0, 4.0, 2.0, -3.0];
const SCIPY_DCT_X8: [f64; 8] = [
    1.590990257669732,
    0.167163961203666,
    -2.032301662661279,
    2.126834834074261,
    -3.358757210636100,
    3.598768075064510,
    2.946565789515686,
    0.349997343617765,
];

fn assert_close(got: &[f64], want: &[f64], tol: f64, what: &str) {
    assert_eq!(got.len(), want.len(), "{what}: length");
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert!((g - w).abs() <= tol, "{what}[{i}]: got {g}, want {w}");
    }
}

#[test]
fn dct_scipy_worked_examples_n8() {
    let dct = Dct::<f64>::new(8).unwrap();
    let mut s = BasisScratch::new();
    let got = apply(&dct, &X8, true, &mut s);
    assert_close(&got, &SCIPY_DCT_X8, 1e-12, "scipy dct(x, norm='ortho')");
    // Parseval: sum x^2 = sum X^2 = 44.25 (CHECK-VALUES 1.3, scipy).
    assert!((dot(&got, &got) - 44.25).abs() < 1e-12);
    // X[0] = 4.5 / sqrt(8) (CHECK-VALUES 1.3, derived).
    assert!((got[0] - 4.5 / 8f64.sqrt()).abs() < 1e-15);
    // Inverse (scipy dct type=3 ortho) recovers x (CHECK-VALUES 1.3: to 4.4e-16).
    assert_close(
        &apply(&dct, &got, false, &mut s),
        &X8,
        1e-14,
        "dct3 round trip",
    );

    // scipy.fft.dct(ones(8), norm='ortho') = [2.8284271247461903, 0, ..., 0] (CHECK-VALUES 1.3).
    let mut want = [0.0; 8];
    want[0] = 2.8284271247461903;
    assert_close(
        &apply(&dct, &[1.0; 8], true, &mut s),
        &want,
        1e-12,
        "dct(ones)",
    );

    // x[j] = cos(pi*3*(2j+1)/16) gives X = [0,0,0,2,0,0,0,0] = sqrt(n/2) at k=3 (CHECK-VALUES 1.3).
    let x: Vec<f64> = (0..8)
        .map(|j| (std::f64::consts::PI * 3.0 * (2 * j + 1) as f64 / 16.0).cos())
        .collect();
    let mut want = [0.0; 8];
    want[3] = 2.0;
    assert_close(&apply(&dct, &x, true, &mut s), &want, 1e-12, "dct(cos k=3)");
}

#[test]
fn dct_tone_with_half_sample_phase_is_one_coefficient() {
    // CHECK-VALUES 1.2 (scipy): fs = n = 1000, k = 123 (61.5 Hz);
    // cos(2 pi 61.5 t + pi*123/2000) gives the single coefficient X[123] = 22.360679774998.
    let n = 1000;
    let dct = Dct::<f64>::new(n).unwrap();
    let x: Vec<f64> = (0..n)
        .map(|j| {
            let t = j as f64 / 1000.0;
            (2.0 * std::f64::consts::PI * 61.5 * t + std::f64::consts::PI * 123.0 / 2000.0).cos()
        })
        .collect();
    let c = apply(&dct, &x, true, &mut BasisScratch::new());
    assert!((c[123] - 22.360679774998).abs() < 1e-9);
    let others = c
        .iter()
        .enumerate()
        .filter(|&(k, _)| k != 123)
        .map(|(_, v)| v.abs())
        .fold(0.0, f64::max);
    assert!(others < 1e-9, "leakage {others}");
    assert_eq!(dct.coefficient_freq_hz(123, 1000.0), Some(61.5));
}

#[test]
fn dct_bin_frequencies() {
    // CHECK-VALUES 1.2 (derived): f_k = k fs / (2n); fs = 25600, n = 4096 gives 3.125 Hz spacing.
    let dct = Dct::<f32>::new(4096).unwrap();
    assert_eq!(dct.coefficient_freq_hz(1, 25600.0), Some(3.125));
    assert_eq!(dct.coefficient_freq_hz(4095, 25600.0), Some(12796.875));
    assert_eq!(dct.coefficient_freq_hz(4096, 25600.0), None);
}

#[test]
fn fourier_matches_numpy_rfft_mapped_to_real_basis() {
    // CHECK-VALUES 1.4: numpy.fft.rfft of the x of 1.3 (numpy 2.4.6):
    // R0 = 4.5, R1 = -4.717514421272201 + 0.767766952966370j, R2 = -5 - 4.5j,
    // R3 = 8.717514421272201 + 2.767766952966370j, R4 = 5.5.
    // Mapped through our order/scaling: c0 = R0/sqrt(n), (cos_k, sin_k) = sqrt(2/n)(Re, -Im),
    // c7 = R4/sqrt(n), n = 8.
    let r8 = 8f64.sqrt();
    let p = (2.0f64 / 8.0).sqrt();
    let want = [
        4.5 / r8,
        p * -4.717514421272201,
        -p * 0.767766952966370,
        p * -5.0,
        -p * -4.5,
        p * 8.717514421272201,
        -p * 2.767766952966370,
        5.5 / r8,
    ];
    let f = RealFourier::<f64>::new(8).unwrap();
    let mut s = BasisScratch::new();
    let got = apply(&f, &X8, true, &mut s);
    assert_close(&got, &want, 1e-12, "real Fourier of x8");
    // One-sided energy (ortho) = 44.25 (CHECK-VALUES 1.4).
    assert!((dot(&got, &got) - 44.25).abs() < 1e-12);
    assert_close(&apply(&f, &got, false, &mut s), &X8, 1e-14, "round trip");
}

#[test]
fn fourier_tone_amplitude_and_phase() {
    // CHECK-VALUES 1.4 (numpy): A cos(2 pi f_k t + phi), A = 2.5, n = 4096, fs = 25600, k = 100
    // (625 Hz), phi = 0.3 gives |R[k]| = A n / 2 = 5120, arg R[k] = phi. In our basis that is
    // (cos_k, sin_k) = sqrt(2/n) * 5120 * (cos phi, -sin phi).
    let (n, fs, k, a, phi) = (4096usize, 25600.0, 100usize, 2.5, 0.3f64);
    let x: Vec<f64> = (0..n)
        .map(|j| a * (2.0 * std::f64::consts::PI * 625.0 * j as f64 / fs + phi).cos())
        .collect();
    let f = RealFourier::<f64>::new(n).unwrap();
    let c = apply(&f, &x, true, &mut BasisScratch::new());
    let scale = (2.0 / n as f64).sqrt() * 5120.0;
    assert!((c[2 * k - 1] - scale * phi.cos()).abs() < 1e-9);
    assert!((c[2 * k] + scale * phi.sin()).abs() < 1e-9);
    assert!((c[2 * k].atan2(c[2 * k - 1]) + phi).abs() < 1e-12);
    assert_eq!(f.coefficient_freq_hz(2 * k - 1, fs), Some(625.0));
    assert_eq!(f.coefficient_freq_hz(2 * k, fs), Some(625.0));
}

#[test]
fn fourier_bin_frequencies_follow_rfftfreq() {
    // CHECK-VALUES 1.4: rfftfreq(8, d=1/8) = [0, 1, 2, 3, 4], rfftfreq(7, d=1/7) = [0, 1, 2, 3];
    // our order repeats each bin for its cos and sin.
    let f8 = RealFourier::<f64>::new(8).unwrap();
    let got: Vec<f64> = (0..8)
        .map(|k| f8.coefficient_freq_hz(k, 8.0).unwrap())
        .collect();
    assert_eq!(got, [0.0, 1.0, 1.0, 2.0, 2.0, 3.0, 3.0, 4.0]);
    let f7 = RealFourier::<f64>::new(7).unwrap();
    let got: Vec<f64> = (0..7)
        .map(|k| f7.coefficient_freq_hz(k, 7.0).unwrap())
        .collect();
    assert_eq!(got, [0.0, 1.0, 1.0, 2.0, 2.0, 3.0, 3.0]);
    assert_eq!(f7.coefficient_freq_hz(7, 7.0), None);
}

/// Every supported wavelet and every valid level at the given lengths.
fn wavelet_kinds(n: usize) -> Vec<BasisKind> {
    let mut v = Vec::new();
    for order in 1..=10u8 {
        for j in 1..=n.trailing_zeros() as u8 {
            v.push(BasisKind::Daubechies {
                order,
                levels: Some(j),
            });
        }
    }
    v
}

fn all_kinds(n: usize) -> Vec<BasisKind> {
    let mut v = vec![BasisKind::Dct, BasisKind::Fourier];
    if n % 2 == 0 {
        v.extend(wavelet_kinds(n));
    }
    v
}

/// Dense synthesis matrix of a fast basis, column i = synthesize(e_i).
fn dense_from_fast(b: &dyn Basis<f64>) -> Vec<Vec<f64>> {
    let n = b.len();
    let mut s = BasisScratch::new();
    (0..n)
        .map(|i| {
            let mut e = vec![0.0; n];
            e[i] = 1.0;
            b.synthesize(&mut e, &mut s);
            e
        })
        .collect()
}

#[test]
fn every_basis_is_orthonormal() {
    // Psi^T Psi = I from the columns synthesize(e_i) (definition of orthonormal; CHECK-VALUES
    // 2.4 reports W^T W = I to 7.8e-16 for the periodized wavelets at n = 256).
    for n in [1usize, 2, 3, 4, 7, 8, 12, 16, 31, 32, 48, 64] {
        for kind in all_kinds(n) {
            let b = plan_basis::<f64>(kind, n).unwrap();
            let cols = dense_from_fast(b.as_ref());
            for i in 0..n {
                for j in 0..n {
                    let want = if i == j { 1.0 } else { 0.0 };
                    let got = dot(&cols[i], &cols[j]);
                    assert!((got - want).abs() < 1e-13, "{kind} n={n} ({i},{j}): {got}");
                }
            }
        }
    }
}

#[test]
fn parseval_round_trip_and_adjoint_for_every_basis() {
    for n in [2usize, 6, 16, 64, 96, 128, 1000, 1024] {
        for kind in all_kinds(n) {
            let b = plan_basis::<f64>(kind, n).unwrap();
            let mut s = BasisScratch::new();
            let x = signal(n, 7 + n as u64);
            let c = apply(b.as_ref(), &x, true, &mut s);
            // Parseval (orthonormal basis preserves energy).
            let (ex, ec) = (dot(&x, &x), dot(&c, &c));
            assert!((ex - ec).abs() < 1e-12 * ex, "{kind} n={n}: {ex} vs {ec}");
            // synthesize(analyze(x)) = x.
            let back = apply(b.as_ref(), &c, false, &mut s);
            assert!(rel_err(&back, &x) < 1e-13, "{kind} n={n}: round trip");
            // Adjoint identity <Psi a, b> = <a, Psi^T b> (common practice).
            let a = signal(n, 1000 + n as u64);
            let y = signal(n, 2000 + n as u64);
            let lhs = dot(&apply(b.as_ref(), &a, false, &mut s), &y);
            let rhs = dot(&a, &apply(b.as_ref(), &y, true, &mut s));
            assert!(
                (lhs - rhs).abs() < 1e-12 * norm(&a) * norm(&y),
                "{kind} n={n}: adjoint {lhs} vs {rhs}"
            );
        }
    }
}

#[test]
fn adjoint_identity_in_f32() {
    for n in [64usize, 1024] {
        for kind in [
            BasisKind::Dct,
            BasisKind::Fourier,
            "db4".parse().unwrap(),
            "db8:3".parse().unwrap(),
        ] {
            let b = plan_basis::<f32>(kind, n).unwrap();
            let mut s = BasisScratch::new();
            let a = signal(n, 3);
            let y = signal(n, 4);
            let lhs = dot(&apply(b.as_ref(), &a, false, &mut s), &y);
            let rhs = dot(&a, &apply(b.as_ref(), &y, true, &mut s));
            assert!(
                (lhs - rhs).abs() < 1e-5 * norm(&a) * norm(&y),
                "{kind} n={n}"
            );
        }
    }
}

// CHECK-VALUES 2.1: pywt.Wavelet(name).rec_lo (PyWavelets 1.9.0), float64 shortest repr.
const DB2: [f64; 4] = [
    0.48296291314453416,
    0.8365163037378079,
    0.2241438680420134,
    -0.12940952255126037,
];
const DB4: [f64; 8] = [
    0.2303778133088965,
    0.7148465705529157,
    0.6308807679298589,
    -0.027983769416859854,
    -0.18703481171909309,
    0.030841381835560764,
    0.0328830116668852,
    -0.010597401785069032,
];
const DB8: [f64; 16] = [
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
];

#[test]
fn filter_tables_match_pywavelets() {
    assert_eq!(daubechies_rec_lo(2).unwrap(), &DB2);
    assert_eq!(daubechies_rec_lo(4).unwrap(), &DB4);
    assert_eq!(daubechies_rec_lo(8).unwrap(), &DB8);
    // db2 closed form h = [1+sqrt3, 3+sqrt3, 3-sqrt3, 1-sqrt3]/(4 sqrt2) (Daubechies 1988;
    // CHECK-VALUES 2.1 reports agreement with pywt to 2.2e-16).
    let r3 = 3f64.sqrt();
    let d = 4.0 * 2f64.sqrt();
    let closed = [
        (1.0 + r3) / d,
        (3.0 + r3) / d,
        (3.0 - r3) / d,
        (1.0 - r3) / d,
    ];
    assert_close(&DB2, &closed, 3e-16, "db2 closed form");
    assert!(daubechies_rec_lo(0).is_none());
    assert!(daubechies_rec_lo(11).is_none());
    for order in 1..=10u8 {
        assert_eq!(daubechies_rec_lo(order).unwrap().len(), 2 * order as usize);
    }
}

#[test]
fn filter_identities_hold_for_every_wavelet() {
    // CHECK-VALUES 2.3 (computed with PyWavelets): sum h = sqrt 2, sum h^2 = 1, double-shift
    // orthogonality, sum g = 0, sum (-1)^n h = 0, sum h[n] g[n+2m] = 0 and the vanishing
    // moments sum k^p g[k] = 0 for p < N, with tolerance scaled by k^p as the sheet advises.
    for order in 1..=10u8 {
        let h = daubechies_rec_lo(order).unwrap();
        let g = quadrature_mirror(h);
        let l = h.len() as isize;
        let corr = |a: &[f64], b: &[f64], shift: isize| -> f64 {
            (0..l)
                .filter(|&i| (0..l).contains(&(i + shift)))
                .map(|i| a[i as usize] * b[(i + shift) as usize])
                .sum()
        };
        assert!(
            (h.iter().sum::<f64>() - std::f64::consts::SQRT_2).abs() < 1e-14,
            "db{order}"
        );
        assert!((g.iter().sum::<f64>()).abs() < 1e-14, "db{order}");
        let alt: f64 = h
            .iter()
            .enumerate()
            .map(|(i, v)| if i % 2 == 0 { *v } else { -v })
            .sum();
        assert!(alt.abs() < 1e-14, "db{order}");
        for m in -(l / 2)..=(l / 2) {
            let want = if m == 0 { 1.0 } else { 0.0 };
            assert!(
                (corr(h, h, 2 * m) - want).abs() < 1e-14,
                "db{order} hh m={m}"
            );
            assert!(
                (corr(&g, &g, 2 * m) - want).abs() < 1e-14,
                "db{order} gg m={m}"
            );
            assert!(corr(h, &g, 2 * m).abs() < 1e-14, "db{order} hg m={m}");
        }
        for p in 0..order as i32 {
            let moment: f64 = g
                .iter()
                .enumerate()
                .map(|(k, v)| (k as f64).powi(p) * v)
                .sum();
            let scale: f64 = g
                .iter()
                .enumerate()
                .map(|(k, v)| ((k as f64).powi(p) * v).abs())
                .sum();
            assert!(
                moment.abs() < 1e-12 * scale,
                "db{order} moment p={p}: {moment:e}"
            );
        }
    }
    // First non-vanishing moment p = N (CHECK-VALUES 2.3, PyWavelets).
    for (order, want) in [
        (2u8, -1.2247448713915894),
        (4, -12.549900398011104),
        (8, -17867.748529061675),
    ] {
        let g = quadrature_mirror(daubechies_rec_lo(order).unwrap());
        let m: f64 = g
            .iter()
            .enumerate()
            .map(|(k, v)| (k as f64).powi(order as i32) * v)
            .sum();
        assert!((m - want).abs() < 1e-9 * want.abs(), "db{order}: {m}");
    }
}

// CHECK-VALUES 2.5: pywt.wavedec(x, 'db2', mode='periodization', level=2), PyWavelets 1.9.0.
const X16: [f64; 16] = [
    4.0, 2.0, -1.0, 3.0, 0.0, 5.0, 1.0, -2.0, 6.0, 2.0, -3.0, 1.0, 0.5, 2.5, -1.5, 4.0,
];
const CA2: [f64; 4] = [
    4.922395640574857,
    2.250000000000000,
    4.544550807568877,
    0.033053551856266,
];
const CD2: [f64; 4] = [
    -1.863180570778460,
    -1.316987298107781,
    -3.315784930203604,
    -2.742667868886240,
];
const CD1: [f64; 8] = [
    0.741781958247055,
    2.474873734152917,
    3.311390037890725,
    -5.442001567141135,
    2.035877183759658,
    1.008647406189060,
    2.574253672489054,
    1.426905558057964,
];
// CHECK-VALUES 2.5: level-1 cA from pywt.dwt(x, 'db2', mode='periodization').
const CA1: [f64; 8] = [
    5.855614126164656,
    0.801841126677301,
    2.440198557092409,
    2.02658599806889,
    4.889688299875587,
    -1.384183978157972,
    1.655695018945362,
    0.331570209217636,
];

#[test]
fn wavelet_pywavelets_worked_example() {
    let mut want = CA2.to_vec();
    want.extend(CD2);
    want.extend(CD1);
    // pywt.dwt_max_level(16, 4) = 2 (CHECK-VALUES 2.5), so the automatic level is 2.
    assert_eq!(dwt_max_level(16, 4), 2);
    let auto = Daubechies::<f64>::new(2, None, 16).unwrap();
    assert_eq!(auto.levels(), 2);
    let mut s = BasisScratch::new();
    let got = apply(&auto, &X16, true, &mut s);
    assert_close(&got, &want, 1e-12, "fast wavedec db2 level 2");
    assert_close(
        &naive::wavedec_periodized(&X16, &DB2, 2),
        &want,
        1e-12,
        "reference wavedec db2 level 2",
    );
    // Energy 134.75 in x and in the coefficients; waverec returns x (CHECK-VALUES 2.5).
    assert!((dot(&got, &got) - 134.75).abs() < 1e-12);
    assert_close(&apply(&auto, &got, false, &mut s), &X16, 1e-13, "waverec");

    let one = Daubechies::<f64>::new(2, Some(1), 16).unwrap();
    let got1 = apply(&one, &X16, true, &mut s);
    assert_close(&got1[..8], &CA1, 1e-12, "fast dwt cA level 1");
    assert_close(&got1[8..], &CD1, 1e-12, "fast dwt cD level 1");

    // Band centres: cA2 -> fs/16, cD2 -> 3 fs/16, cD1 -> 3 fs/8 (our documented convention).
    assert_eq!(auto.coefficient_freq_hz(0, 16.0), Some(1.0));
    assert_eq!(auto.coefficient_freq_hz(4, 16.0), Some(3.0));
    assert_eq!(auto.coefficient_freq_hz(15, 16.0), Some(6.0));
    assert_eq!(auto.coefficient_freq_hz(16, 16.0), None);
    assert_eq!(auto.finest_detail_range(), 8..16);
}

#[test]
fn wavelets_match_reference_for_every_order_and_level() {
    // Fast filter bank against the explicit-modulus sum formula of CHECK-VALUES 2.4 (which
    // matches pywt.dwt, including blocks shorter than the filter).
    for n in [2usize, 4, 8, 16, 24, 64, 96, 256] {
        for kind in wavelet_kinds(n) {
            let BasisKind::Daubechies { order, levels } = kind else {
                unreachable!()
            };
            let h = daubechies_rec_lo(order).unwrap();
            let j = levels.unwrap();
            let dense = DenseBasis::new(kind, n).unwrap();
            let b64 = Daubechies::<f64>::new(order, levels, n).unwrap();
            let ana = |x: &[f64]| naive::wavedec_periodized(x, h, j);
            let syn = |c: &[f64]| dense.synthesize_f64(c);
            check_against(&b64, &ana, &syn, TOL_F64);
            let b32 = Daubechies::<f32>::new(order, levels, n).unwrap();
            check_against(&b32, &ana, &syn, TOL_F32);
        }
    }
}

#[test]
fn automatic_wavelet_levels() {
    // Rule: largest J <= max(1, dwt_max_level(n, L)) with 2^J dividing n.
    // pywt.dwt_max_level(n, L) = floor(log2(n / (L - 1))) (PyWavelets docs, from memory).
    let cases = [
        // (order, n, expected J)
        (1u8, 1024usize, 10u8),
        (2, 16, 2),
        (4, 4096, 9), // floor(log2(4096/7)) = 9
        (8, 4096, 8), // floor(log2(4096/15)) = 8
        (8, 8, 1),    // max level 0, at least 1
        (4, 96, 3),   // floor(log2(96/7)) = 3, 96 = 2^5 * 3
        (2, 6, 1),    // floor(log2(2)) = 1
        (2, 40, 3),   // floor(log2(40/3)) = 3, 40 = 2^3 * 5
        (2, 1000, 3), // max 8, but 1000 = 2^3 * 125
    ];
    for (order, n, want) in cases {
        let b = Daubechies::<f64>::new(order, None, n).unwrap();
        assert_eq!(b.levels(), want, "db{order} n={n}");
        assert_eq!(
            b.kind(),
            BasisKind::Daubechies {
                order,
                levels: Some(want)
            }
        );
    }
}

#[test]
fn bad_lengths_and_levels_are_reported() {
    let is_bad_length = |r: Result<SharedBasis<f64>, BasisError>, needle: &str| match r {
        Err(e @ BasisError::BadLength { .. }) => {
            let msg = e.to_string();
            assert!(msg.contains(needle), "message {msg:?} lacks {needle:?}");
        }
        other => panic!("expected BadLength, got {other:?}"),
    };
    let db = |order, levels| BasisKind::Daubechies { order, levels };
    is_bad_length(plan_basis(db(4, None), 15), "even length");
    is_bad_length(plan_basis(db(4, None), 0), "even length");
    is_bad_length(plan_basis(db(4, Some(3)), 20), "multiple of 2^3");
    is_bad_length(plan_basis(db(2, Some(0)), 16), "at least 1");
    is_bad_length(plan_basis(db(2, Some(5)), 16), "multiple of 2^5");
    is_bad_length(plan_basis(BasisKind::Dct, 0), "at least 1");
    is_bad_length(plan_basis(BasisKind::Fourier, 0), "at least 1");
    // Deeper than dwt_max_level but still dividing n is allowed (pywt warns, but computes).
    assert!(plan_basis::<f64>(db(8, Some(4)), 16).is_ok());
    assert_eq!(
        plan_basis::<f64>(db(11, None), 16).unwrap_err(),
        BasisError::UnsupportedWavelet(11)
    );
}

#[test]
#[should_panic(expected = "basis buffer length mismatch")]
fn wrong_buffer_length_panics() {
    let b = Dct::<f64>::new(8).unwrap();
    let mut buf = [0.0; 7];
    b.analyze(&mut buf, &mut BasisScratch::new());
}

#[test]
fn basis_kind_parse_display_round_trip() {
    let mut names = vec!["dct".to_string(), "fourier".to_string()];
    for order in 1..=10 {
        names.push(format!("db{order}"));
        names.push(format!("db{order}:3"));
    }
    for name in names {
        let kind: BasisKind = name.parse().unwrap();
        assert_eq!(kind.to_string(), name);
    }
    assert_eq!("DB8".parse::<BasisKind>().unwrap().to_string(), "db8");
    assert_eq!("fft".parse::<BasisKind>().unwrap(), BasisKind::Fourier);
    assert_eq!(
        "db11".parse::<BasisKind>().unwrap_err(),
        BasisError::UnsupportedWavelet(11)
    );
    assert!(matches!(
        "haar".parse::<BasisKind>(),
        Err(BasisError::UnknownName(_))
    ));
    assert!(matches!(
        "db4:x".parse::<BasisKind>(),
        Err(BasisError::UnknownName(_))
    ));
}

#[test]
fn planner_caches_and_shares() {
    fn assert_send_sync<S: Send + Sync>() {}
    assert_send_sync::<BasisPlanner<f32>>();
    assert_send_sync::<SharedBasis<f64>>();

    let planner = BasisPlanner::<f64>::new();
    let a = planner.plan(BasisKind::Dct, 256).unwrap();
    let b = planner.plan(BasisKind::Dct, 256).unwrap();
    assert!(Arc::ptr_eq(&a, &b));
    let c = planner.plan(BasisKind::Dct, 512).unwrap();
    assert!(!Arc::ptr_eq(&a, &c));
    let w = planner.plan("db4".parse().unwrap(), 256).unwrap();
    assert_eq!(w.kind().to_string(), "db4:5"); // floor(log2(256/7)) = 5
    assert!(planner.plan("db4:9".parse().unwrap(), 256).is_err());

    // Shared across threads: every thread gets the same plan and the same answer.
    let planner = Arc::new(planner);
    let x = signal(256, 11);
    let results: Vec<Vec<f64>> = std::thread::scope(|sc| {
        let hs: Vec<_> = (0..4)
            .map(|_| {
                let (p, x) = (Arc::clone(&planner), x.clone());
                sc.spawn(move || {
                    let f = p.plan(BasisKind::Fourier, 256).unwrap();
                    apply(f.as_ref(), &x, true, &mut BasisScratch::new())
                })
            })
            .collect();
        hs.into_iter().map(|h| h.join().unwrap()).collect()
    });
    for r in &results[1..] {
        assert_eq!(r, &results[0]);
    }
}

#[test]
fn coherence_with_time_samples() {
    // CHECK-VALUES 6.4 (computed): mu = sqrt(n) max |<e_i, psi_j>| at n = 256:
    // DCT 1.414187; periodized Daubechies at full depth db2 13.38, db4 11.44, db8 10.81.
    let n = 256;
    let mu = |kind: BasisKind| {
        let b = plan_basis::<f64>(kind, n).unwrap();
        let m = dense_from_fast(b.as_ref())
            .iter()
            .flatten()
            .fold(0.0f64, |m, v| m.max(v.abs()));
        (n as f64).sqrt() * m
    };
    assert!((mu(BasisKind::Dct) - 1.414187).abs() < 5e-7);
    for (order, want) in [(2u8, 13.38), (4, 11.44), (8, 10.81)] {
        let got = mu(BasisKind::Daubechies {
            order,
            levels: Some(8),
        });
        assert!((got - want).abs() < 0.005, "db{order}: {got}");
    }
}

#[test]
fn sampled_dct_paths_equal_full_transforms() {
    // Property (common practice): the DCT's fused sampled synthesis and scattered analysis are
    // the full transforms followed by a gather / preceded by a scatter, for odd n (one n-point
    // FFT) and even n (one n/2-point FFT; n/2 odd and even both covered).
    use csgate::basis::BasisScratch;
    for n in [2usize, 6, 7, 8, 10, 64, 1000, 4094, 4096] {
        let basis = csgate::basis::BasisPlanner::<f64>::new()
            .plan(BasisKind::Dct, n)
            .unwrap();
        let coeffs: Vec<f64> = (0..n).map(|k| ((k * 37 % 11) as f64 - 5.0) / 3.0).collect();
        let idx: Vec<usize> = (0..n).filter(|i| i % 3 != 1).collect();
        let mut scratch = BasisScratch::new();
        let mut full = coeffs.clone();
        basis.synthesize(&mut full, &mut scratch);
        let mut out = vec![0.0; idx.len()];
        let mut grid = vec![0.0; n];
        basis.synthesize_at(&coeffs, &idx, &mut out, &mut grid, &mut scratch);
        for (o, &i) in out.iter().zip(&idx) {
            assert!((o - full[i]).abs() < 1e-12, "n {n} synthesis at {i}");
        }
        // The half-length route (even n) agrees with the n-point route.
        let reference = csgate::basis::Dct::<f64>::with_full_length_fft(n).unwrap();
        let mut direct = coeffs.clone();
        reference.synthesize(&mut direct, &mut scratch);
        for (a, b) in direct.iter().zip(&full) {
            assert!(
                (a - b).abs() < 1e-12,
                "n {n}: half-length against n-point route"
            );
        }
        let values: Vec<f64> = idx.iter().map(|&i| (i as f64 * 0.1).sin()).collect();
        let mut dense = vec![0.0; n];
        for (&v, &i) in values.iter().zip(&idx) {
            dense[i] = v;
        }
        basis.analyze(&mut dense, &mut scratch);
        let mut fused = vec![1.0; n];
        basis.analyze_from(&idx, &values, &mut fused, &mut scratch);
        for k in 0..n {
            assert!((fused[k] - dense[k]).abs() < 1e-12, "n {n} analysis at {k}");
        }
    }
}
