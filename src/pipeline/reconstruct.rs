//! The reconstruction stage: one window in, one reconstructed window out, on a worker thread.
//!
//! A *function* stage (STYLE 2.3): it keeps no per-stream state of its own. What a stream
//! carries from one window to the next (the warm start) travels inside the job and comes back
//! with the result, so any worker can take any window while the dispatcher keeps each stream's
//! windows strictly sequential.

use super::trust::{self, LambdaTuning, LowTrustReasons, TrustConfig, WindowTrust};
use crate::basis::{BasisKind, BasisPlanner};
use crate::packet::{indices, Packet};
use crate::real::Real;
use crate::solver::{Form, LambdaRule, SolveReport, SolveSettings, Solver, WarmUse};
use std::collections::HashMap;
use std::sync::Arc;
use std::time::Instant;

/// What a stream hands from one window to the next to start the solver close to the answer.
///
/// With hop `h`, window `k+1` shares `n - h` samples with window `k`, and on a machine the
/// active frequencies barely move between windows. The previous window's LASSO coefficients
/// are therefore a good starting point for FISTA; see [`WarmStart`] for what is done with them.
#[derive(Debug, Clone, Default)]
pub struct WarmState {
    /// LASSO coefficients of the previous window (before the debiasing refit).
    pub coefficients: Option<Vec<f64>>,
    /// The stream's tuned LASSO weight (see [`trust::LambdaTuning`]).
    pub lambda: LambdaTuning,
}

/// Working precision of the solver.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    serde::Serialize,
    serde::Deserialize,
    clap::ValueEnum,
)]
#[serde(rename_all = "snake_case")]
pub enum Precision {
    /// Single precision: half the memory traffic and twice the SIMD width of `f64`, so the
    /// transforms take about half the time. The samples arrive and are recorded as f32, and
    /// the solver stops at a relative duality gap of 1e-4, far above f32 rounding (6e-8);
    /// `BENCHMARKS.md` has the measured SNR cost.
    #[default]
    F32,
    /// Double precision, the reference the tests check against published values.
    F64,
}

/// How the previous window's solution seeds the next solve.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WarmStart {
    /// Start from zero every window.
    Cold,
    /// Start from the previous window's LASSO coefficients.
    #[default]
    Previous,
}

/// How a window is turned into the full grid.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    serde::Serialize,
    serde::Deserialize,
    clap::ValueEnum,
)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// Sparse recovery with the solver (the product).
    #[default]
    Sparse,
    /// Linear interpolation between the received samples, held constant before the first and
    /// after the last: the plain baseline reports compare with.
    Linear,
}

/// Linear interpolation of `values` at `indices` onto `0..n` (constant outside the range).
pub fn linear_interpolate(indices: &[u32], values: &[f32], n: usize) -> Vec<f64> {
    let mut out = vec![0.0; n];
    if indices.is_empty() {
        return out;
    }
    let first = indices[0] as usize;
    let last = *indices.last().expect("non-empty") as usize;
    for v in out.iter_mut().take(first + 1) {
        *v = f64::from(values[0]);
    }
    for w in 0..indices.len().saturating_sub(1) {
        let (a, b) = (indices[w] as usize, indices[w + 1] as usize);
        let (ya, yb) = (f64::from(values[w]), f64::from(values[w + 1]));
        for (j, v) in out.iter_mut().enumerate().take(b + 1).skip(a) {
            *v = ya + (yb - ya) * (j - a) as f64 / (b - a) as f64;
        }
    }
    for v in out.iter_mut().skip(last) {
        *v = f64::from(*values.last().expect("non-empty"));
    }
    out
}

/// The report of a window reconstructed by interpolation: no solver ran.
fn interpolation_report() -> SolveReport {
    SolveReport {
        iterations: 0,
        subspace_steps: 0,
        fista_runs: 0,
        objective: f64::NAN,
        residual_norm: 0.0,
        relative_residual: 0.0,
        lasso_residual_norm: 0.0,
        support: 0,
        lambda: 0.0,
        lambda_max: f64::NAN,
        sigma: None,
        relative_gap: 0.0,
        stop: crate::solver::StopReason::MinL2,
        converged: true,
        debiased: false,
        cg_steps: 0,
    }
}

/// One window to reconstruct.
#[derive(Debug)]
pub struct ReconstructJob {
    /// Index of the stream in the dispatcher's table.
    pub stream_slot: usize,
    /// Grid position of the window's first sample within its segment.
    pub start: u64,
    /// The window as received.
    pub packet: Packet,
    /// Basis to reconstruct in.
    pub basis: BasisKind,
    /// Solver settings.
    pub settings: Arc<SolveSettings>,
    /// Warm-start policy.
    pub warm_start: WarmStart,
    /// Reconstruction method.
    pub method: Method,
    /// The stream's state from its previous window.
    pub warm: WarmState,
    /// Trust settings.
    pub trust: Arc<TrustConfig>,
    /// Working precision of the solver.
    pub precision: Precision,
}

