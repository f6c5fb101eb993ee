//! FISTA on the LASSO objective `F(s) = 0.5 ||A s - y||^2 + lambda ||s||_1`, the inner loop of
//! every solver form in [`crate::solver`].
//!
//! Notation follows A. Beck & M. Teboulle, "A fast iterative shrinkage-thresholding algorithm
//! for linear inverse problems", SIAM J. Imaging Sciences 2(1), 2009: `x_k` are the iterates,
//! `y_k` the extrapolated points, `t_k` the momentum sequence, step `1/L`. Adaptive restart is
//! the gradient scheme of B. O'Donoghue & E. Candes, "Adaptive restart for accelerated gradient
//! schemes", Found. Comput. Math. 15, 2015: momentum is reset when
//! `(y_k - x_k) . (x_k - x_{k-1}) > 0`, i.e. when the step points uphill.
//!
//! # Cost per iteration
//! One `A` and one `A^T` (for the sampled basis: one synthesis and one analysis) plus O(n) work.
//! The trick that keeps it at that floor: the loop keeps `z_k = A x_k` and forms
//! `A y_k = z_{k-1} + beta (z_{k-1} - z_{k-2})` by linearity, so `F(x_k)` is known without an
//! extra apply, and the dual point for the duality gap is built from the residual at `y_k`,
//! whose correlation `A^T (y - A y_k)` is the gradient already computed. That gap is an upper
//! bound on `F(x_k) - F*` (any dual-feasible point gives a lower bound on `F*`) and is evaluated
//! every iteration at O(m) cost.

use super::operator::LinearOperator;
use crate::real::{Lanes, Real};
use serde::Serialize;

/// Soft threshold `S_t(z) = sign(z) max(|z| - t, 0)`, the proximal map of `t |.|`
/// (CHECK-VALUES 6.5). `|z| = t` maps to 0.
#[inline]
pub fn soft_threshold<T: Real>(z: T, t: T) -> T {
    if z > t {
        z - t
    } else if z < -t {
        z + t
    } else {
        T::zero()
    }
}

/// The FISTA momentum update `t_{k+1} = (1 + sqrt(1 + 4 t_k^2)) / 2` (Beck & Teboulle 2009).
#[inline]
pub fn next_momentum<T: Real>(t: T) -> T {
    let two = T::of(2.0);
    (T::one() + (T::one() + two * two * t * t).sqrt()) / two
}

/// Why a FISTA run stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FistaStop {
    /// Relative duality gap at or below its tolerance.
    DualityGap,
    /// Relative change of the iterate at or below its tolerance.
    RelativeChange,
    /// Iteration cap reached first.
    IterationCap,
    /// `lambda >= ||A^T y||_inf`, so `s = 0` is optimal (CHECK-VALUES 6.5).
    ZeroSolution,
}

/// Knobs of one FISTA run.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FistaOptions {
    /// Stop when `gap / max(F(x_k), tiny) <= gap_tol` (see [`FistaOutcome::relative_gap`]).
    pub gap_tol: f64,
    /// Stop when `||x_k - x_{k-1}|| <= change_tol * ||x_k||`; 0 disables the test.
    pub change_tol: f64,
    /// Iteration cap.
    pub max_iter: usize,
    /// Gradient-scheme adaptive restart (O'Donoghue & Candes 2015).
    pub restart: bool,
    /// Subspace acceleration (see [`subspace_step`]): once the sign pattern of the iterate has
    /// held for [`SUBSPACE_STABLE`] iterations, solve the LASSO restricted to that pattern by
    /// conjugate gradients and keep the result if it lowers the objective.
    pub subspace: bool,
}

impl Default for FistaOptions {
    fn default() -> Self {
        Self {
            gap_tol: 1e-4,
            change_tol: 0.0,
            max_iter: 5000,
            restart: true,
            subspace: true,
        }
    }
}

