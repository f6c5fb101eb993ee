//! `csgate demo`: runs the reconstruction engine on generated windows and prints the figures.
//!
//! The stream is an invented gearbox-like vibration: shaft harmonics, a gear-mesh tone with
//! shaft-rate sidebands (GMF = teeth x shaft rate, as in CHECK-VALUES 7) and a little broadband
//! noise. Windows overlap by half (hop n/2); each is sampled at `ratio * n` random instants and
//! reconstructed, warm-started from the previous window of the stream.

use anyhow::Context;
use clap::Args;
use csgate::basis::{BasisKind, BasisPlanner};
use csgate::solver::{Form, LambdaRule, SigmaRule, SolveReport, SolveSettings, Solver};
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use serde::Serialize;
use std::f64::consts::PI;
use std::process::ExitCode;
use std::time::Instant;

/// Options of `csgate demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Number of windows to reconstruct.
    #[arg(long, default_value_t = 20)]
    pub windows: usize,
    /// Window length n in samples.
    #[arg(long, default_value_t = 4096)]
    pub n: usize,
    /// Sampling ratio m/n.
    #[arg(long, default_value_t = 0.25)]
    pub ratio: f64,
    /// Basis: dct, fourier, db<N>.
    #[arg(long, default_value = "dct")]
    pub basis: String,
    /// Random seed of the signal, the noise and the sampling instants.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Standard deviation of the broadband noise added to the stream.
    #[arg(long, default_value_t = 0.01)]
    pub noise: f64,
    /// Estimate the noise level from each window (residual rule) instead of using `--noise`
    /// as the node's known noise floor in the universal threshold.
    #[arg(long)]
    pub estimate_noise: bool,
    /// Print the figures as JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Sample rate of the generated stream (a common vibration ADC rate).
const SAMPLE_RATE_HZ: f64 = 25_600.0;

/// Figures of one window.
#[derive(Debug, Serialize)]
struct WindowFigures {
    window: usize,
    m: usize,
    snr_db: f64,
    min_l2_snr_db: f64,
    time_ms: f64,
    report: SolveReport,
}

/// The summary line.
#[derive(Debug, Serialize)]
struct Summary {
    windows: usize,
    n: usize,
    m: usize,
    basis: String,
    sample_rate_hz: f64,
    mean_snr_db: f64,
    mean_min_l2_snr_db: f64,
    mean_ms_per_window: f64,
    mean_iterations: f64,
}

/// The invented machine: tones as (frequency Hz, amplitude, phase).
fn machine_tones() -> Vec<(f64, f64, f64)> {
    let shaft_hz = 29.3;
    let teeth = 27.0;
    let gmf = teeth * shaft_hz;
    vec![
        (shaft_hz, 1.0, 0.3),
        (2.0 * shaft_hz, 0.45, 1.1),
        (3.0 * shaft_hz, 0.2, 2.0),
        (4.0 * shaft_hz, 0.1, 0.7),
        (gmf, 0.6, 0.0),
        (gmf - shaft_hz, 0.15, 0.4),
        (gmf + shaft_hz, 0.15, 2.5),
        (2.0 * gmf, 0.2, 1.3),
        (3150.0, 0.08, 0.9),
    ]
}

fn snr_db(truth: &[f64], estimate: &[f64]) -> f64 {
    let signal: f64 = truth.iter().map(|v| v * v).sum();
    let error: f64 = truth
        .iter()
        .zip(estimate)
        .map(|(a, b)| (a - b) * (a - b))
        .sum();
    10.0 * (signal / error.max(f64::MIN_POSITIVE)).log10()
}

