//! Per-window trust through the worker job the pipeline runs (`WorkerState::run`): the
//! cross-validation estimate against the true error, and windows with too few samples for
//! their sparsity flagged as low trust.

use csgate::basis::{BasisKind, BasisPlanner};
use csgate::packet::{indices, Packet, RawValues, Sampling, StreamId, Units, WindowHeader};
use csgate::pipeline::reconstruct::{Method, ReconstructJob, WarmStart, WarmState, WorkerState};
use csgate::pipeline::run::PipelineConfig;
use csgate::pipeline::trust::TrustConfig;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal};
use std::f64::consts::PI;
use std::sync::Arc;

const FS: f64 = 25_600.0;

fn packet(seq: u64, n: u32, m: u32, x: &[f64]) -> Packet {
    let seed = 77_000 + seq;
    let idx = indices::sample_indices(seed, n, m);
    let vals: Vec<f32> = idx.iter().map(|&i| x[i as usize] as f32).collect();
    let header = WindowHeader {
        stream: StreamId {
            node: 5,
            channel: 0,
        },
        capture_id: 1,
        seq,
        sample_rate_hz: FS,
        window_len: n,
        hop_len: n / 2,
        t0_us: 1_780_000_000_000_000,
        units: Units::MetersPerSecond2,
        scale: 1.0,
        adc_bits: 16,
    };
    Packet::new(header, Sampling::Seeded { seed, m }, RawValues::F32(vals)).unwrap()
}

/// Runs one window through the pipeline's job with the pipeline's default solver settings.
fn reconstruct(
    worker: &mut WorkerState,
    p: Packet,
    trust: &Arc<TrustConfig>,
) -> (Vec<f64>, csgate::pipeline::trust::WindowTrust) {
    let cfg = PipelineConfig::default();
    let job = ReconstructJob {
        stream_slot: 0,
        start: 0,
        packet: p,
        basis: BasisKind::Dct,
        settings: Arc::new(cfg.solver),
        warm_start: WarmStart::Cold,
        method: Method::Sparse,
        warm: WarmState::default(),
        trust: Arc::clone(trust),
        precision: cfg.precision,
    };
    let r = worker.run(job);
    let (signal, _) = r.outcome.expect("reconstructed");
    (signal, r.trust.expect("assessed"))
}

fn rel_err(x: &[f64], truth: &[f64]) -> f64 {
    let e: f64 = x.iter().zip(truth).map(|(a, b)| (a - b) * (a - b)).sum();
    let s: f64 = truth.iter().map(|v| v * v).sum();
    (e / s).sqrt()
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.total_cmp(b));
    v[v.len() / 2]
}

/// Ward 2009 (IEEE Trans. Inf. Theory 55(12)): the hold-out prediction error estimates the
/// reconstruction error. Windows of n = 1024 at m/n = 0.25, tone mixes with off-grid
/// frequencies and random phases (compressible, not exactly sparse, in the DCT), 4 to 60 tones so
/// the true error ranges from a few percent to tens of percent, plus white noise 40 dB below the
/// signal (the estimate includes the noise; kept small so the reconstruction error dominates).
/// The issue asks for a median ratio estimate / true error within 0.67..1.5.
#[test]
fn cv_estimate_tracks_the_true_error() {
    let (n, m) = (1024u32, 256u32);
    let planner = Arc::new(BasisPlanner::<f64>::new());
    let mut worker = WorkerState::new(planner);
    let trust = Arc::new(TrustConfig::default());
    let mut rng = rand::rngs::StdRng::seed_from_u64(2009);
    let mut ratios = Vec::new();
    let mut by_difficulty: Vec<Vec<f64>> = vec![Vec::new(); 3];
    for seq in 0..150u64 {
        let tones = [4usize, 20, 60][(seq % 3) as usize];
        let comps: Vec<(f64, f64, f64)> = (0..tones)
            .map(|_| {
                (
                    rng.random_range(20.0..FS / 2.0 * 0.9),
                    rng.random_range(0.1..1.0),
                    rng.random_range(0.0..2.0 * PI),
                )
            })
            .collect();
        let truth: Vec<f64> = (0..n as usize)
            .map(|j| {
                let t = j as f64 / FS;
                comps
                    .iter()
                    .map(|(f, a, ph)| a * (2.0 * PI * f * t + ph).sin())
                    .sum()
            })
            .collect();
        let rms = (truth.iter().map(|v| v * v).sum::<f64>() / n as f64).sqrt();
        let noise = Normal::new(0.0, 0.01 * rms).unwrap();
        let measured: Vec<f64> = truth.iter().map(|v| v + noise.sample(&mut rng)).collect();
        let (signal, t) = reconstruct(&mut worker, packet(seq, n, m, &measured), &trust);
        let ratio = t.cv_error / rel_err(&signal, &truth);
        ratios.push(ratio);
        by_difficulty[(seq % 3) as usize].push(ratio);
    }
    let med = median(ratios);
    eprintln!(
        "median cv/true {med:.3}; by tone count 4/20/60: {:.3} {:.3} {:.3}",
        median(by_difficulty[0].clone()),
        median(by_difficulty[1].clone()),
        median(by_difficulty[2].clone())
    );
    assert!((0.67..=1.5).contains(&med), "median ratio {med}");
    for (i, group) in by_difficulty.into_iter().enumerate() {
        let g = median(group);
        assert!((0.67..=1.5).contains(&g), "group {i}: median ratio {g}");
    }
}