/// What a FISTA run ended with.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FistaOutcome<T> {
    /// Iterations done.
    pub iterations: usize,
    /// `F(x)` at the returned iterate.
    pub objective: T,
    /// `||A x - y||` at the returned iterate.
    pub residual_norm: T,
    /// Duality gap `F(x_k) - D(nu)`, `nu` the scaled residual at `y_k` (CHECK-VALUES 6.5).
    pub gap: T,
    /// `gap / max(F(x_k), tiny)`, `tiny` the smallest positive normal value: relative to the
    /// primal objective because that is the quantity the gap bounds from above.
    pub relative_gap: T,
    /// Number of momentum restarts.
    pub restarts: usize,
    /// Conjugate-gradient steps of the subspace solves, included in `iterations` (each costs
    /// one `A` and one `A^T`, as a FISTA iteration does).
    pub subspace_steps: usize,
    /// Subspace solves tried, and how many of them were kept.
    pub subspace_tries: usize,
    /// Subspace solves kept.
    pub subspace_kept: usize,
    /// Why it stopped.
    pub stop: FistaStop,
}

/// Buffers of one FISTA run, reused across runs (they only grow).
#[derive(Debug, Clone, Default)]
pub struct FistaWork<T: Real> {
    x_prev: Vec<T>,
    grad: Vec<T>,
    z: Vec<T>,
    z_prev: Vec<T>,
    r: Vec<T>,
    sub: SubspaceWork<T>,
}

/// Buffers of the subspace solves.
#[derive(Debug, Clone, Default)]
struct SubspaceWork<T: Real> {
    sign: Vec<T>,
    u: Vec<T>,
    p: Vec<T>,
    corr: Vec<T>,
    q: Vec<T>,
    res: Vec<T>,
}

impl<T: Real> FistaWork<T> {
    /// Empty buffers; they are sized on first use.
    pub fn new() -> Self {
        Self::default()
    }

    fn size(&mut self, m: usize, n: usize) {
        resize(&mut self.x_prev, n);
        resize(&mut self.grad, n);
        resize(&mut self.z, m);
        resize(&mut self.z_prev, m);
        resize(&mut self.r, m);
    }
}

pub(crate) fn resize<T: Real>(v: &mut Vec<T>, len: usize) {
    v.clear();
    v.resize(len, T::zero());
}

/// Iterations the sign pattern of the iterate must hold unchanged before a subspace solve is
/// tried (the pattern of the current iterate counts as the first).
pub const SUBSPACE_STABLE: usize = 3;

/// Conjugate-gradient step cap of one subspace solve. On a right sign pattern CG certifies the
/// solution in 4-6 steps (`iteration_study` below); a solve still running after 15 is on a
/// pattern that is about to change, and FISTA is better placed to change it (15 against 40
/// saved 3.7 operator pairs per window on that study).
const SUBSPACE_CG_STEPS: usize = 15;

/// `sum (a_i - b_i)^2` over SIMD vectors ([`Lanes`]).
#[inline]
fn sq_dist<T: Real>(a: &[T], b: &[T]) -> T {
    let w = T::Lanes::WIDTH;
    let mut acc = T::Lanes::splat(T::zero());
    let (ca, cb) = (a.chunks_exact(w), b.chunks_exact(w));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        let d = T::Lanes::load(x) - T::Lanes::load(y);
        acc = acc + d * d;
    }
    let mut tail = T::zero();
    for (&x, &y) in ra.iter().zip(rb) {
        tail += (x - y) * (x - y);
    }
    acc.sum() + tail
}