/// Runs the demo.
pub fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    anyhow::ensure!(args.n >= 16, "--n must be at least 16");
    anyhow::ensure!(
        args.ratio > 0.0 && args.ratio <= 1.0,
        "--ratio must be in (0, 1]"
    );
    let kind: BasisKind = args.basis.parse()?;
    let basis = BasisPlanner::<f64>::new()
        .plan(kind, args.n)
        .context("planning the basis")?;
    let n = args.n;
    let hop = n / 2;
    let m = ((args.ratio * n as f64).round() as usize).clamp(1, n);
    let mut rng = StdRng::seed_from_u64(args.seed);
    anyhow::ensure!(
        args.noise.is_finite() && args.noise > 0.0,
        "--noise must be positive"
    );
    let noise = Normal::new(0.0, args.noise).expect("valid deviation");

    let total = hop * args.windows + n;
    let tones = machine_tones();
    let truth: Vec<f64> = (0..total)
        .map(|j| {
            let t = j as f64 / SAMPLE_RATE_HZ;
            tones
                .iter()
                .map(|&(f, a, p)| a * (2.0 * PI * f * t + p).cos())
                .sum()
        })
        .collect();
    let measured: Vec<f64> = truth.iter().map(|&v| v + noise.sample(&mut rng)).collect();

    let sigma = if args.estimate_noise {
        SigmaRule::Residual
    } else {
        SigmaRule::Given(args.noise)
    };
    let settings = SolveSettings {
        form: Form::Lasso {
            lambda: LambdaRule::Universal { sigma },
        },
        ..SolveSettings::default()
    };
    let baseline = SolveSettings {
        form: Form::MinL2,
        debias: false,
        ..SolveSettings::default()
    };
    let mut solver = Solver::new(basis);
    let mut warm: Option<Vec<f64>> = None;
    let mut figures = Vec::with_capacity(args.windows);
    for w in 0..args.windows {
        let start = w * hop;
        let mut indices: Vec<u32> = rand::seq::index::sample(&mut rng, n, m)
            .into_iter()
            .map(|i| i as u32)
            .collect();
        indices.sort_unstable();
        let values: Vec<f64> = indices
            .iter()
            .map(|&i| measured[start + i as usize])
            .collect();
        let window_truth = &truth[start..start + n];

        let began = Instant::now();
        let solution = solver.solve(&indices, &values, &settings, warm.as_deref())?;
        let time_ms = began.elapsed().as_secs_f64() * 1e3;
        let min_l2 = solver.solve(&indices, &values, &baseline, None)?;
        figures.push(WindowFigures {
            window: w,
            m,
            snr_db: snr_db(window_truth, &solution.signal),
            min_l2_snr_db: snr_db(window_truth, &min_l2.signal),
            time_ms,
            report: solution.report,
        });
        warm = Some(solution.lasso_coefficients);
    }

    let count = figures.len().max(1) as f64;
    let summary = Summary {
        windows: figures.len(),
        n,
        m,
        basis: kind.to_string(),
        sample_rate_hz: SAMPLE_RATE_HZ,
        mean_snr_db: figures.iter().map(|f| f.snr_db).sum::<f64>() / count,
        mean_min_l2_snr_db: figures.iter().map(|f| f.min_l2_snr_db).sum::<f64>() / count,
        mean_ms_per_window: figures.iter().map(|f| f.time_ms).sum::<f64>() / count,
        mean_iterations: figures
            .iter()
            .map(|f| f.report.iterations as f64)
            .sum::<f64>()
            / count,
    };
    if args.json {
        let doc = serde_json::json!({ "windows": figures, "summary": summary });
        println!("{}", serde_json::to_string_pretty(&doc)?);
        return Ok(ExitCode::SUCCESS);
    }
    println!(
        "csgate demo: {} windows of n = {n} at {} Hz, m = {m} (m/n = {:.3}), basis {}, hop {hop}",
        summary.windows,
        SAMPLE_RATE_HZ,
        m as f64 / n as f64,
        summary.basis
    );
    println!(
        "{:>6} {:>9} {:>11} {:>6} {:>5} {:>10} {:>8} {:>9} {:>8}",
        "window", "SNR dB", "min-L2 dB", "iters", "runs", "rel gap", "support", "lambda", "ms"
    );
    for f in &figures {
        println!(
            "{:>6} {:>9.2} {:>11.2} {:>6} {:>5} {:>10.2e} {:>8} {:>9.3e} {:>8.2}",
            f.window,
            f.snr_db,
            f.min_l2_snr_db,
            f.report.iterations,
            f.report.fista_runs,
            f.report.relative_gap,
            f.report.support,
            f.report.lambda,
            f.time_ms
        );
    }
    println!(
        "mean SNR {:.2} dB (min-L2 baseline {:.2} dB), mean {:.1} iterations, {:.2} ms/window",
        summary.mean_snr_db,
        summary.mean_min_l2_snr_db,
        summary.mean_iterations,
        summary.mean_ms_per_window
    );
    Ok(ExitCode::SUCCESS)
}
