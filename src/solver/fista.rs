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
use crate::real::Real;
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
}

impl Default for FistaOptions {
    fn default() -> Self {
        Self {
            gap_tol: 1e-4,
            change_tol: 0.0,
            max_iter: 5000,
            restart: true,
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
}

impl<T: Real> FistaWork<T> {
    /// Empty buffers; they are sized on first use.
    pub fn new() -> Self {
        Self {
            x_prev: Vec::new(),
            grad: Vec::new(),
            z: Vec::new(),
            z_prev: Vec::new(),
            r: Vec::new(),
        }
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

/// Minimizes `0.5 ||A x - y||^2 + lambda ||x||_1` by FISTA from the start `x` (zeros for a cold
/// start, a previous solution for a warm start); `x` holds the result on return.
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
    } = work;
    let half = T::of(0.5);
    let step = T::one() / op.lipschitz();
    let thresh = lambda * step;
    let tiny = T::min_positive_value();
    let y_sq: T = y.iter().fold(T::zero(), |a, &v| a + v * v);

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
        stop: FistaStop::IterationCap,
    };
    for k in 1..=options.max_iter {
        // r = A y_k - y with A y_k formed from the stored z's (linearity).
        for ((ri, (&zi, &zpi)), &yi) in r.iter_mut().zip(z.iter().zip(z_prev.iter())).zip(y) {
            *ri = zi + beta * (zi - zpi) - yi;
        }
        op.adjoint(r, grad);
        // Dual point nu = (y - A y_k) min(1, lambda / ||A^T (y - A y_k)||_inf) (CHECK-VALUES 6.5);
        // D(nu) = 0.5||y||^2 - 0.5||y - nu||^2 with y - nu = y + scale r.
        let corr = grad.iter().fold(T::zero(), |a, &g| a.max(g.abs()));
        let scale = if corr > lambda {
            lambda / corr
        } else {
            T::one()
        };
        let dist_sq = r.iter().zip(y).fold(T::zero(), |a, (&ri, &yi)| {
            let d = yi + scale * ri;
            a + d * d
        });
        let dual = half * (y_sq - dist_sq);

        // x_k = S_{lambda/L}(y_k - grad/L), with y_k formed on the fly and x_{k-1} moved into
        // x_prev in the same pass, so no buffer for y_k and no copies are needed.
        let mut l1 = T::zero();
        let mut change_sq = T::zero();
        let mut norm_sq = T::zero();
        let mut uphill = T::zero();
        for ((xi, xpi), &gi) in x.iter_mut().zip(x_prev.iter_mut()).zip(grad.iter()) {
            let old = *xi;
            let yk = old + beta * (old - *xpi);
            let new = soft_threshold(yk - step * gi, thresh);
            let d = new - old;
            uphill += (yk - new) * d;
            change_sq += d * d;
            norm_sq += new * new;
            l1 += new.abs();
            *xpi = old;
            *xi = new;
        }

        std::mem::swap(z, z_prev);
        op.apply(x, z);
        let res_sq = z
            .iter()
            .zip(y)
            .fold(T::zero(), |a, (&zi, &yi)| a + (zi - yi) * (zi - yi));
        let objective = half * res_sq + lambda * l1;
        let gap = (objective - dual).max(T::zero());
        let relative_gap = gap / objective.max(tiny);

        let t_next = next_momentum(t);
        if options.restart && uphill > T::zero() {
            restarts += 1;
            t = T::one();
            beta = T::zero();
        } else {
            beta = (t - T::one()) / t_next;
            t = t_next;
        }

        outcome = FistaOutcome {
            iterations: k,
            objective,
            residual_norm: res_sq.sqrt(),
            gap,
            relative_gap,
            restarts,
            stop: FistaStop::IterationCap,
        };
        if relative_gap <= T::of(options.gap_tol) {
            outcome.stop = FistaStop::DualityGap;
            break;
        }
        if options.change_tol > 0.0
            && change_sq.sqrt() <= T::of(options.change_tol) * norm_sq.sqrt().max(tiny)
        {
            outcome.stop = FistaStop::RelativeChange;
            break;
        }
    }
    outcome
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
}