/// `r = z + beta (z - z_prev) - y` (the residual at FISTA's extrapolated point, by linearity
/// from the stored `z = A x`), returning `(<y, r>, ||r||^2)` from the same pass over SIMD
/// vectors ([`Lanes`]).
#[inline]
fn residual_sums<T: Real>(r: &mut [T], z: &[T], z_prev: &[T], y: &[T], beta: T) -> (T, T) {
    let w = T::Lanes::WIDTH;
    let beta_v = T::Lanes::splat(beta);
    let mut yr = T::Lanes::splat(T::zero());
    let mut rr = yr;
    let mut rc = r.chunks_exact_mut(w);
    let (zc, zpc, yc) = (z.chunks_exact(w), z_prev.chunks_exact(w), y.chunks_exact(w));
    let (zr, zpr, ytail) = (zc.remainder(), zpc.remainder(), yc.remainder());
    for (((rs, zs), zps), ys) in (&mut rc).zip(zc).zip(zpc).zip(yc) {
        let (zv, yv) = (T::Lanes::load(zs), T::Lanes::load(ys));
        let v = zv + beta_v * (zv - T::Lanes::load(zps)) - yv;
        v.store(rs);
        yr = yr + yv * v;
        rr = rr + v * v;
    }
    let (mut tyr, mut trr) = (yr.sum(), rr.sum());
    for (((ri, &zi), &zpi), &yi) in rc.into_remainder().iter_mut().zip(zr).zip(zpr).zip(ytail) {
        let v = zi + beta * (zi - zpi) - yi;
        *ri = v;
        tyr += yi * v;
        trr += v * v;
    }
    (tyr, trr)
}

/// `max |a_i|` over SIMD vectors ([`Lanes`]).
#[inline]
fn max_abs<T: Real>(a: &[T]) -> T {
    let c = a.chunks_exact(T::Lanes::WIDTH);
    let r = c.remainder();
    let acc = c.fold(T::Lanes::splat(T::zero()), |m, x| {
        m.max(T::Lanes::load(x).abs())
    });
    r.iter().fold(acc.max_lane(), |s, &v| s.max(v.abs()))
}

/// Per-iteration sums of the proximal step.
#[derive(Clone, Copy)]
struct ProxSums<T> {
    l1: T,
    change_sq: T,
    norm_sq: T,
    uphill: T,
    /// Non-zero entries of `x_k`.
    nnz: usize,
    /// Entries non-zero in both `x_k` and `x_{k-1}` with the same sign (`x_k,i x_{k-1},i > 0`).
    /// The sign pattern (-, 0, +) held from `x_{k-1}` to `x_k` exactly when this equals the
    /// non-zero count of both (see [`pattern_held`]).
    same: usize,
    /// `max |grad_i|` (`||A^T r||_inf`, for the dual point), read in the same pass.
    max_grad: T,
}

/// Whether the sign pattern held from a vector with `nnz_old` non-zeros to one with `nnz_new`,
/// given `same` entries non-zero in both with the same sign: every non-zero of either vector is
/// then one of those `same` entries, so both patterns are equal (and conversely).
#[inline]
fn pattern_held(nnz_old: usize, nnz_new: usize, same: usize) -> bool {
    same == nnz_new && same == nnz_old
}

