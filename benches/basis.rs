//! Per-apply cost of each basis (`synthesize`, `analyze`) over a grid of window lengths, in f32
//! and f64, plus the DCT backend comparison that chose the implementation in `basis::dct`.
//!
//! Planning, allocation and input filling happen outside the measured closures. Each
//! iteration restores the input by copy (O(n), small next to the transform) so every call sees
//! the same data rather than a signal that grows or decays with repeated application.
//!
//! Run: `cargo bench --bench basis -- --warm-up-time 1 --measurement-time 2`.

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use csgate::basis::Basis;
use csgate::basis::{plan_basis, BasisKind, BasisScratch, Dct};
use csgate::real::Real;
use num_complex::Complex;
use realfft::{ComplexToReal, RealFftPlanner, RealToComplex};
use std::hint::black_box;
use std::sync::Arc;

const LENGTHS: [usize; 3] = [1024, 4096, 8192];

fn input<T: Real>(n: usize) -> Vec<T> {
    // A deterministic, non-trivial signal: two incommensurate tones.
    (0..n)
        .map(|j| T::of((0.123 * j as f64).sin() + 0.5 * (0.0071 * j as f64).cos()))
        .collect()
}

fn bench_bases_for<T: Real>(c: &mut Criterion, prec: &str) {
    let kinds: [(&str, BasisKind); 4] = [
        ("dct", BasisKind::Dct),
        ("fourier", BasisKind::Fourier),
        ("db4", "db4".parse().unwrap()),
        ("db8", "db8".parse().unwrap()),
    ];
    for (name, kind) in kinds {
        let mut group = c.benchmark_group(format!("basis/{name}/{prec}"));
        for n in LENGTHS {
            let basis = plan_basis::<T>(kind, n).unwrap();
            let x = input::<T>(n);
            let mut buf = x.clone();
            let mut scratch = BasisScratch::new();
            basis.analyze(&mut buf, &mut scratch); // grow the scratch before timing
            group.bench_with_input(BenchmarkId::new("analyze", n), &n, |b, _| {
                b.iter(|| {
                    buf.copy_from_slice(&x);
                    basis.analyze(black_box(&mut buf), &mut scratch);
                })
            });
            group.bench_with_input(BenchmarkId::new("synthesize", n), &n, |b, _| {
                b.iter(|| {
                    buf.copy_from_slice(&x);
                    basis.synthesize(black_box(&mut buf), &mut scratch);
                })
            });
        }
        group.finish();
    }
}

fn bench_bases(c: &mut Criterion) {
    bench_bases_for::<f32>(c, "f32");
    bench_bases_for::<f64>(c, "f64");
}

/// Orthonormal DCT-II/III over realfft, kept here only to compare backends: the same
/// Makhoul reordering, but on a half-length complex FFT inside realfft.
struct RealFftDct<T: Real> {
    n: usize,
    r2c: Arc<dyn RealToComplex<T>>,
    c2r: Arc<dyn ComplexToReal<T>>,
    /// `s_k exp(-i pi k/(2n))` for k = 0..=n/2, and the synthesis counterpart.
    tw_a: Vec<Complex<T>>,
    tw_s: Vec<Complex<T>>,
    v: Vec<T>,
    spec: Vec<Complex<T>>,
    scratch: Vec<Complex<T>>,
}

impl<T: Real> RealFftDct<T> {
    fn new(n: usize) -> Self {
        let mut p = RealFftPlanner::new();
        let (r2c, c2r) = (p.plan_fft_forward(n), p.plan_fft_inverse(n));
        let nf = n as f64;
        let mut tw_a = Vec::new();
        let mut tw_s = Vec::new();
        for k in 0..=n / 2 {
            let th = -std::f64::consts::PI * k as f64 / (2.0 * nf);
            let s = if k == 0 {
                (1.0 / nf).sqrt()
            } else {
                (2.0 / nf).sqrt()
            };
            tw_a.push(Complex::new(T::of(s * th.cos()), T::of(s * th.sin())));
            let b = 1.0 / (nf * (2.0 / nf).sqrt());
            tw_s.push(Complex::new(T::of(b * th.cos()), T::of(-b * th.sin())));
        }
        let scratch_len = r2c.get_scratch_len().max(c2r.get_scratch_len());
        Self {
            n,
            tw_a,
            tw_s,
            v: vec![T::zero(); n],
            spec: vec![Complex::new(T::zero(), T::zero()); n / 2 + 1],
            scratch: vec![Complex::new(T::zero(), T::zero()); scratch_len],
            r2c,
            c2r,
        }
    }

    fn analyze(&mut self, x: &mut [T]) {
        let n = self.n;
        for j in 0..n.div_ceil(2) {
            self.v[j] = x[2 * j];
        }
        for j in 0..n / 2 {
            self.v[n - 1 - j] = x[2 * j + 1];
        }
        self.r2c
            .process_with_scratch(&mut self.v, &mut self.spec, &mut self.scratch)
            .unwrap();
        // Z[k] = s W^k V[k] = X[k] - i X[n-k] (scaled) for k = 0..=n/2.
        for k in 0..=n / 2 {
            let z = self.spec[k] * self.tw_a[k];
            x[k] = z.re;
            if k > 0 && k < n - k {
                x[n - k] = -z.im;
            }
        }
    }

