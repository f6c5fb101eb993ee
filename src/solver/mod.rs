//! Sparse recovery of one window: `y = C Psi s`, solved for `s` and the signal `Psi s`.
//!
//! This is the function stage between window assembly and overlap-add: it takes the `m`
//! sampled values of a window (at strictly increasing instants on the `n`-point grid) and
//! returns the coefficients, the signal on the full grid and a [`SolveReport`].
//!
//! # Main types
//! - [`Solver`]: built once per basis (one per worker thread), owns the operator and every work
//!   buffer, reused across windows: [`Solver::solve`] allocates only the returned vectors.
//! - [`SolveSettings`] (serde, documented defaults) chooses the problem [`Form`]:
//!   - [`Form::Lasso`]: `min 0.5||A s - y||^2 + lambda ||s||_1`, `lambda` by a [`LambdaRule`];
//!   - [`Form::Constrained`]: `min ||s||_1` s.t. `||A s - y|| <= eps` (basis pursuit denoising),
//!     by searching `lambda` until the LASSO residual meets `eps`;
//!   - [`Form::Exact`]: basis pursuit `min ||s||_1` s.t. `A s = y`, by continuation in `lambda`;
//!   - [`Form::MinL2`]: the minimum-norm baseline `s = A^T y`.
//! - [`solve_with_operator`]: the same forms over any [`LinearOperator`] (tests, dense problems).
//!
//! # Conventions
//! With an orthonormal basis the operator has orthonormal rows (`A A^T = I`), so `L = 1`, the
//! FISTA step is 1 and `A^T y` is the minimum-norm solution. Non-finite input and malformed
//! indices are errors ([`SolveError`]); hitting an iteration cap is not: the report says
//! `converged: false`.
//!
//! ```
//! use csgate::solver::{solve_with_operator, DenseOperator, Form, LambdaRule, SolveSettings, Workspace};
//! let mut a = DenseOperator::new(2, 3, vec![1.0, 0.0, 1.0, 0.0, 1.0, 1.0]);
//! let settings = SolveSettings {
//!     form: Form::Lasso { lambda: LambdaRule::Absolute(0.1) },
//!     ..SolveSettings::default()
//! };
//! let sol = solve_with_operator(&mut a, &[1.0, 1.0], &settings, None, &mut Workspace::new()).unwrap();
//! assert_eq!(sol.report.support, 1); // the shared column explains both measurements
//! ```

pub mod fista;
pub mod operator;

pub use fista::{
    duality_gap, fista, lasso_objective, next_momentum, soft_threshold, FistaOptions, FistaOutcome,
    FistaStop, FistaWork,
};
pub use operator::{
    estimate_operator_norm, validate_indices, DenseOperator, IndexError, LinearOperator,
    SampledBasis,
};

use crate::basis::SharedBasis;
use crate::real::Real;
use fista::resize;
use operator::norm2;
use serde::{Deserialize, Serialize};

/// `Phi^{-1}(3/4)`, the MAD-to-sigma constant for Gaussian noise (Donoho & Johnstone 1994 round
/// it to 0.6745; CHECK-VALUES 6.7 gives the exact value).
const MAD_TO_SIGMA: f64 = 0.674_489_750_196_081_7;

/// The problem solved for one window.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Form {
    /// LASSO `min 0.5||A s - y||^2 + lambda ||s||_1` (Tibshirani 1996).
    Lasso {
        /// How `lambda` is chosen.
        lambda: LambdaRule,
    },
    /// `min ||s||_1` subject to `||A s - y|| <= eps`.
    Constrained {
        /// How `eps` is chosen.
        eps: EpsRule,
    },
    /// Basis pursuit `min ||s||_1` subject to `A s = y` (noise-free data).
    Exact,
    /// Minimum-norm least squares `s = A^T y` (exact when `A A^T = I`): the no-sparsity baseline.
    MinL2,
}

/// How the LASSO weight `lambda` is chosen.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LambdaRule {
    /// This value.
    Absolute(f64),
    /// This fraction of `lambda_max = ||A^T y||_inf`, above which `s = 0` (CHECK-VALUES 6.5).
    FractionOfMax(f64),
    /// The universal threshold `sigma sqrt(2 ln n)` (Donoho & Johnstone 1994). Each entry of
    /// `A^T e` for white noise `e` has variance at most `sigma^2` when `A` has orthonormal rows,
    /// so this `lambda` bounds `||A^T e||_inf` with high probability: noise alone selects
    /// nothing. It is conservative for `m < n`; debiasing recovers the shrunk amplitudes.
    Universal {
        /// How the noise level is obtained.
        sigma: SigmaRule,
    },
}

/// How the per-sample noise standard deviation `sigma` is obtained.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SigmaRule {
    /// Known noise level.
    Given(f64),
    /// `sqrt(n/m) median(|d|) / 0.6745` over the finest detail coefficients `d` of `A^T y`
    /// (MAD estimate, Donoho & Johnstone 1994). With orthonormal rows, a coefficient of `A^T e`
    /// has variance `sigma^2 (m/n)` on average, hence the `sqrt(n/m)`. The aliasing of the
    /// signal into those coefficients (incoherent interference of random sampling) adds to
    /// them, so this errs high: a conservative `lambda`, never one that lets noise through.
    Mad,
    /// Starts from [`SigmaRule::Mad`], then re-estimates `sigma = ||y - A s_d|| / sqrt(m - k)`
    /// from the debiased fit `s_d` on the found support (size `k`, the degrees of freedom it
    /// used) and solves again, warm, until `sigma` moves by less than 5% (at most 4 rounds).
    /// Corrects the upward bias of the MAD rule at the price of 2-4 solves. LASSO form only.
    Residual,
}

