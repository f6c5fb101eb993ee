//! Cost of feature extraction per second of signal per stream: fs = 25.6 kHz, 1 s blocks,
//! with the default configuration (Welch spectrum + peaks + labels, spectral-kurtosis band
//! choice + envelope spectrum + peaks, overall indicators and velocity RMS). The time per
//! iteration is the CPU cost of one second of one stream.
//!
//! Run: `cargo bench --bench features`. Measured on the 2-core development machine while other
//! builds ran (load about 4): 6.4 ms per 1 s block with the automatic band, 4.3 ms with a fixed
//! band, 1.5 ms without the envelope, 0.32 ms for the Welch spectrum alone.
//!
//! Against reconstruction, in the pipeline on the shipped demo log (one worker,
//! `csgate replay demo-data/demo-site.cslog --key 104=... --out X.h5 --workers 1 --json`):
//! `analytics_busy_s` 0.34 s and `solve_busy_s` 5.0 s (10.8 s with the trust figures) for
//! 72 stream-seconds, i.e. 4.7 ms of features against 69 ms (150 ms) of reconstruction per
//! second of signal per stream.

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use csgate::features::envelope::{EnvelopeBand, EnvelopeConfig};
use csgate::features::kinematics::{BearingGeometry, Kinematics, ShaftSpeed};
use csgate::features::spectrum::{WelchConfig, WelchPlan};
use csgate::features::{FeatureConfig, FeatureExtractor};
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use realfft::RealFftPlanner;
use std::f64::consts::PI;
use std::hint::black_box;

const FS: f64 = 25600.0;

/// Shaft harmonics, noise and impacts at an outer-race rate ringing a 3.6 kHz resonance.
fn signal() -> Vec<f32> {
    let mut rng = rand::rngs::StdRng::seed_from_u64(1);
    let noise = Normal::new(0.0, 0.3).unwrap();
    let mut x: Vec<f64> = (0..FS as usize)
        .map(|j| {
            let t = j as f64 / FS;
            2.0 * (2.0 * PI * 29.95 * t).sin()
                + 0.8 * (2.0 * PI * 59.9 * t).sin()
                + noise.sample(&mut rng)
        })
        .collect();
    let period = 1.0 / 107.364306;
    let mut tk = 0.0;
    while tk < 1.0 {
        let j0 = (tk * FS).ceil() as usize;
        for (j, v) in x.iter_mut().enumerate().skip(j0).take(200) {
            let dt = j as f64 / FS - tk;
            *v += 3.0 * (-dt / 0.8e-3).exp() * (2.0 * PI * 3600.0 * dt).sin();
        }
        tk += period;
    }
    x.into_iter().map(|v| v as f32).collect()
}

fn kinematics() -> Kinematics {
    Kinematics {
        shaft: ShaftSpeed::Hz(29.95),
        bearings: vec![BearingGeometry {
            elements: 9,
            element_diameter_mm: 7.94,
            pitch_diameter_mm: 39.04,
            contact_angle_deg: 0.0,
        }],
        gears: vec![],
    }
}

fn bench(c: &mut Criterion) {
    let x = signal();
    let kin = kinematics();
    let mut g = c.benchmark_group("features_1s_25k6");
    g.throughput(Throughput::Elements(x.len() as u64));

    let mut fx = FeatureExtractor::new(FeatureConfig::default()).unwrap();
    g.bench_function("analyze_auto_band", |b| {
        b.iter(|| black_box(fx.analyze(black_box(&x), FS, &kin).unwrap()))
    });

    let fixed = FeatureConfig {
        envelope: EnvelopeConfig {
            band: EnvelopeBand::Fixed {
                low_hz: 2800.0,
                high_hz: 4400.0,
            },
            ..EnvelopeConfig::default()
        },
        ..FeatureConfig::default()
    };
    let mut fx_fixed = FeatureExtractor::new(fixed).unwrap();
    g.bench_function("analyze_fixed_band", |b| {
        b.iter(|| black_box(fx_fixed.analyze(black_box(&x), FS, &kin).unwrap()))
    });

    let no_env = FeatureConfig {
        envelope: EnvelopeConfig {
            enabled: false,
            ..EnvelopeConfig::default()
        },
        ..FeatureConfig::default()
    };
    let mut fx_direct = FeatureExtractor::new(no_env).unwrap();
    g.bench_function("analyze_no_envelope", |b| {
        b.iter(|| black_box(fx_direct.analyze(black_box(&x), FS, &kin).unwrap()))
    });

    let mut welch = WelchPlan::new(&WelchConfig::default(), &mut RealFftPlanner::new()).unwrap();
    g.bench_function("welch_only", |b| {
        b.iter(|| black_box(welch.estimate(black_box(&x), FS).unwrap()))
    });
    g.finish();
}

criterion_group! {
    name = benches;
    // Brief runs: the figure is a cost estimate, not a regression gate.
    config = Criterion::default().sample_size(20).warm_up_time(std::time::Duration::from_secs(1)).measurement_time(std::time::Duration::from_secs(3));
    targets = bench
}
criterion_main!(benches);