/// The outcome of one job.
#[derive(Debug)]
pub struct ReconstructedWindow {
    /// Index of the stream in the dispatcher's table.
    pub stream_slot: usize,
    /// Grid position of the window's first sample within its segment.
    pub start: u64,
    /// The window's header (as received).
    pub packet: Packet,
    /// The reconstructed window on the full grid, or why it could not be reconstructed.
    pub outcome: Result<(Vec<f64>, SolveReport), String>,
    /// Wall time of the job in microseconds (the hold-out solve included).
    pub solve_time_us: f64,
    /// Wall time of the hold-out solve alone, microseconds (0 without one).
    pub trust_time_us: f64,
    /// The trust figures (`None`: disabled, linear method, too few samples, or failed).
    pub trust: Option<WindowTrust>,
    /// The stream's state for its next window.
    pub warm: WarmState,
}

/// A window reconstructed by a broker worker, as a recorder receives it
/// (`pipeline::run::Arrival::Solved`; docs/scale-out.md): the outcome of its
/// [`ReconstructedWindow`] without the dispatcher's bookkeeping.
#[derive(Debug, Clone)]
pub struct SolvedWindow {
    /// The window as received from the node.
    pub packet: Packet,
    /// The reconstructed window on the full grid, or why it could not be reconstructed.
    pub outcome: Result<(Vec<f64>, SolveReport), String>,
    /// Wall time of the job in microseconds (the hold-out solve included).
    pub solve_time_us: f64,
    /// Wall time of the hold-out solve alone, microseconds.
    pub trust_time_us: f64,
    /// The trust figures.
    pub trust: Option<WindowTrust>,
}

impl From<ReconstructedWindow> for SolvedWindow {
    fn from(r: ReconstructedWindow) -> Self {
        SolvedWindow {
            packet: r.packet,
            outcome: r.outcome,
            solve_time_us: r.solve_time_us,
            trust_time_us: r.trust_time_us,
            trust: r.trust,
        }
    }
}

/// Relative duality gap at which the hold-out solve of the trust figures stops on a window
/// that does not probe the stream's weight: the objective within 1%. The estimate it feeds
/// has a relative spread of about `1/sqrt(h)` (10% at h = 102, trust.rs); on three streams of
/// the `csgate bench` workload (42 windows each) this moved `cv_error` by 0.5% on average and
/// 2.9% at most, in either direction, against a 1e-3 stop, and cut the operator pairs of a
/// window (hold-out and final solve) by 7-15% (BENCHMARKS.md section 13).
pub const HOLDOUT_GAP_TOL: f64 = 1e-2;

/// Relative duality gap of the hold-out solves on a window that probes the stream's weight:
/// the paired comparison decides ties at `trust.tune_tolerance` (1%), which a looser stop would
/// blur (at 3e-3 the tuned weights drifted upwards on the same workload).
pub const TUNING_GAP_TOL: f64 = 1e-3;

/// Solvers of one precision, one per (basis, length), planned on first use.
#[derive(Debug)]
struct SolverSet<T: Real> {
    planner: Arc<BasisPlanner<T>>,
    solvers: HashMap<(BasisKind, usize), Solver<T>>,
}

impl<T: Real> SolverSet<T> {
    fn new(planner: Arc<BasisPlanner<T>>) -> Self {
        Self {
            planner,
            solvers: HashMap::new(),
        }
    }

    #[allow(clippy::type_complexity)]
    fn solve(
        &mut self,
        indices: &[u32],
        y: &[f64],
        basis: BasisKind,
        n: usize,
        settings: &SolveSettings,
        start: Option<&[f64]>,
    ) -> Result<(Vec<f64>, Vec<f64>, SolveReport), String> {
        let solver = match self.solvers.entry((basis, n)) {
            std::collections::hash_map::Entry::Occupied(e) => e.into_mut(),
            std::collections::hash_map::Entry::Vacant(v) => {
                let b = self.planner.plan(basis, n).map_err(|e| e.to_string())?;
                v.insert(Solver::new(b))
            }
        };
        let y: Vec<T> = y.iter().map(|&v| T::of(v)).collect();
        let start: Option<Vec<T>> = start.map(|s| s.iter().map(|&v| T::of(v)).collect());
        let sol = solver
            .solve(indices, &y, settings, start.as_deref())
            .map_err(|e| e.to_string())?;
        let back = |v: Vec<T>| v.into_iter().map(|x| x.to_f64_()).collect::<Vec<f64>>();
        Ok((back(sol.signal), back(sol.lasso_coefficients), sol.report))
    }
}