/// Exactly k-sparse DCT windows (random support, Gaussian coefficients). At n = 1024 the L1
/// phase transition (CHECK-VALUES 6.1, Amelunxen et al. 2014) asks for m = n psi(k/n): about
/// 110 measurements for k = 10 and about 230 for k = 60. With m = 256, k = 10 is recoverable;
/// with m = 100, k = 60 is not. The recoverable windows must come out trusted and the others
/// low trust (allowing 1 in 20 either way: the transition is a 50% point, not a guarantee).
#[test]
fn unrecoverable_windows_are_low_trust() {
    let n = 1024u32;
    let planner = Arc::new(BasisPlanner::<f64>::new());
    let basis = planner.plan(BasisKind::Dct, n as usize).unwrap();
    let mut worker = WorkerState::new(Arc::clone(&planner));
    let trust = Arc::new(TrustConfig::default());
    let mut rng = rand::rngs::StdRng::seed_from_u64(2014);
    let gauss = Normal::new(0.0, 1.0).unwrap();
    let mut scratch = csgate::basis::BasisScratch::new();
    let (mut good_ok, mut bad_low) = (0, 0);
    let trials = 40;
    for trial in 0..trials {
        for (k, m) in [(10usize, 256u32), (60, 100)] {
            let mut s = vec![0.0f64; n as usize];
            let support = rand::seq::index::sample(&mut rng, n as usize, k);
            for i in support.iter() {
                s[i] = gauss.sample(&mut rng);
            }
            basis.synthesize(&mut s, &mut scratch);
            let (_, t) = reconstruct(
                &mut worker,
                packet(trial * 2 + (k as u64), n, m, &s),
                &trust,
            );
            if k == 10 && !t.low() {
                good_ok += 1;
            }
            if k == 60 && t.low() {
                bad_low += 1;
            }
        }
    }
    assert!(
        good_ok >= trials * 19 / 20,
        "recoverable trusted: {good_ok}/{trials}"
    );
    assert!(
        bad_low >= trials * 19 / 20,
        "unrecoverable flagged: {bad_low}/{trials}"
    );
}

/// Node 103, channel 1 of the demo site (configs/demo-site.toml: a gearbox's acoustic
/// channel, tonal with broadband noise), simulated for `seconds` with its noise-free truth:
/// the packets and the truth on the grid.
fn demo_gearbox_acoustic(seconds: f64) -> (Vec<Packet>, Vec<f64>) {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("configs/demo-site.toml");
    let scenario = csgate::sim::Scenario::load(&path).expect("demo scenario");
    let mut sim = csgate::sim::Simulation::new(&scenario, seconds, true);
    let (mut packets, mut truth) = (Vec::new(), Vec::new());
    while let Some(w) = sim.next_window().expect("simulated") {
        if w.node != 103 {
            continue;
        }
        packets.push(w.packets[1].clone());
        let chunk = w.truth.expect("truth kept");
        truth.extend(chunk.channels[1].iter().map(|&v| f64::from(v)));
    }
    (packets, truth)
}

/// The packets through the pipeline's job with the pipeline's defaults, warm-started as the
/// dispatcher does: each window's signal and the tuned fraction the stream ended with.
fn run_stream(packets: &[Packet], tune: bool) -> (Vec<Vec<f64>>, f64) {
    let trust = TrustConfig {
        tune_lambda: tune,
        ..TrustConfig::default()
    };
    let (out, fraction, _) = run_stream_with(packets, trust);
    (out, fraction)
}

/// One window of [`run_stream_with`]: whether it had trust figures and the fraction of
/// `lambda_max` it was solved at.
struct WindowRun {
    assessed: bool,
    fraction: f64,
}