/// `x_k = S_{thresh}(y_k - step grad)` with `y_k = x + beta (x - x_prev)` formed on the fly and
/// `x_{k-1}` moved into `x_prev`, in one pass over SIMD vectors ([`Lanes`]: the chunked scalar
/// form of this loop spilled and shuffled under the auto-vectorizer, `perf annotate`). The
/// threshold is branch-free (`v - clamp(v, -t, t)`) and the counters are float lanes (masks
/// `&` one).
///
/// With `CHANGE = false` the two sums of the relative-change test are left at zero: the test is
/// off by default. The sign-pattern test costs one product and one compare per entry (`same`,
/// see [`pattern_held`]) where counting differing signs took two signs of three compares each.
#[inline]
fn prox_step<T: Real, const CHANGE: bool>(
    x: &mut [T],
    x_prev: &mut [T],
    grad: &[T],
    beta: T,
    step: T,
    thresh: T,
) -> ProxSums<T> {
    let w = T::Lanes::WIDTH;
    let zero = T::Lanes::splat(T::zero());
    let one = T::Lanes::splat(T::one());
    let (beta_v, step_v) = (T::Lanes::splat(beta), T::Lanes::splat(step));
    let (hi, lo) = (T::Lanes::splat(thresh), T::Lanes::splat(-thresh));
    let (mut l1, mut change, mut norm, mut uphill) = (zero, zero, zero, zero);
    let (mut nnz, mut same, mut max_grad) = (zero, zero, zero);
    let mut xc = x.chunks_exact_mut(w);
    let mut xpc = x_prev.chunks_exact_mut(w);
    let mut gc = grad.chunks_exact(w);
    for ((xs, xps), gs) in (&mut xc).zip(&mut xpc).zip(&mut gc) {
        let old = T::Lanes::load(xs);
        let g = T::Lanes::load(gs);
        max_grad = max_grad.max(g.abs());
        let yk = old + beta_v * (old - T::Lanes::load(xps));
        let v = yk - step_v * g;
        let new = v - v.max(lo).min(hi);
        let d = new - old;
        uphill = uphill + (yk - new) * d;
        if CHANGE {
            change = change + d * d;
            norm = norm + new * new;
        }
        l1 = l1 + new.abs();
        nnz = nnz + (new.ne(zero) & one);
        same = same + ((new * old).gt(zero) & one);
        old.store(xps);
        new.store(xs);
    }
    let mut sums = ProxSums {
        l1: l1.sum(),
        change_sq: change.sum(),
        norm_sq: norm.sum(),
        uphill: uphill.sum(),
        nnz: nnz.sum().to_f64_() as usize,
        same: same.sum().to_f64_() as usize,
        max_grad: max_grad.max_lane(),
    };
    let (xr, xpr, gr) = (xc.into_remainder(), xpc.into_remainder(), gc.remainder());
    for ((xi, xpi), &gi) in xr.iter_mut().zip(xpr.iter_mut()).zip(gr) {
        let old = *xi;
        sums.max_grad = sums.max_grad.max(gi.abs());
        let yk = old + beta * (old - *xpi);
        let v = yk - step * gi;
        let new = v - v.max(-thresh).min(thresh);
        let d = new - old;
        sums.uphill += (yk - new) * d;
        if CHANGE {
            sums.change_sq += d * d;
            sums.norm_sq += new * new;
        }
        sums.l1 += new.abs();
        sums.nnz += usize::from(new != T::zero());
        sums.same += usize::from(new * old > T::zero());
        *xpi = old;
        *xi = new;
    }
    sums
}