/// How the residual bound `eps` of the constrained form is chosen.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EpsRule {
    /// This value.
    Given(f64),
    /// `sigma sqrt(m)`: the expected norm of `m` samples of white noise (common practice).
    /// [`SigmaRule::Residual`] is not accepted here.
    FromSigma {
        /// How the noise level is obtained.
        sigma: SigmaRule,
    },
}

/// Settings of one solve. Every field has a default (serde fills missing ones).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SolveSettings {
    /// The problem. Default: LASSO with the universal threshold and the residual noise
    /// estimate, because a gateway rarely knows each node's noise level.
    pub form: Form,
    /// FISTA stops when the relative duality gap `gap / max(F(s), tiny)` is at or below this.
    /// Default 1e-4: the objective is then within 0.01% of optimal, far below the noise floor of
    /// 40-60 dB SNR sensor data.
    pub gap_tol: f64,
    /// FISTA also stops when `||s_k - s_{k-1}|| <= change_tol ||s_k||`. Default 0 (off): the gap
    /// is the more reliable test; a change test can stop early on a slow stretch.
    pub change_tol: f64,
    /// Iteration cap of each FISTA run. Default 3000.
    pub max_iter: usize,
    /// Adaptive restart (O'Donoghue & Candes 2015). Default on: it removes the oscillation of
    /// plain FISTA once the support has settled, typically halving the iterations.
    pub restart: bool,
    /// Subspace acceleration of FISTA (default on; see [`fista::fista`]): once FISTA has held
    /// a sign pattern for a few iterations, conjugate gradients solve the LASSO restricted to
    /// it. The result is the same LASSO solution (checked by the same duality gap).
    pub subspace: bool,
    /// Rounds of iterative reweighting after the LASSO solve (E. Candes, M. Wakin & S. Boyd,
    /// "Enhancing sparsity by reweighted l1 minimization", J. Fourier Anal. Appl. 14, 2008):
    /// each round solves the weighted LASSO with weights `1 / (|s_i| + eps)`, `eps =
    /// reweight_eps * max |s|`. Default 0 (off); see `BENCHMARKS.md` for the measurement.
    pub reweight_rounds: usize,
    /// `eps` of the weights as a fraction of the largest coefficient. Default 1.0, the best of
    /// 0.1, 1 and 3 on the demo streams (`BENCHMARKS.md`).
    pub reweight_eps: f64,
    /// Least-squares refit on the found support (default on): the L1 penalty shrinks every
    /// amplitude by about `lambda`, the refit removes that bias. KKT conditions hold for the
    /// LASSO solution, available as [`Solution::lasso_coefficients`], not for the refit.
    pub debias: bool,
    /// Conjugate-gradient step cap of the refit. Default 10: with `k << m` the support columns
    /// are nearly orthonormal and CG converges in a handful of steps.
    pub debias_cg_steps: usize,
    /// The refit stops once its normal-equation residual is below this fraction of its start.
    /// Default 1e-4: amplitudes are then settled far below the 0.5% the tone test allows, in
    /// about 8 steps instead of 10 at 1e-10 (`solver::iteration_study`).
    pub debias_tol: f64,
    /// How a warm start given to the solver is used. Default [`WarmUse::Support`].
    pub warm_use: WarmUse,
    /// [`WarmUse::Support`]: neighbours added on each side of every support index. Default 1:
    /// a stationary tone between DCT bins moves its weight between neighbouring bins as the
    /// window slides.
    pub warm_dilate: usize,
    /// [`WarmUse::Support`]: CG steps of the least-squares fit on the carried support.
    /// Default 4.
    pub warm_refit_steps: usize,
    /// Constrained form: accept `| ||A s - y|| - eps | <= eps_tol eps`. Default 0.01.
    pub eps_tol: f64,
    /// Exact form: target relative residual `||A s - y|| / ||y||`. Default 1e-6.
    pub exact_tol: f64,
}

impl Default for SolveSettings {
    fn default() -> Self {
        Self {
            form: Form::Lasso {
                lambda: LambdaRule::Universal {
                    sigma: SigmaRule::Residual,
                },
            },
            gap_tol: 1e-4,
            change_tol: 0.0,
            max_iter: 3000,
            restart: true,
            subspace: true,
            reweight_rounds: 0,
            reweight_eps: 1.0,
            debias: true,
            debias_cg_steps: 10,
            debias_tol: 1e-4,
            warm_use: WarmUse::Support,
            warm_dilate: 1,
            warm_refit_steps: 4,
            eps_tol: 0.01,
            exact_tol: 1e-6,
        }
    }
}

/// How a warm-start vector is used.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WarmUse {
    /// FISTA starts from the given coefficients. Right when the problem barely changed (the
    /// searches of the constrained and exact forms); poor across sliding windows, because a
    /// time shift changes DCT coefficients (signs, and weight between neighbouring bins).
    Coefficients,
    /// Only the support of the given coefficients is carried: FISTA starts from a
    /// least-squares fit of the new samples on that support (widened by
    /// [`SolveSettings::warm_dilate`]). What persists from window to window of a machine is
    /// which frequencies are present, not the coefficients' values.
    Support,
}

