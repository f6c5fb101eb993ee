//! FISTA benchmarks: cost of one iteration against its floor (one synthesis plus one analysis
//! of the basis), and the time to reconstruct one window (n = 4096) by sampling ratio, basis
//! and cold versus warm start. Inputs are planned and generated outside the timed closures.
//!
//! Warm start: the windows come from one stream of tones plus noise with hop n/2, and the warm
//! start of window w is the LASSO solution of window w - 1 of the same stream, as a gateway
//! would keep it per stream.

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion};
use csgate::basis::{BasisKind, BasisPlanner, BasisScratch, SharedBasis};
use csgate::real::Real;
use csgate::solver::{
    fista, FistaOptions, FistaWork, Form, LambdaRule, SampledBasis, SigmaRule, SolveSettings,
    Solver,
};
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use std::f64::consts::PI;
use std::hint::black_box;
use std::time::Duration;

const N: usize = 4096;
const SAMPLE_RATE_HZ: f64 = 25_600.0;
const NOISE: f64 = 0.01;
const ITERATIONS: usize = 50;

fn plan<T: Real>(kind: BasisKind) -> SharedBasis<T> {
    BasisPlanner::new().plan(kind, N).expect("basis plans")
}

/// Tones plus white noise, long enough for two windows at hop n/2.
fn stream(rng: &mut StdRng) -> Vec<f64> {
    let tones = [
        (29.3, 1.0, 0.3),
        (58.6, 0.45, 1.1),
        (791.1, 0.6, 0.0),
        (761.8, 0.15, 0.4),
        (820.4, 0.15, 2.5),
        (3150.0, 0.08, 0.9),
    ];
    let noise = Normal::new(0.0, NOISE).unwrap();
    (0..N + N / 2)
        .map(|j| {
            let t = j as f64 / SAMPLE_RATE_HZ;
            tones
                .iter()
                .map(|&(f, a, p): &(f64, f64, f64)| a * (2.0 * PI * f * t + p).cos())
                .sum::<f64>()
                + noise.sample(rng)
        })
        .collect()
}

fn sample(rng: &mut StdRng, x: &[f64], start: usize, m: usize) -> (Vec<u32>, Vec<f64>) {
    let mut idx: Vec<u32> = rand::seq::index::sample(rng, N, m)
        .into_iter()
        .map(|i| i as u32)
        .collect();
    idx.sort_unstable();
    let values = idx.iter().map(|&i| x[start + i as usize]).collect();
    (idx, values)
}

fn settings() -> SolveSettings {
    SolveSettings {
        form: Form::Lasso {
            lambda: LambdaRule::Universal {
                sigma: SigmaRule::Given(NOISE),
            },
        },
        gap_tol: 1e-4,
        ..SolveSettings::default()
    }
}

fn iteration_vs_floor<T: Real>(c: &mut Criterion, label: &str) {
    let mut group = c.benchmark_group(format!("fista_iteration_{label}"));
    let basis = plan::<T>(BasisKind::Dct);
    let mut rng = StdRng::seed_from_u64(1);
    let x = stream(&mut rng);
    let (idx, values) = sample(&mut rng, &x, 0, N / 4);
    let y: Vec<T> = values.iter().map(|&v| T::of(v)).collect();

    let mut buf = vec![T::zero(); N];
    let mut scratch = BasisScratch::new();
    group.bench_function(format!("floor_x{ITERATIONS}"), |b| {
        b.iter(|| {
            for _ in 0..ITERATIONS {
                basis.synthesize(&mut buf, &mut scratch);
                basis.analyze(&mut buf, &mut scratch);
            }
            black_box(&buf);
        })
    });

    let mut op = SampledBasis::new(basis.clone(), &idx).unwrap();
    let mut work = FistaWork::new();
    let options = FistaOptions {
        gap_tol: 1e-300,
        change_tol: 0.0,
        max_iter: ITERATIONS,
        restart: true,
        subspace: false,
    };
    let mut s = vec![T::zero(); N];
    group.bench_function(format!("fista_x{ITERATIONS}"), |b| {
        b.iter(|| {
            s.fill(T::zero());
            black_box(fista(&mut op, &y, T::of(0.04), &options, &mut s, &mut work));
        })
    });
    group.finish();
}

fn window_solve<T: Real>(c: &mut Criterion, label: &str, kinds: &[(&str, BasisKind)]) {
    let mut group = c.benchmark_group(format!("window_solve_{label}"));
    let settings = settings();
    for &(name, kind) in kinds {
        let basis = plan::<T>(kind);
        for ratio in [0.125, 0.25, 0.5] {
            let m = (ratio * N as f64) as usize;
            let mut rng = StdRng::seed_from_u64(2);
            let x = stream(&mut rng);
            let (idx0, v0) = sample(&mut rng, &x, 0, m);
            let (idx1, v1) = sample(&mut rng, &x, N / 2, m);
            let to_t = |v: &[f64]| v.iter().map(|&a| T::of(a)).collect::<Vec<T>>();
            let (v0, v1) = (to_t(&v0), to_t(&v1));
            let mut solver = Solver::new(basis.clone());
            let previous = solver.solve(&idx0, &v0, &settings, None).unwrap();
            let warm = previous.lasso_coefficients;
            let id = format!("{name}_m{m}");
            group.bench_function(BenchmarkId::new("cold", &id), |b| {
                b.iter(|| black_box(solver.solve(&idx1, &v1, &settings, None).unwrap()))
            });
            group.bench_function(BenchmarkId::new("warm", &id), |b| {
                b.iter(|| black_box(solver.solve(&idx1, &v1, &settings, Some(&warm)).unwrap()))
            });
            let cold = solver.solve(&idx1, &v1, &settings, None).unwrap().report;
            let hot = solver
                .solve(&idx1, &v1, &settings, Some(&warm))
                .unwrap()
                .report;
            eprintln!(
                "{label} {id}: iterations cold {} warm {}, support {}, rel gap {:.1e}",
                cold.iterations, hot.iterations, hot.support, hot.relative_gap
            );
        }
    }
    group.finish();
}

fn benches(c: &mut Criterion) {
    iteration_vs_floor::<f64>(c, "f64");
    iteration_vs_floor::<f32>(c, "f32");
    let db8 = BasisKind::Daubechies {
        order: 8,
        levels: None,
    };
    window_solve::<f64>(c, "f64", &[("dct", BasisKind::Dct), ("db8", db8)]);
    window_solve::<f32>(c, "f32", &[("dct", BasisKind::Dct)]);
}

criterion_group! {
    name = fista_benches;
    config = Criterion::default()
        .sample_size(10)
        .warm_up_time(Duration::from_millis(300))
        .measurement_time(Duration::from_secs(1));
    targets = benches
}
criterion_main!(fista_benches);