/// As [`run_stream`] with the given trust settings; also says, per window, whether it had
/// figures and the weight it was solved at.
fn run_stream_with(packets: &[Packet], trust: TrustConfig) -> (Vec<Vec<f64>>, f64, Vec<WindowRun>) {
    let cfg = PipelineConfig::default();
    let trust = Arc::new(trust);
    let mut runs = Vec::new();
    let settings = Arc::new(cfg.solver.clone());
    let mut worker = WorkerState::new(Arc::new(BasisPlanner::new()));
    let mut warm = WarmState::default();
    let mut out = Vec::new();
    for p in packets {
        let job = ReconstructJob {
            stream_slot: 0,
            start: 0,
            packet: p.clone(),
            basis: BasisKind::Dct,
            settings: Arc::clone(&settings),
            warm_start: WarmStart::Previous,
            method: Method::Sparse,
            warm,
            trust: Arc::clone(&trust),
            precision: cfg.precision,
        };
        let r = worker.run(job);
        warm = r.warm;
        let (signal, report) = r.outcome.expect("reconstructed");
        runs.push(WindowRun {
            assessed: r.trust.is_some(),
            fraction: report.lambda / report.lambda_max,
        });
        out.push(signal);
    }
    (out, warm.lambda.fraction.unwrap_or(f64::NAN), runs)
}

/// SNR in dB of the second half of the windows against the truth (window k starts at k * hop).
fn second_half_snr_db(windows: &[Vec<f64>], truth: &[f64], hop: usize) -> f64 {
    let (mut e, mut s) = (0.0, 0.0);
    for (k, w) in windows.iter().enumerate().skip(windows.len() / 2) {
        for (j, v) in w.iter().enumerate() {
            let t = truth[k * hop + j];
            e += (v - t) * (v - t);
            s += t * t;
        }
    }
    10.0 * (s / e).log10()
}

#[test]
fn trust_on_a_sample_of_windows() {
    // `trust.every = 4`: the hold-out solve (and so the figures and the tuning) runs on the
    // windows whose sequence number is a multiple of 4 only; every window is still
    // reconstructed, the others at the stream's tuned weight. Reference: the noise-free truth
    // of the simulator (known by construction, common practice).
    let (packets, truth) = demo_gearbox_acoustic(8.0);
    let hop = packets[0].header.hop_len as usize;
    let every = TrustConfig {
        every: 4,
        ..TrustConfig::default()
    };
    let (sampled, f_sampled, runs) = run_stream_with(&packets, every);
    let (all, f_all, runs_all) = run_stream_with(&packets, TrustConfig::default());
    assert!(runs_all.iter().all(|r| r.assessed));
    for (p, r) in packets.iter().zip(&runs) {
        assert_eq!(r.assessed, p.header.seq % 4 == 0, "window {}", p.header.seq);
    }
    // The weight moves only after an assessed window, so a window without figures is solved
    // at the weight the next assessed window uses: the stream's tuned one, not the start.
    let mut moved = false;
    for (k, r) in runs.iter().enumerate().filter(|(_, r)| !r.assessed) {
        let Some(next) = runs[k..].iter().find(|n| n.assessed) else {
            continue;
        };
        assert!(
            (r.fraction - next.fraction).abs() <= 1e-6 * next.fraction,
            "window {k}: fraction {} against {} of the next assessed window",
            r.fraction,
            next.fraction
        );
        moved |= (r.fraction - 0.01).abs() > 1e-6;
    }
    assert!(moved, "no window without figures ran at a tuned weight");
    let snr_sampled = second_half_snr_db(&sampled, &truth, hop);
    let snr_all = second_half_snr_db(&all, &truth, hop);
    eprintln!(
        "demo 103/1, second half: trust on 1 window in 4: fraction {f_sampled:.4}, SNR \
         {snr_sampled:.2} dB; on every window: fraction {f_all:.4}, SNR {snr_all:.2} dB"
    );
    assert!(
        f_sampled > 0.01,
        "the sampled windows still tune the weight: {f_sampled}"
    );
}

#[test]
fn lambda_tuning_lowers_the_error_on_a_noisy_machine_stream() {
    // The reference is the simulator's noise-free truth (known by construction, common
    // practice). At the default start (0.01 lambda_max) the solver fits part of the
    // channel's broadband noise; the hold-out tuning should move the stream's fraction up and
    // bring the windows closer to the truth over the second half of the run, once it moved.
    let (packets, truth) = demo_gearbox_acoustic(8.0);
    let n = packets[0].header.window_len as usize;
    let hop = packets[0].header.hop_len as usize;
    let (tuned, f_tuned) = run_stream(&packets, true);
    let (fixed, f_fixed) = run_stream(&packets, false);
    assert!(f_fixed.is_nan(), "no tuning state without tuning");
    assert_eq!((tuned[0].len(), fixed[0].len()), (n, n));
    let snr_tuned = second_half_snr_db(&tuned, &truth, hop);
    let snr_fixed = second_half_snr_db(&fixed, &truth, hop);
    eprintln!(
        "demo 103/1: tuned fraction {f_tuned:.4}; SNR of the second half's windows: tuned \
         {snr_tuned:.2} dB, fixed 0.01 {snr_fixed:.2} dB"
    );
    assert!(f_tuned > 0.015, "tuned up from 0.01: {f_tuned}");
    assert!(snr_tuned > snr_fixed + 1.0, "{snr_tuned} vs {snr_fixed}");
}