/// Minimizes `0.5 ||A x - y||^2 + lambda ||x||_1` by FISTA from the start `x` (zeros for a cold
/// start, a previous solution for a warm start); `x` holds the result on return.
///
/// With [`FistaOptions::subspace`], FISTA identifies the sign pattern and a conjugate-gradient
/// solve restricted to it finishes the job (see [`subspace_step`]); every candidate is judged
/// by the objective and every stop by the duality gap, so the answer is the LASSO solution
/// either way, usually in far fewer operator applications.
///
/// # Panics
/// If `x.len() != op.cols()` or `y.len() != op.rows()`.
pub fn fista<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    lambda: T,
    options: &FistaOptions,
    x: &mut [T],
    work: &mut FistaWork<T>,
) -> FistaOutcome<T> {
    let (m, n) = (op.rows(), op.cols());
    assert_eq!(x.len(), n, "fista: coefficient length");
    assert_eq!(y.len(), m, "fista: measurement length");
    work.size(m, n);
    let FistaWork {
        x_prev,
        grad,
        z,
        z_prev,
        r,
        sub,
    } = work;
    let half = T::of(0.5);
    let step = T::one() / op.lipschitz();
    let thresh = lambda * step;
    let tiny = T::min_positive_value();
    let y_sq: T = y.iter().fold(T::zero(), |a, &v| a + v * v);
    let gap_tol = T::of(options.gap_tol);

    if x.iter().any(|&v| v != T::zero()) {
        op.apply(x, z);
    } else {
        z.fill(T::zero());
    }
    x_prev.copy_from_slice(x);
    z_prev.copy_from_slice(z);

    let mut t = T::one();
    let mut beta = T::zero();
    let mut restarts = 0;
    let mut outcome = FistaOutcome {
        iterations: 0,
        objective: T::zero(),
        residual_norm: T::zero(),
        gap: T::zero(),
        relative_gap: T::zero(),
        restarts: 0,
        subspace_steps: 0,
        subspace_tries: 0,
        subspace_kept: 0,
        stop: FistaStop::IterationCap,
    };
    // Iterations the sign pattern has held, and whether a subspace solve was already tried on
    // the current pattern (it is tried again only after the pattern changed).
    let (mut stable, mut tried) = (0usize, false);
    // Non-zero entries of the current iterate, for the sign-pattern test.
    let mut nnz_x = super::support_size(x);
    let mut k = 0;
    while k < options.max_iter {
        k += 1;
        // r = A y_k - y with A y_k formed from the stored z's (linearity).
        let (yr, rr) = residual_sums(r, z, z_prev, y, beta);
        op.adjoint(r, grad);
        let sums = if options.change_tol > 0.0 {
            prox_step::<T, true>(x, x_prev, grad, beta, step, thresh)
        } else {
            prox_step::<T, false>(x, x_prev, grad, beta, step, thresh)
        };
        // Dual point nu = (y - A y_k) min(1, lambda / ||A^T (y - A y_k)||_inf) (CHECK-VALUES 6.5);
        // D(nu) = 0.5||y||^2 - 0.5||y - nu||^2 with y - nu = y + scale r.
        let corr = sums.max_grad;
        let scale = if corr > lambda {
            lambda / corr
        } else {
            T::one()
        };
        // ||y + scale r||^2 = ||y||^2 + 2 scale <y, r> + scale^2 ||r||^2, from chunked sums.
        let dist_sq = y_sq + T::of(2.0) * scale * yr + scale * scale * rr;
        let dual = half * (y_sq - dist_sq);

        std::mem::swap(z, z_prev);
        op.apply(x, z);
        let res_sq = sq_dist(z, y);
        let objective = half * res_sq + lambda * sums.l1;
        let gap = (objective - dual).max(T::zero());
        let relative_gap = gap / objective.max(tiny);

        let t_next = next_momentum(t);
        if options.restart && sums.uphill > T::zero() {
            restarts += 1;
            t = T::one();
            beta = T::zero();
        } else {
            beta = (t - T::one()) / t_next;
            t = t_next;
        }

        outcome.iterations = k;
        outcome.objective = objective;
        outcome.residual_norm = res_sq.sqrt();
        outcome.gap = gap;
        outcome.relative_gap = relative_gap;
        outcome.restarts = restarts;
        if relative_gap <= gap_tol {
            outcome.stop = FistaStop::DualityGap;
            break;
        }
        if options.change_tol > 0.0
            && sums.change_sq.sqrt() <= T::of(options.change_tol) * sums.norm_sq.sqrt().max(tiny)
        {
            outcome.stop = FistaStop::RelativeChange;
            break;
        }

        let held = pattern_held(nnz_x, sums.nnz, sums.same);
        nnz_x = sums.nnz;
        if held {
            stable += 1;
        } else {
            stable = 1;
            tried = false;
        }
        // CG on the restricted normal equations is quick only while `A_S` is well conditioned,
        // i.e. `|S|` well below `m`.
        let worth = sums.nnz > 0 && 2 * sums.nnz <= m;
        if options.subspace && worth && stable >= SUBSPACE_STABLE && !tried {
            tried = true;
            let budget = (options.max_iter - k).min(SUBSPACE_CG_STEPS);
            let sub_out = subspace_step(op, y, lambda, gap_tol, objective, x, z, budget, sub);
            k += sub_out.steps;
            outcome.iterations = k;
            outcome.subspace_steps += sub_out.steps;
            outcome.subspace_tries += 1;
            if let Some(kept) = sub_out.kept {
                outcome.subspace_kept += 1;
                // x and z hold the kept point; restart the momentum from it.
                x_prev.copy_from_slice(x);
                z_prev.copy_from_slice(z);
                nnz_x = super::support_size(x);
                t = T::one();
                beta = T::zero();
                outcome.objective = kept.objective;
                outcome.residual_norm = kept.res_sq.sqrt();
                if let Some(g) = kept.gap {
                    outcome.gap = g;
                    outcome.relative_gap = g / kept.objective.max(tiny);
                    if outcome.relative_gap <= gap_tol {
                        outcome.stop = FistaStop::DualityGap;
                        break;
                    }
                }
            }
        }
    }
    outcome
}