/// Why a solve ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StopReason {
    /// Relative duality gap within tolerance.
    DualityGap,
    /// Relative change of the iterate within tolerance.
    RelativeChange,
    /// An iteration cap was reached first (`converged: false`).
    IterationCap,
    /// Constrained form: residual within `eps_tol` of `eps`.
    ResidualWithinEps,
    /// Exact form: relative residual within `exact_tol`.
    ExactResidual,
    /// `s = 0` is the solution (`lambda >= lambda_max`, `eps >= ||y||`, or `y = 0`).
    ZeroSolution,
    /// Minimum-norm baseline; no iterations.
    MinL2,
}

impl From<FistaStop> for StopReason {
    fn from(s: FistaStop) -> Self {
        match s {
            FistaStop::DualityGap => StopReason::DualityGap,
            FistaStop::RelativeChange => StopReason::RelativeChange,
            FistaStop::IterationCap => StopReason::IterationCap,
            FistaStop::ZeroSolution => StopReason::ZeroSolution,
        }
    }
}

/// What a solve did. Values are `f64` whatever the working precision.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SolveReport {
    /// FISTA iterations, summed over all runs of this solve, including the conjugate-gradient
    /// steps of the subspace solves (each costs one `A` and one `A^T`, as an iteration does).
    pub iterations: usize,
    /// Of `iterations`, the subspace conjugate-gradient steps.
    #[serde(default)]
    pub subspace_steps: usize,
    /// FISTA runs (1 for a fixed `lambda`; more for the searches and continuation).
    pub fista_runs: usize,
    /// LASSO objective `F(s)` of the LASSO solution at the final `lambda` (before the refit).
    pub objective: f64,
    /// `||A s - y||` of the returned coefficients (after the refit if there was one).
    pub residual_norm: f64,
    /// `residual_norm / ||y||` (0 when `y = 0`).
    pub relative_residual: f64,
    /// `||A s - y||` of the LASSO solution (before the refit).
    pub lasso_residual_norm: f64,
    /// Non-zero coefficients.
    pub support: usize,
    /// `lambda` of the final FISTA run (0 for the minimum-norm baseline).
    pub lambda: f64,
    /// `lambda_max = ||A^T y||_inf`.
    pub lambda_max: f64,
    /// The noise level used, if the rule estimated or was given one.
    pub sigma: Option<f64>,
    /// Relative duality gap of the last FISTA run (see [`FistaOutcome::relative_gap`]).
    pub relative_gap: f64,
    /// Why it ended.
    pub stop: StopReason,
    /// Whether the stopping test of the form was met (false on an iteration cap).
    pub converged: bool,
    /// Whether the least-squares refit was applied.
    pub debiased: bool,
    /// CG steps of the refit(s).
    pub cg_steps: usize,
}

/// Errors of a solve. Messages are lowercase and name the faulty input.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum SolveError {
    /// Malformed sample instants.
    #[error(transparent)]
    Indices(#[from] IndexError),
    /// An input of the wrong length.
    #[error("{what} has length {got}, expected {expected}")]
    LengthMismatch {
        /// Which input.
        what: &'static str,
        /// Required length.
        expected: usize,
        /// Given length.
        got: usize,
    },
    /// A NaN or infinity in an input.
    #[error("{what} has a non-finite value at position {position}")]
    NonFinite {
        /// Which input.
        what: &'static str,
        /// Where.
        position: usize,
    },
    /// No samples in the window.
    #[error("window has no samples (m = 0)")]
    NoSamples,
    /// A setting out of its range.
    #[error("invalid solver setting: {0}")]
    InvalidSettings(String),
}

/// Coefficients and report from [`solve_with_operator`].
#[derive(Debug, Clone, PartialEq)]
pub struct OperatorSolution<T> {
    /// The returned coefficients (refit on the support if `debias`).
    pub coefficients: Vec<T>,
    /// The LASSO solution before any refit (equal to `coefficients` without one); the right
    /// point for KKT checks and the best warm start for a neighbouring window.
    pub lasso_coefficients: Vec<T>,
    /// What the solve did.
    pub report: SolveReport,
}

/// One reconstructed window from [`Solver::solve`].
#[derive(Debug, Clone, PartialEq)]
pub struct Solution<T> {
    /// Coefficients `s` in the basis (refit on the support if `debias`).
    pub coefficients: Vec<T>,
    /// The LASSO solution before the refit (see [`OperatorSolution::lasso_coefficients`]).
    pub lasso_coefficients: Vec<T>,
    /// The signal estimate `Psi s` on the full `n`-point grid.
    pub signal: Vec<T>,
    /// What the solve did.
    pub report: SolveReport,
}

/// Work buffers of [`solve_with_operator`], reused across solves (they only grow).
#[derive(Debug, Clone, Default)]
pub struct Workspace<T: Real> {
    fista: FistaWork<T>,
    /// n: `A^T y`, then CG gradient.
    corr: Vec<T>,
    /// n: CG direction.
    dir: Vec<T>,
    /// n: trial coefficients.
    trial: Vec<T>,
    /// m: CG residual `y - A s`.
    res: Vec<T>,
    /// m: `A p`.
    ap: Vec<T>,
    /// Support mask.
    mask: Vec<bool>,
}

impl<T: Real> Workspace<T> {
    /// Empty buffers, sized on first use.
    pub fn new() -> Self {
        Self::default()
    }
}