/// Per-worker state: a solver (with its planned basis and buffers) per (precision, basis,
/// length).
#[derive(Debug)]
pub struct WorkerState {
    f64: SolverSet<f64>,
    f32: SolverSet<f32>,
}

impl WorkerState {
    /// A worker sharing `planner` (double precision) with the other workers; its
    /// single-precision bases are planned by the worker itself (planning is cheap and happens
    /// once per length).
    pub fn new(planner: Arc<BasisPlanner<f64>>) -> Self {
        Self {
            f64: SolverSet::new(planner),
            f32: SolverSet::new(Arc::new(BasisPlanner::new())),
        }
    }

    /// Reconstructs one window.
    pub fn run(&mut self, job: ReconstructJob) -> ReconstructedWindow {
        let started = Instant::now();
        let n = job.packet.header.window_len as usize;
        let mut warm = job.warm;
        if job.method == Method::Linear {
            let signal = linear_interpolate(&job.packet.indices, &job.packet.values, n);
            let report = interpolation_report();
            return ReconstructedWindow {
                stream_slot: job.stream_slot,
                start: job.start,
                packet: job.packet,
                outcome: Ok((signal, report)),
                solve_time_us: started.elapsed().as_secs_f64() * 1e6,
                trust_time_us: 0.0,
                trust: None,
                warm,
            };
        }
        let y: Vec<f64> = job.packet.values.iter().map(|&v| f64::from(v)).collect();
        let previous = match job.warm_start {
            WarmStart::Cold => None,
            WarmStart::Previous => warm.coefficients.take().filter(|c| c.len() == n),
        };
        let precision = job.precision;
        // The hold-out solve first, warm from the previous window; the full solve then starts
        // from its solution, so it only has to absorb the held-out samples (see trust.rs).
        let m = y.len();
        let holdout = if job.trust.samples(job.packet.header.seq) {
            job.trust.holdout_len(m)
        } else {
            None
        };
        // The stream's LASSO weight: tuned by the hold-out when the solver takes a fraction of
        // lambda_max and a hold-out is made (trust.rs, "Tuning lambda"). With trust on a
        // sample of windows (`trust.every`), the others use the stream's current weight too.
        let tuned = match &job.settings.form {
            Form::Lasso {
                lambda: LambdaRule::FractionOfMax(f0),
            } if job.trust.tune_lambda
                && (holdout.is_some() || (job.trust.enabled && job.trust.every > 1)) =>
            {
                Some(warm.lambda.fraction.unwrap_or(*f0))
            }
            _ => None,
        };
        let with_fraction = |settings: &SolveSettings, f: f64| SolveSettings {
            form: Form::Lasso {
                lambda: LambdaRule::FractionOfMax(f),
            },
            ..settings.clone()
        };
        let base_settings: std::borrow::Cow<'_, SolveSettings> = match tuned {
            Some(f) => std::borrow::Cow::Owned(with_fraction(&job.settings, f)),
            None => std::borrow::Cow::Borrowed(&*job.settings),
        };
        let mut trust_time_us = 0.0;
        let mut held = None;
        let mut probe_outcome = None;
        let mut start = previous;
        if let Some(h) = holdout {
            let t = Instant::now();
            let h_stream = job.packet.stream();
            let seed = trust::holdout_seed(h_stream.node, h_stream.channel, job.packet.header.seq);
            // Positions into the received arrays, sorted, a uniform h-subset of 0..m.
            let out = indices::sample_indices(seed, m as u32, h as u32);
            let mut is_out = vec![false; m];
            for &p in &out {
                is_out[p as usize] = true;
            }
            let (mut tr_idx, mut tr_y) = (Vec::with_capacity(m - h), Vec::with_capacity(m - h));
            for j in 0..m {
                if !is_out[j] {
                    tr_idx.push(job.packet.indices[j]);
                    tr_y.push(y[j]);
                }
            }
            // The estimate needs the hold-out solution only to a fraction of the error it
            // measures, so its gap tolerance is relaxed (see HOLDOUT_GAP_TOL); a window that
            // also probes the stream's weight compares two hold-out solves within 1%, so it
            // solves to the tighter TUNING_GAP_TOL.
            let probe = tuned.and_then(|f| warm.lambda.probe(&job.trust, f));
            let relaxed = if probe.is_some() {
                TUNING_GAP_TOL
            } else {
                HOLDOUT_GAP_TOL
            };
            let holdout_settings = SolveSettings {
                gap_tol: base_settings.gap_tol.max(relaxed),
                ..(*base_settings).clone()
            };
            let y_h: Vec<f64> = out.iter().map(|&p| y[p as usize]).collect();
            let y_norm = y.iter().map(|v| v * v).sum::<f64>().sqrt();
            let predict = |signal: &[f64]| -> Vec<f64> {
                out.iter()
                    .map(|&p| signal[job.packet.indices[p as usize] as usize])
                    .collect()
            };
            if let Ok((signal, coeffs, report)) = self.solve(
                precision,
                &tr_idx,
                &tr_y,
                job.basis,
                n,
                &holdout_settings,
                start.as_deref(),
            ) {
                let cv = trust::cv_error(&y_h, &predict(&signal), y_norm, m);
                let mut iterations = report.iterations;
                if let Some(f) = tuned {
                    if let Some(f_probe) = probe {
                        // The same held-out samples at the probed weight, warm from the
                        // first solve (a nearby problem): a paired comparison.
                        let probe_settings = SolveSettings {
                            warm_use: WarmUse::Coefficients,
                            ..with_fraction(&holdout_settings, f_probe)
                        };
                        if let Ok((p_signal, _, p_report)) = self.solve(
                            precision,
                            &tr_idx,
                            &tr_y,
                            job.basis,
                            n,
                            &probe_settings,
                            Some(&coeffs),
                        ) {
                            let p_cv = trust::cv_error(&y_h, &predict(&p_signal), y_norm, m);
                            iterations += p_report.iterations;
                            // Parsimony: a larger weight (sparser, fewer iterations)
                            // wins a tie within the tolerance, a smaller one must win
                            // clearly (the "one standard error" habit of cross-validation,
                            // common practice).
                            let tol = job.trust.tune_tolerance;
                            let won = if f_probe > f {
                                p_cv <= cv * (1.0 + tol)
                            } else {
                                p_cv < cv * (1.0 - tol)
                            };
                            probe_outcome = Some((f_probe, won));
                        }
                    }
                }
                held = Some((cv, h, iterations));
                start = Some(coeffs);
            }
            trust_time_us = t.elapsed().as_secs_f64() * 1e6;
        }
        // After a hold-out solve the start is a solution of nearly the same problem (same
        // window, 90% of its samples): its coefficients, not only its support, are the start.
        let final_settings = if held.is_some() {
            std::borrow::Cow::Owned(SolveSettings {
                warm_use: WarmUse::Coefficients,
                ..(*base_settings).clone()
            })
        } else {
            base_settings
        };
        let outcome = self.solve(
            precision,
            &job.packet.indices,
            &y,
            job.basis,
            n,
            &final_settings,
            start.as_deref(),
        );
        if let (Some(f), Some(_)) = (tuned, &held) {
            warm.lambda.record(&job.trust, f, probe_outcome);
        }
        let mut trust_figures = None;
        if let (Some((cv, h, iterations)), Ok((_, coeffs, _))) = (held, &outcome) {
            let cfg = &job.trust;
            let k = trust::effective_support(coeffs, cfg.support_energy);
            let need = trust::min_measurements(k, n);
            trust_figures = Some(WindowTrust {
                cv_error: cv,
                holdout: h,
                effective_support: k,
                min_measurements: need,
                reasons: LowTrustReasons {
                    // NaN only for an all-zero window, which every solve reproduces exactly.
                    cv_error: cv > cfg.max_cv_error,
                    phase_transition: cfg.phase_transition && (m as f64) < need,
                },
                holdout_iterations: iterations,
                lambda_fraction: tuned,
            });
        }
        let outcome = match outcome {
            Ok((signal, coeffs, report)) => {
                warm.coefficients = Some(coeffs);
                Ok((signal, report))
            }
            Err(e) => {
                warm.coefficients = None;
                Err(e)
            }
        };
        ReconstructedWindow {
            stream_slot: job.stream_slot,
            start: job.start,
            packet: job.packet,
            outcome,
            solve_time_us: started.elapsed().as_secs_f64() * 1e6,
            trust_time_us,
            trust: trust_figures,
            warm,
        }
    }

    #[allow(clippy::type_complexity, clippy::too_many_arguments)]
    fn solve(
        &mut self,
        precision: Precision,
        indices: &[u32],
        y: &[f64],
        basis: BasisKind,
        n: usize,
        settings: &SolveSettings,
        start: Option<&[f64]>,
    ) -> Result<(Vec<f64>, Vec<f64>, SolveReport), String> {
        match precision {
            Precision::F64 => self.f64.solve(indices, y, basis, n, settings, start),
            Precision::F32 => self.f32.solve(indices, y, basis, n, settings, start),
        }
    }
}