/// A point a subspace solve kept.
struct SubspaceKept<T> {
    objective: T,
    res_sq: T,
    /// Duality gap at the point, when it was computed (always, unless the point was truncated
    /// at a sign change).
    gap: Option<T>,
}

struct SubspaceOutcome<T> {
    steps: usize,
    kept: Option<SubspaceKept<T>>,
}

/// The subspace step of an active-set method in the spirit of Z. Wen, W. Yin, D. Goldfarb &
/// Y. Zhang, "A fast algorithm for sparse reconstruction based on shrinkage, subspace
/// optimization, and continuation", SIAM J. Sci. Comput. 32(4), 2010: with the support `S` and
/// signs `sigma` of the FISTA iterate `x`, the LASSO restricted to that sign pattern is the
/// quadratic `0.5||A_S u - y||^2 + lambda sigma^T u`, minimised by conjugate gradients on
/// `A_S^T A_S u = A_S^T y - lambda sigma` from `u = x_S` (CG on the normal equations, each
/// step one `A` and one `A^T`). `A_S` is well conditioned when `|S|` is well below `m` (the
/// regime where L1 recovery works at all), so CG converges in a handful of steps where FISTA,
/// whose step `1/L` is set by the whole operator, would need dozens.
///
/// Every CG step has the full correlation `A^T (y - A u)` at hand, so the duality gap of `u`
/// (a valid bound for any primal point) is checked each step and the solve returns as soon as
/// it certifies `u`. Otherwise `u` is kept only if it keeps the signs and lowers the objective;
/// if signs flipped, the point where the first one reaches zero is tried instead. On return `x`
/// and `z = A x` hold the kept point (or are unchanged).
#[allow(clippy::too_many_arguments)]
fn subspace_step<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    lambda: T,
    gap_tol: T,
    objective_x: T,
    x: &mut [T],
    z: &mut [T],
    max_steps: usize,
    w: &mut SubspaceWork<T>,
) -> SubspaceOutcome<T> {
    let (m, n) = (op.rows(), op.cols());
    let half = T::of(0.5);
    let tiny = T::min_positive_value();
    let y_sq = y.iter().fold(T::zero(), |a, &v| a + v * v);
    resize(&mut w.sign, n);
    resize(&mut w.p, n);
    resize(&mut w.corr, n);
    resize(&mut w.q, m);
    resize(&mut w.res, m);
    w.u.clear();
    w.u.extend_from_slice(x);
    for (sg, &xi) in w.sign.iter_mut().zip(x.iter()) {
        *sg = if xi > T::zero() {
            T::one()
        } else if xi < T::zero() {
            -T::one()
        } else {
            T::zero()
        };
    }
    for ((r, &yi), &zi) in w.res.iter_mut().zip(y).zip(z.iter()) {
        *r = yi - zi;
    }
    // g = mask(A^T res) - lambda sigma; returns (|g|^2, gap at u) with the gap from the full
    // correlation (CHECK-VALUES 6.5).
    let grad_and_gap = |op: &mut O, w: &mut SubspaceWork<T>| -> (T, T, T) {
        op.adjoint(&w.res, &mut w.corr);
        let corr_max = max_abs(&w.corr);
        let mut g2 = T::zero();
        let mut l1 = T::zero();
        for ((c, &sg), &ui) in w.corr.iter_mut().zip(&w.sign).zip(&w.u) {
            l1 += ui.abs();
            if sg != T::zero() {
                *c -= lambda * sg;
                g2 += *c * *c;
            } else {
                *c = T::zero();
            }
        }
        let scale = if corr_max > lambda {
            lambda / corr_max
        } else {
            T::one()
        };
        let res_sq = w.res.iter().fold(T::zero(), |a, &v| a + v * v);
        // y - nu with nu = scale * res.
        let dist_sq = w.res.iter().zip(y).fold(T::zero(), |a, (&ri, &yi)| {
            let d = yi - scale * ri;
            a + d * d
        });
        let objective = half * res_sq + lambda * l1;
        let gap = (objective - half * (y_sq - dist_sq)).max(T::zero());
        (g2, gap, objective)
    };
    let (mut gamma, _, _) = grad_and_gap(op, w);
    w.p.copy_from_slice(&w.corr);
    let mut steps = 0;
    let mut last: Option<(T, T)> = None; // (objective, gap) at u
    while steps < max_steps && gamma > T::zero() {
        op.apply(&w.p, &mut w.q);
        let q2 = w.q.iter().fold(T::zero(), |a, &v| a + v * v);
        steps += 1;
        if q2 <= T::zero() {
            break;
        }
        let alpha = gamma / q2;
        for (u, &p) in w.u.iter_mut().zip(&w.p) {
            *u += alpha * p;
        }
        for (r, &q) in w.res.iter_mut().zip(&w.q) {
            *r -= alpha * q;
        }
        let (next, gap, objective) = grad_and_gap(op, w);
        last = Some((objective, gap));
        if gap <= gap_tol * objective.max(tiny) {
            break;
        }
        let ratio = next / gamma;
        for (p, &g) in w.p.iter_mut().zip(&w.corr) {
            *p = g + ratio * *p;
        }
        gamma = next;
    }
    let Some((objective_u, gap_u)) = last else {
        return SubspaceOutcome { steps, kept: None };
    };
    let res_sq_u = w.res.iter().fold(T::zero(), |a, &v| a + v * v);
    let certified = gap_u <= gap_tol * objective_u.max(tiny);
    // First sign change along x -> u: the largest t in (0, 1] keeping every sign.
    let mut t_max = T::one();
    for ((&xi, &ui), &sg) in x.iter().zip(&w.u).zip(&w.sign) {
        if sg != T::zero() && ui * sg < T::zero() {
            t_max = t_max.min(xi / (xi - ui));
        }
    }
    if certified || (t_max >= T::one() && objective_u < objective_x) {
        x.copy_from_slice(&w.u);
        for ((zi, &yi), &ri) in z.iter_mut().zip(y).zip(&w.res) {
            *zi = yi - ri;
        }
        return SubspaceOutcome {
            steps,
            kept: Some(SubspaceKept {
                objective: objective_u,
                res_sq: res_sq_u,
                gap: Some(gap_u),
            }),
        };
    }
    if t_max <= T::zero() || t_max >= T::one() {
        return SubspaceOutcome { steps, kept: None };
    }
    // Truncated point v = x + t (u - x), entries that reach zero set to zero; A v by linearity
    // from z = A x and A u = y - res (an entry forced to exactly zero was within rounding).
    let mut l1 = T::zero();
    for ((vi, &xi), (&ui, &sg)) in w.p.iter_mut().zip(x.iter()).zip(w.u.iter().zip(&w.sign)) {
        let v = xi + t_max * (ui - xi);
        *vi = if v * sg <= T::zero() { T::zero() } else { v };
        l1 += vi.abs();
    }
    let mut res_sq = T::zero();
    for ((q, &zi), (&yi, &ri)) in w.q.iter_mut().zip(z.iter()).zip(y.iter().zip(&w.res)) {
        *q = zi + t_max * ((yi - ri) - zi);
        res_sq += (*q - yi) * (*q - yi);
    }
    let objective_v = half * res_sq + lambda * l1;
    if objective_v < objective_x {
        x.copy_from_slice(&w.p);
        z.copy_from_slice(&w.q);
        return SubspaceOutcome {
            steps,
            kept: Some(SubspaceKept {
                objective: objective_v,
                res_sq,
                gap: None,
            }),
        };
    }
    SubspaceOutcome { steps, kept: None }
}