    fn synthesize(&mut self, c: &mut [T]) {
        let n = self.n;
        let dc = T::one() / (T::of(n as f64).sqrt());
        for k in 0..=n / 2 {
            let z = if k == 0 {
                Complex::new(c[0] * dc, T::zero())
            } else {
                let im = if k < n - k { c[n - k] } else { T::zero() };
                Complex::new(c[k], -im) * self.tw_s[k]
            };
            self.spec[k] = z;
        }
        if n % 2 == 0 {
            // V[n/2] is real in exact arithmetic; realfft insists on an exact zero.
            let z = self.spec[n / 2];
            self.spec[n / 2] = Complex::new(z.norm() * z.re.signum(), T::zero());
        }
        self.c2r
            .process_with_scratch(&mut self.spec, &mut self.v, &mut self.scratch)
            .unwrap();
        for j in 0..n.div_ceil(2) {
            c[2 * j] = self.v[j];
        }
        for j in 0..n / 2 {
            c[2 * j + 1] = self.v[n - 1 - j];
        }
    }
}

fn bench_dct_backends_for<T: Real>(c: &mut Criterion, prec: &str) {
    let n = 4096;
    let mut group = c.benchmark_group(format!("dct_backend/{prec}"));
    let x = input::<T>(n);
    let mut buf = x.clone();

    // Ours: Makhoul over one n/2-point complex FFT with fused split passes (the default).
    let dct = Dct::<T>::new(n).unwrap();
    let mut scratch = BasisScratch::new();
    let mut want = x.clone();
    dct.analyze(&mut want, &mut scratch);
    group.bench_function("makhoul_half_fft", |b| {
        b.iter(|| {
            buf.copy_from_slice(&x);
            dct.analyze(black_box(&mut buf), &mut scratch);
            dct.synthesize(black_box(&mut buf), &mut scratch);
        })
    });

    // Makhoul over one n-point complex FFT (the previous default).
    let full = Dct::<T>::with_full_length_fft(n).unwrap();
    group.bench_function("makhoul_complex_fft", |b| {
        b.iter(|| {
            buf.copy_from_slice(&x);
            full.analyze(black_box(&mut buf), &mut scratch);
            full.synthesize(black_box(&mut buf), &mut scratch);
        })
    });

    // The sampled pair one FISTA iteration uses (m = n/4), for both routes.
    let idx: Vec<usize> = (0..n).step_by(4).map(|i| i + (i / 4) % 4).collect();
    let vals: Vec<T> = idx.iter().map(|&i| x[i]).collect();
    let mut at = vec![T::zero(); idx.len()];
    let mut grid = vec![T::zero(); n];
    for (name, d) in [
        ("sampled_pair_half_fft", &dct),
        ("sampled_pair_complex_fft", &full),
    ] {
        group.bench_function(name, |b| {
            b.iter(|| {
                d.analyze_from(&idx, &vals, black_box(&mut buf), &mut scratch);
                d.synthesize_at(&buf, &idx, black_box(&mut at), &mut grid, &mut scratch);
            })
        });
    }

    // Makhoul over realfft (half-length complex FFT plus pre/post-processing).
    let mut rdct = RealFftDct::<T>::new(n);
    let mut got = x.clone();
    rdct.analyze(&mut got);
    let err = got
        .iter()
        .zip(&want)
        .map(|(a, b)| (*a - *b).abs().to_f64_())
        .fold(0.0, f64::max);
    assert!(err < 1e-3, "realfft variant disagrees: {err}");
    group.bench_function("makhoul_realfft", |b| {
        b.iter(|| {
            buf.copy_from_slice(&x);
            rdct.analyze(black_box(&mut buf));
            rdct.synthesize(black_box(&mut buf));
        })
    });

    // rustdct's planned DCT-II/III (unnormalized), with the orthonormal scaling loop added so
    // the comparison is like for like.
    let mut planner = rustdct::DctPlanner::<T>::new();
    let d2 = planner.plan_dct2(n);
    let d3 = planner.plan_dct3(n);
    let mut s2 = vec![T::zero(); d2.get_scratch_len().max(d3.get_scratch_len())];
    let (s0, sk) = (
        T::of((1.0 / n as f64).sqrt()),
        T::of((2.0 / n as f64).sqrt()),
    );
    group.bench_function("rustdct", |b| {
        b.iter(|| {
            buf.copy_from_slice(&x);
            d2.process_dct2_with_scratch(black_box(&mut buf), &mut s2);
            buf[0] *= s0;
            buf[1..].iter_mut().for_each(|v| *v *= sk);
            // rustdct's DCT-III halves its k = 0 input; undo that and the scale below.
            buf[0] *= T::of(2.0) * s0 / sk;
            d3.process_dct3_with_scratch(black_box(&mut buf), &mut s2);
            buf.iter_mut().for_each(|v| *v *= sk);
        })
    });
    group.finish();
}

fn bench_dct_backends(c: &mut Criterion) {
    bench_dct_backends_for::<f32>(c, "f32");
    bench_dct_backends_for::<f64>(c, "f64");
}

criterion_group!(benches, bench_bases, bench_dct_backends);
criterion_main!(benches);