/// Reconstructs windows over one basis, reusing its operator and buffers across calls.
///
/// Build one per worker thread (it is `Send`, not shared): the basis itself is shared.
#[derive(Debug)]
pub struct Solver<T: Real> {
    op: SampledBasis<T>,
    workspace: Workspace<T>,
}

impl<T: Real> Solver<T> {
    /// A solver for windows of `basis.len()` samples.
    pub fn new(basis: SharedBasis<T>) -> Self {
        let op = SampledBasis::new(basis, &[]).expect("an empty index set is always valid");
        Self {
            op,
            workspace: Workspace::new(),
        }
    }

    /// Window length `n`.
    pub fn len(&self) -> usize {
        self.op.cols()
    }

    /// Always false: a planned basis has `n >= 1`.
    pub fn is_empty(&self) -> bool {
        self.op.cols() == 0
    }

    /// The basis.
    pub fn basis(&self) -> &SharedBasis<T> {
        self.op.basis()
    }

    /// Reconstructs one window from the values `y` sampled at the strictly increasing
    /// `indices` (in `[0, n)`), optionally warm-started from coefficients of length `n`
    /// (e.g. [`Solution::lasso_coefficients`] of the previous window of the same stream).
    pub fn solve(
        &mut self,
        indices: &[u32],
        y: &[T],
        settings: &SolveSettings,
        warm_start: Option<&[T]>,
    ) -> Result<Solution<T>, SolveError> {
        self.op.set_indices(indices)?;
        let sol = solve_with_operator(&mut self.op, y, settings, warm_start, &mut self.workspace)?;
        let mut signal = vec![T::zero(); self.op.cols()];
        self.op.synthesize_full(&sol.coefficients, &mut signal);
        Ok(Solution {
            coefficients: sol.coefficients,
            lasso_coefficients: sol.lasso_coefficients,
            signal,
            report: sol.report,
        })
    }
}

/// Solves `settings.form` for `y = A s` over any operator. See the module docs.
pub fn solve_with_operator<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    settings: &SolveSettings,
    warm_start: Option<&[T]>,
    ws: &mut Workspace<T>,
) -> Result<OperatorSolution<T>, SolveError> {
    let (m, n) = (op.rows(), op.cols());
    if m == 0 {
        return Err(SolveError::NoSamples);
    }
    check_input("measurements", y, m)?;
    if let Some(w) = warm_start {
        check_input("warm start", w, n)?;
    }
    check_settings(settings)?;

    resize(&mut ws.corr, n);
    op.adjoint(y, &mut ws.corr);
    let lambda_max = ws.corr.iter().fold(T::zero(), |a, &c| a.max(c.abs()));
    let y_norm = norm2(y);
    let mut s = match warm_start {
        Some(w) => w.to_vec(),
        None => vec![T::zero(); n],
    };
    let mut warm_steps = 0;
    if let (Some(w), WarmUse::Support) = (warm_start, settings.warm_use) {
        warm_steps = support_warm_start(op, y, w, settings, &mut s, ws);
        // The refit used `ws.corr` as scratch; restore `A^T y` for the rules below.
        resize(&mut ws.corr, n);
        op.adjoint(y, &mut ws.corr);
    }
    let mut report = SolveReport {
        iterations: 0,
        subspace_steps: 0,
        fista_runs: 0,
        objective: 0.5 * y_norm.to_f64_().powi(2),
        residual_norm: y_norm.to_f64_(),
        relative_residual: if y_norm > T::zero() { 1.0 } else { 0.0 },
        lasso_residual_norm: y_norm.to_f64_(),
        support: 0,
        lambda: 0.0,
        lambda_max: lambda_max.to_f64_(),
        sigma: None,
        relative_gap: 0.0,
        stop: StopReason::ZeroSolution,
        converged: true,
        debiased: false,
        cg_steps: warm_steps,
    };
    if y_norm == T::zero() {
        s.fill(T::zero());
        return Ok(finish(s.clone(), s, report));
    }
    let options = FistaOptions {
        gap_tol: settings.gap_tol,
        change_tol: settings.change_tol,
        max_iter: settings.max_iter,
        restart: settings.restart,
        subspace: settings.subspace,
    };

    match &settings.form {
        Form::MinL2 => {
            s.copy_from_slice(&ws.corr);
            report.stop = StopReason::MinL2;
            report.objective = f64::NAN;
            let residual = residual_norm(op, y, &s, ws);
            report.residual_norm = residual.to_f64_();
            report.lasso_residual_norm = report.residual_norm;
            report.relative_residual = (residual / y_norm).to_f64_();
            report.support = support_size(&s);
            return Ok(finish(s.clone(), s, report));
        }
        Form::Lasso { lambda } => {
            let lambda = match lambda {
                LambdaRule::Absolute(v) => T::of(*v),
                LambdaRule::FractionOfMax(f) => T::of(*f) * lambda_max,
                LambdaRule::Universal { sigma } => {
                    let sigma0 = match sigma {
                        SigmaRule::Given(v) => T::of(*v),
                        SigmaRule::Mad | SigmaRule::Residual => mad_sigma(op, ws),
                    };
                    report.sigma = Some(sigma0.to_f64_());
                    if *sigma == SigmaRule::Residual {
                        return Ok(residual_rounds(
                            op, y, settings, &options, sigma0, lambda_max, s, report, ws,
                        ));
                    }
                    sigma0 * universal_factor::<T>(n)
                }
            };
            run_lasso(op, y, lambda, lambda_max, &options, &mut s, &mut report, ws);
            for _ in 0..settings.reweight_rounds {
                if report.support == 0 {
                    break;
                }
                reweight_round(op, y, lambda, settings, &options, &mut s, &mut report, ws);
            }
        }
        Form::Constrained { eps } => {
            let eps = match eps {
                EpsRule::Given(v) => T::of(*v),
                EpsRule::FromSigma { sigma } => {
                    let sigma = match sigma {
                        SigmaRule::Given(v) => T::of(*v),
                        SigmaRule::Mad => mad_sigma(op, ws),
                        SigmaRule::Residual => unreachable!("refused by check_settings"),
                    };
                    report.sigma = Some(sigma.to_f64_());
                    sigma * T::of(m as f64).sqrt()
                }
            };
            if eps >= y_norm {
                s.fill(T::zero());
                return Ok(finish(s.clone(), s, report));
            }
            constrained(
                op,
                y,
                eps,
                lambda_max,
                settings,
                &options,
                &mut s,
                &mut report,
                ws,
            );
        }
        Form::Exact => {
            let refit = exact(
                op,
                y,
                y_norm,
                lambda_max,
                settings,
                &options,
                &mut s,
                &mut report,
                ws,
            );
            return Ok(finish(refit, s, report));
        }
    }

    let lasso = s.clone();
    if settings.debias && report.support > 0 {
        let (residual, steps) = debias(
            op,
            y,
            &mut s,
            None,
            settings.debias_cg_steps,
            settings.debias_tol,
            ws,
        );
        report.debiased = true;
        report.cg_steps += steps;
        report.residual_norm = residual.to_f64_();
        report.relative_residual = (residual / y_norm).to_f64_();
    }
    Ok(finish(s, lasso, report))
}