/// The duality gap of the LASSO at `s` (CHECK-VALUES 6.5): `r = y - A s`,
/// `nu = r min(1, lambda / ||A^T r||_inf)`, `gap = F(s) - (0.5||y||^2 - 0.5||y - nu||^2)`.
/// Allocates; meant for checks and reports, not for the hot loop.
pub fn duality_gap<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    lambda: T,
    s: &[T],
) -> T {
    let mut r = vec![T::zero(); op.rows()];
    op.apply(s, &mut r);
    for (ri, &yi) in r.iter_mut().zip(y) {
        *ri = yi - *ri;
    }
    let mut c = vec![T::zero(); op.cols()];
    op.adjoint(&r, &mut c);
    let corr = c.iter().fold(T::zero(), |a, &v| a.max(v.abs()));
    let scale = if corr > lambda {
        lambda / corr
    } else {
        T::one()
    };
    let half = T::of(0.5);
    let res_sq = r.iter().fold(T::zero(), |a, &v| a + v * v);
    let l1 = s.iter().fold(T::zero(), |a, &v| a + v.abs());
    let y_sq = y.iter().fold(T::zero(), |a, &v| a + v * v);
    let dist_sq = r.iter().zip(y).fold(T::zero(), |a, (&ri, &yi)| {
        let d = yi - scale * ri;
        a + d * d
    });
    half * res_sq + lambda * l1 - half * (y_sq - dist_sq)
}

