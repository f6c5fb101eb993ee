//! The reconstruction stage: one window in, one reconstructed window out, on a worker thread.
//!
//! A *function* stage (STYLE 2.3): it keeps no per-stream state of its own. What a stream
//! carries from one window to the next (the warm start) travels inside the job and comes back
//! with the result, so any worker can take any window while the dispatcher keeps each stream's
//! windows strictly sequential.

use crate::basis::{BasisKind, BasisPlanner};
use crate::packet::Packet;
use crate::solver::{SolveReport, SolveSettings, Solver};
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
    /// The stream's state from its previous window.
    pub warm: WarmState,
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
    /// Wall time of the solve in microseconds.
    pub solve_time_us: f64,
    /// The stream's state for its next window.
    pub warm: WarmState,
}

/// Per-worker state: a solver (with its planned basis and buffers) per (basis, length).
#[derive(Debug)]
pub struct WorkerState {
    planner: Arc<BasisPlanner<f64>>,
    solvers: HashMap<(BasisKind, usize), Solver<f64>>,
}

impl WorkerState {
    /// A worker sharing `planner` with the other workers.
    pub fn new(planner: Arc<BasisPlanner<f64>>) -> Self {
        Self {
            planner,
            solvers: HashMap::new(),
        }
    }

    /// Reconstructs one window.
    pub fn run(&mut self, job: ReconstructJob) -> ReconstructedWindow {
        let started = Instant::now();
        let n = job.packet.header.window_len as usize;
        let mut warm = job.warm;
        let outcome = self.solve(
            &job.packet,
            job.basis,
            n,
            &job.settings,
            job.warm_start,
            &warm,
        );
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
            warm,
        }
    }

    #[allow(clippy::type_complexity)]
    fn solve(
        &mut self,
        packet: &Packet,
        basis: BasisKind,
        n: usize,
        settings: &SolveSettings,
        policy: WarmStart,
        warm: &WarmState,
    ) -> Result<(Vec<f64>, Vec<f64>, SolveReport), String> {
        let solver = match self.solvers.entry((basis, n)) {
            std::collections::hash_map::Entry::Occupied(e) => e.into_mut(),
            std::collections::hash_map::Entry::Vacant(v) => {
                let b = self.planner.plan(basis, n).map_err(|e| e.to_string())?;
                v.insert(Solver::new(b))
            }
        };
        let y: Vec<f64> = packet.values.iter().map(|&v| f64::from(v)).collect();
        let start = match policy {
            WarmStart::Cold => None,
            WarmStart::Previous => warm.coefficients.as_deref().filter(|c| c.len() == n),
        };
        let sol = solver
            .solve(&packet.indices, &y, settings, start)
            .map_err(|e| e.to_string())?;
        Ok((sol.signal, sol.lasso_coefficients, sol.report))
    }
}