fn finish<T: Real>(
    coefficients: Vec<T>,
    lasso: Vec<T>,
    report: SolveReport,
) -> OperatorSolution<T> {
    OperatorSolution {
        coefficients,
        lasso_coefficients: lasso,
        report,
    }
}

fn check_input<T: Real>(what: &'static str, v: &[T], expected: usize) -> Result<(), SolveError> {
    if v.len() != expected {
        return Err(SolveError::LengthMismatch {
            what,
            expected,
            got: v.len(),
        });
    }
    match v.iter().position(|x| !x.is_finite()) {
        Some(position) => Err(SolveError::NonFinite { what, position }),
        None => Ok(()),
    }
}

fn check_settings(s: &SolveSettings) -> Result<(), SolveError> {
    let bad = |msg: String| Err(SolveError::InvalidSettings(msg));
    let positive = |name: &str, v: f64| -> Result<(), SolveError> {
        if v.is_finite() && v > 0.0 {
            Ok(())
        } else {
            bad(format!("{name} must be finite and positive, got {v}"))
        }
    };
    let sigma_ok = |r: &SigmaRule| match r {
        SigmaRule::Given(v) => positive("sigma", *v),
        _ => Ok(()),
    };
    positive("gap_tol", s.gap_tol)?;
    positive("debias_tol", s.debias_tol)?;
    positive("reweight_eps", s.reweight_eps)?;
    positive("eps_tol", s.eps_tol)?;
    positive("exact_tol", s.exact_tol)?;
    if !(s.change_tol.is_finite() && s.change_tol >= 0.0) {
        return bad(format!("change_tol must be >= 0, got {}", s.change_tol));
    }
    if s.max_iter == 0 {
        return bad("max_iter must be at least 1".into());
    }
    match &s.form {
        Form::Lasso { lambda } => match lambda {
            LambdaRule::Absolute(v) => positive("lambda", *v),
            LambdaRule::FractionOfMax(f) => positive("lambda fraction", *f),
            LambdaRule::Universal { sigma } => sigma_ok(sigma),
        },
        Form::Constrained { eps } => match eps {
            EpsRule::Given(v) => positive("eps", *v),
            EpsRule::FromSigma {
                sigma: SigmaRule::Residual,
            } => bad("eps from_sigma cannot use the residual sigma rule".into()),
            EpsRule::FromSigma { sigma } => sigma_ok(sigma),
        },
        Form::Exact | Form::MinL2 => Ok(()),
    }
}

/// `sqrt(2 ln n)`, the universal threshold factor (Donoho & Johnstone 1994).
fn universal_factor<T: Real>(n: usize) -> T {
    T::of((2.0 * (n.max(2) as f64).ln()).sqrt())
}

/// MAD noise estimate from `ws.corr = A^T y` (see [`SigmaRule::Mad`]).
fn mad_sigma<T: Real, O: LinearOperator<T> + ?Sized>(op: &O, ws: &mut Workspace<T>) -> T {
    let range = op.finest_detail_range();
    let (m, n) = (op.rows(), op.cols());
    resize(&mut ws.trial, range.len());
    for (t, &c) in ws.trial.iter_mut().zip(&ws.corr[range]) {
        *t = c.abs();
    }
    if ws.trial.is_empty() {
        return T::zero();
    }
    let mid = ws.trial.len() / 2;
    let (_, median, _) = ws
        .trial
        .select_nth_unstable_by(mid, |a, b| a.partial_cmp(b).expect("finite"));
    *median / T::of(MAD_TO_SIGMA) * T::of((n as f64 / m as f64).sqrt())
}