/// The LASSO objective `F(s) = 0.5 ||A s - y||^2 + lambda ||s||_1`. Allocates.
pub fn lasso_objective<T: Real, O: LinearOperator<T> + ?Sized>(
    op: &mut O,
    y: &[T],
    lambda: T,
    s: &[T],
) -> T {
    let mut r = vec![T::zero(); op.rows()];
    op.apply(s, &mut r);
    let res_sq = r
        .iter()
        .zip(y)
        .fold(T::zero(), |a, (&v, &w)| a + (v - w) * (v - w));
    T::of(0.5) * res_sq + lambda * s.iter().fold(T::zero(), |a, &v| a + v.abs())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn soft_threshold_boundary_maps_to_zero() {
        // CHECK-VALUES 6.5: S_1(1) = 0, S_1(3) = 2.
        assert_eq!(soft_threshold(1.0_f64, 1.0), 0.0);
        assert_eq!(soft_threshold(-3.0_f64, 1.0), -2.0);
    }

    #[test]
    fn prox_step_sign_test_matches_a_direct_sign_comparison() {
        // Property (common practice: the sign pattern is sign(x) entry by entry): the counts of
        // `prox_step` decide "pattern held" exactly when every entry's sign (-, 0, +) is equal,
        // across both SIMD chunks and the scalar tail (n = 13 is not a multiple of 4 or 8).
        let n = 13;
        let sign = |v: f64| (v > 0.0) as i8 - (v < 0.0) as i8;
        let mut seed = 7u64;
        let mut draw = || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((seed >> 33) % 5) as f64 - 2.0
        };
        let mut seen = [false; 2];
        for _ in 0..2000 {
            let mut x: Vec<f64> = (0..n).map(|_| draw()).collect();
            let mut x_prev = vec![0.0; n];
            let grad: Vec<f64> = (0..n).map(|_| draw() * 0.5).collect();
            let old = x.clone();
            let sums = prox_step::<f64, false>(&mut x, &mut x_prev, &grad, 0.0, 1.0, 1.0);
            let want = old.iter().zip(&x).all(|(&a, &b)| sign(a) == sign(b));
            let held = pattern_held(super::super::support_size(&old), sums.nnz, sums.same);
            assert_eq!(held, want, "old {old:?} new {x:?}");
            assert_eq!(x_prev, old);
            seen[usize::from(want)] = true;
        }
        assert_eq!(seen, [true, true], "both outcomes drawn");
    }
}