/// One FISTA run at `lambda` from `s`, recorded into `report`.
#[allow(clippy::too_many_arguments)]
fn run_lasso<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    lambda: T,
    lambda_max: T,
    options: &FistaOptions,
    s: &mut [T],
    report: &mut SolveReport,
    ws: &mut Workspace<T>,
) -> FistaOutcome<T> {
    let y_norm = norm2(y);
    report.lambda = lambda.to_f64_();
    if lambda >= lambda_max {
        // CHECK-VALUES 6.5: s = 0 is optimal for lambda >= ||A^T y||_inf.
        s.fill(T::zero());
        let half_sq = T::of(0.5) * y_norm * y_norm;
        report.objective = half_sq.to_f64_();
        report.residual_norm = y_norm.to_f64_();
        report.lasso_residual_norm = report.residual_norm;
        report.relative_residual = 1.0;
        report.support = 0;
        report.relative_gap = 0.0;
        report.stop = StopReason::ZeroSolution;
        report.converged = true;
        return FistaOutcome {
            iterations: 0,
            objective: half_sq,
            residual_norm: y_norm,
            gap: T::zero(),
            relative_gap: T::zero(),
            restarts: 0,
            subspace_steps: 0,
            subspace_tries: 0,
            subspace_kept: 0,
            stop: FistaStop::ZeroSolution,
        };
    }
    let out = fista(op, y, lambda, options, s, &mut ws.fista);
    record_run(report, &out, y_norm, support_size(s));
    out
}

/// Adds one FISTA run to the report: its cost, and the figures of its final iterate.
fn record_run<T: Real>(report: &mut SolveReport, out: &FistaOutcome<T>, y_norm: T, support: usize) {
    report.iterations += out.iterations;
    report.subspace_steps += out.subspace_steps;
    report.fista_runs += 1;
    report.objective = out.objective.to_f64_();
    report.residual_norm = out.residual_norm.to_f64_();
    report.lasso_residual_norm = report.residual_norm;
    report.relative_residual = (out.residual_norm / y_norm).to_f64_();
    report.support = support;
    report.relative_gap = out.relative_gap.to_f64_();
    report.stop = out.stop.into();
    report.converged = out.stop != FistaStop::IterationCap;
}

/// `A W^{-1}`: the operator of the weighted LASSO in the variables `u = W s`. With every
/// weight at least 1 the norm stays at most that of `A`, so FISTA's step is unchanged.
struct Weighted<'a, T: Real, O: LinearOperator<T> + ?Sized> {
    op: &'a mut O,
    inv_w: &'a [T],
    tmp: Vec<T>,
}

impl<T: Real, O: LinearOperator<T> + ?Sized> LinearOperator<T> for Weighted<'_, T, O> {
    fn rows(&self) -> usize {
        self.op.rows()
    }
    fn cols(&self) -> usize {
        self.op.cols()
    }
    fn apply(&mut self, x: &[T], out: &mut [T]) {
        for ((t, &xi), &iw) in self.tmp.iter_mut().zip(x).zip(self.inv_w) {
            *t = xi * iw;
        }
        self.op.apply(&self.tmp, out);
    }
    fn adjoint(&mut self, y: &[T], out: &mut [T]) {
        self.op.adjoint(y, out);
        for (o, &iw) in out.iter_mut().zip(self.inv_w) {
            *o *= iw;
        }
    }
    fn lipschitz(&self) -> T {
        self.op.lipschitz()
    }
    fn finest_detail_range(&self) -> std::ops::Range<usize> {
        self.op.finest_detail_range()
    }
}

/// One reweighting round (see [`SolveSettings::reweight_rounds`]): weights from `s`, normalised
/// so the smallest is 1 (the largest coefficient keeps the plain penalty), the weighted LASSO
/// at the same `lambda` warm-started from `W s`, and `s` mapped back.
#[allow(clippy::too_many_arguments)]
fn reweight_round<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    lambda: T,
    settings: &SolveSettings,
    options: &FistaOptions,
    s: &mut [T],
    report: &mut SolveReport,
    ws: &mut Workspace<T>,
) {
    let n = s.len();
    let top = s.iter().fold(T::zero(), |a, &v| a.max(v.abs()));
    let eps = T::of(settings.reweight_eps) * top;
    // inv_w = (|s| + eps) / (top + eps) <= 1, i.e. w normalised to min 1.
    let inv_w: Vec<T> = s.iter().map(|&v| (v.abs() + eps) / (top + eps)).collect();
    let mut u: Vec<T> = s.iter().zip(&inv_w).map(|(&v, &iw)| v / iw).collect();
    let mut weighted = Weighted {
        op,
        inv_w: &inv_w,
        tmp: vec![T::zero(); n],
    };
    let out = fista(&mut weighted, y, lambda, options, &mut u, &mut ws.fista);
    for ((si, &ui), &iw) in s.iter_mut().zip(&u).zip(&inv_w) {
        *si = ui * iw;
    }
    record_run(report, &out, norm2(y), support_size(s));
}

/// [`SigmaRule::Residual`]: LASSO rounds with `sigma` re-estimated from the debiased residual.
#[allow(clippy::too_many_arguments)]
fn residual_rounds<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    settings: &SolveSettings,
    options: &FistaOptions,
    mut sigma: T,
    lambda_max: T,
    mut s: Vec<T>,
    mut report: SolveReport,
    ws: &mut Workspace<T>,
) -> OperatorSolution<T> {
    let (m, n) = (op.rows(), op.cols());
    let y_norm = norm2(y);
    let mut refit = s.clone();
    for round in 0..4 {
        run_lasso(
            op,
            y,
            sigma * universal_factor::<T>(n),
            lambda_max,
            options,
            &mut s,
            &mut report,
            ws,
        );
        report.sigma = Some(sigma.to_f64_());
        refit.copy_from_slice(&s);
        let (residual, steps) = if report.support > 0 {
            debias(
                op,
                y,
                &mut refit,
                None,
                settings.debias_cg_steps,
                settings.debias_tol,
                ws,
            )
        } else {
            (y_norm, 0)
        };
        report.cg_steps += steps;
        report.debiased = settings.debias && report.support > 0;
        if report.debiased {
            report.residual_norm = residual.to_f64_();
            report.relative_residual = (residual / y_norm).to_f64_();
        }
        let dof = m.saturating_sub(report.support).max(1) as f64;
        let next = residual / T::of(dof.sqrt());
        let settled = (next - sigma).abs() <= T::of(0.05) * sigma;
        if settled || round == 3 || next <= T::zero() {
            break;
        }
        sigma = next;
    }
    let coefficients = if settings.debias { refit } else { s.clone() };
    finish(coefficients, s, report)
}

/// [`Form::Constrained`]: secant search on `(ln lambda, ln residual)` inside a bracket, with a
/// log-bisection fallback; each LASSO run warm-starts from the previous one. The LASSO residual
/// grows monotonically with `lambda` along the path, so the bracket `(0, lambda_max]` always
/// holds the root when `eps < ||y||`.
#[allow(clippy::too_many_arguments)]
fn constrained<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    eps: T,
    lambda_max: T,
    settings: &SolveSettings,
    options: &FistaOptions,
    s: &mut [T],
    report: &mut SolveReport,
    ws: &mut Workspace<T>,
) {
    let (m, n) = (op.rows(), op.cols());
    let target = eps.to_f64_();
    let mut hi = (lambda_max.to_f64_(), norm2(y).to_f64_());
    let mut lo: Option<(f64, f64)> = None;
    // First guess: the universal threshold for sigma = eps / sqrt(m).
    let mut lambda =
        (target / (m as f64).sqrt() * universal_factor::<f64>(n)).clamp(hi.0 * 1e-6, hi.0 * 0.9);
    for _ in 0..60 {
        let out = run_lasso(op, y, T::of(lambda), lambda_max, options, s, report, ws);
        let res = out.residual_norm.to_f64_();
        if (res - target).abs() <= settings.eps_tol * target {
            report.stop = StopReason::ResidualWithinEps;
            report.converged = out.stop != FistaStop::IterationCap;
            return;
        }
        if res > target {
            hi = (lambda, res);
        } else {
            lo = Some((lambda, res));
        }
        lambda = match lo {
            Some((l_lo, r_lo)) if r_lo > 0.0 => {
                let slope = (hi.1.ln() - r_lo.ln()) / (hi.0.ln() - l_lo.ln());
                let guess = (l_lo.ln() + (target.ln() - r_lo.ln()) / slope).exp();
                let (a, b) = (l_lo.ln(), hi.0.ln());
                let g = guess.ln();
                // Keep the secant step well inside the bracket, else bisect (in log).
                if slope.is_finite()
                    && slope > 0.0
                    && g > a + 0.05 * (b - a)
                    && g < b - 0.05 * (b - a)
                {
                    guess
                } else {
                    (0.5 * (a + b)).exp()
                }
            }
            Some((l_lo, _)) => (l_lo * hi.0).sqrt(),
            // No point below eps yet: the residual shrinks about linearly with lambda.
            None => lambda * (target / res).clamp(0.01, 0.9),
        };
    }
    report.converged = false;
    report.stop = StopReason::IterationCap;
}

/// [`Form::Exact`]: continuation `lambda_j = lambda_max 0.5 * 0.1^j` down to
/// `1e-8 lambda_max`, warm-started; after each stage whose support size has settled (or the
/// last), a least-squares refit on the support is tried and accepted once its relative residual
/// is within `exact_tol`. Intermediate stages are capped at 500 iterations: they only have to
/// bring the support close, the warm start carries the rest and the refit does the polishing;
/// the last stage gets the full `max_iter`. Returns the refit; `s` keeps the last LASSO solution.
#[allow(clippy::too_many_arguments)]
fn exact<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    y_norm: T,
    lambda_max: T,
    settings: &SolveSettings,
    options: &FistaOptions,
    s: &mut [T],
    report: &mut SolveReport,
    ws: &mut Workspace<T>,
) -> Vec<T> {
    let m = op.rows();
    let floor = lambda_max.to_f64_() * 1e-8;
    let mut lambda = lambda_max.to_f64_() * 0.5;
    let mut previous_support = usize::MAX;
    let mut refit = s.to_vec();
    let cg_steps = settings.debias_cg_steps.max(50);
    let stage = FistaOptions {
        max_iter: options.max_iter.min(500),
        ..*options
    };
    loop {
        let last = lambda <= floor;
        let opts = if last { options } else { &stage };
        let out = run_lasso(op, y, T::of(lambda), lambda_max, opts, s, report, ws);
        let support = report.support;
        if support > 0 && support <= m && (support == previous_support || last) {
            refit.copy_from_slice(s);
            let (residual, steps) = debias(op, y, &mut refit, None, cg_steps, 1e-14, ws);
            report.cg_steps += steps;
            report.debiased = true;
            report.residual_norm = residual.to_f64_();
            let rel = residual / y_norm;
            report.relative_residual = rel.to_f64_();
            if rel.to_f64_() <= settings.exact_tol {
                report.stop = StopReason::ExactResidual;
                report.converged = true;
                return refit;
            }
        }
        if last {
            let rel = out.residual_norm / y_norm;
            report.converged = rel.to_f64_() <= settings.exact_tol;
            if report.converged {
                report.stop = StopReason::ExactResidual;
            }
            if !report.debiased || report.relative_residual > rel.to_f64_() {
                refit.copy_from_slice(s);
                report.residual_norm = out.residual_norm.to_f64_();
                report.relative_residual = rel.to_f64_();
                report.debiased = false;
            }
            return refit;
        }
        previous_support = support;
        lambda = (lambda * 0.1).max(floor);
    }
}

/// Least-squares refit on the support of `s` by CGLS on `A_S^T A_S x = A_S^T y` (zero off the
/// support), starting from `s`. Stops after `steps` or when the normal-equation residual falls
/// below `rel_tol` of its start. Returns `||y - A s||` (tracked, not recomputed) and the steps.
fn debias<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    s: &mut [T],
    support_of: Option<&[T]>,
    steps: usize,
    rel_tol: f64,
    ws: &mut Workspace<T>,
) -> (T, usize) {
    let (m, n) = (op.rows(), op.cols());
    resize(&mut ws.res, m);
    resize(&mut ws.ap, m);
    resize(&mut ws.dir, n);
    resize(&mut ws.corr, n);
    ws.mask.clear();
    ws.mask
        .extend(support_of.unwrap_or(s).iter().map(|&v| v != T::zero()));
    op.apply(s, &mut ws.res);
    for (r, &yi) in ws.res.iter_mut().zip(y) {
        *r = yi - *r;
    }
    let masked_adjoint = |op: &mut O, ws: &mut Workspace<T>| -> T {
        op.adjoint(&ws.res, &mut ws.corr);
        let mut g2 = T::zero();
        for (c, &keep) in ws.corr.iter_mut().zip(&ws.mask) {
            if keep {
                g2 += *c * *c;
            } else {
                *c = T::zero();
            }
        }
        g2
    };
    let mut gamma = masked_adjoint(op, ws);
    let gamma0 = gamma;
    ws.dir.copy_from_slice(&ws.corr);
    let mut done = 0;
    for _ in 0..steps {
        if gamma <= T::of(rel_tol * rel_tol) * gamma0 || gamma == T::zero() {
            break;
        }
        op.apply(&ws.dir, &mut ws.ap);
        let q2 = ws.ap.iter().fold(T::zero(), |a, &v| a + v * v);
        if q2 == T::zero() {
            break;
        }
        let alpha = gamma / q2;
        for (x, &p) in s.iter_mut().zip(&ws.dir) {
            *x += alpha * p;
        }
        for (r, &q) in ws.res.iter_mut().zip(&ws.ap) {
            *r -= alpha * q;
        }
        let next = masked_adjoint(op, ws);
        let ratio = next / gamma;
        for (p, &g) in ws.dir.iter_mut().zip(&ws.corr) {
            *p = g + ratio * *p;
        }
        gamma = next;
        done += 1;
    }
    (norm2(&ws.res), done)
}

fn residual_norm<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    s: &[T],
    ws: &mut Workspace<T>,
) -> T {
    resize(&mut ws.res, op.rows());
    op.apply(s, &mut ws.res);
    ws.res
        .iter()
        .zip(y)
        .fold(T::zero(), |a, (&v, &w)| a + (v - w) * (v - w))
        .sqrt()
}

fn support_size<T: Real>(s: &[T]) -> usize {
    s.iter().filter(|&&v| v != T::zero()).count()
}

/// [`WarmUse::Support`]: least-squares fit of `y` on the support of `warm`, widened by
/// `settings.warm_dilate` neighbours on each side, by `settings.warm_refit_steps` CG steps from
/// zero; the fit is FISTA's start. Returns the CG steps done.
fn support_warm_start<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    warm: &[T],
    settings: &SolveSettings,
    s: &mut [T],
    ws: &mut Workspace<T>,
) -> usize {
    let n = warm.len();
    let rows = op.rows();
    let carried = support_size(warm);
    s.fill(T::zero());
    // A least-squares fit needs far fewer columns than rows to be well posed; beyond half of m
    // the carried support is mostly noise coefficients, and a cold start is better.
    let limit = rows / 2;
    if carried == 0 || carried > limit {
        return 0;
    }
    let d = if carried * (2 * settings.warm_dilate + 1) <= limit {
        settings.warm_dilate
    } else {
        0
    };
    let mut mask = std::mem::take(&mut ws.trial);
    resize(&mut mask, n);
    for (i, _) in warm.iter().enumerate().filter(|(_, &v)| v != T::zero()) {
        for m in &mut mask[i.saturating_sub(d)..(i + d + 1).min(n)] {
            *m = T::one();
        }
    }
    let steps = if mask.iter().any(|&v| v != T::zero()) {
        debias(op, y, s, Some(&mask), settings.warm_refit_steps, 1e-6, ws).1
    } else {
        0
    };
    ws.trial = mask;
    steps
}
