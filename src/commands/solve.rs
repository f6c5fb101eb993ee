//! `csgate solve`: reconstructs one window described in a JSON file and writes the result as
//! JSON. It exposes the solver to scripts (the Python cross-checks use it).

use anyhow::Context;
use clap::Args;
use csgate::basis::{BasisKind, BasisPlanner};
use csgate::solver::{SolveReport, SolveSettings, Solver};
use serde::{Deserialize, Serialize};
use std::io::{Read, Write};
use std::path::PathBuf;
use std::process::ExitCode;

/// Options of `csgate solve`.
#[derive(Debug, Args)]
#[command(after_long_help = SCHEMA)]
pub struct SolveArgs {
    /// The problem as JSON (`-` reads standard input). See `--help` for the schema.
    #[arg(long)]
    pub input: PathBuf,
    /// Where to write the result as JSON (`-` writes standard output).
    #[arg(long, default_value = "-")]
    pub output: PathBuf,
}

const SCHEMA: &str = r#"Input JSON:
  {
    "n": 256,                 window length (samples on the grid)
    "basis": "dct",           dct | fourier | db<N> | db<N>:<levels>
    "indices": [0, 5, ...],   sampled instants, strictly increasing, each < n
    "values": [0.1, ...],     sampled values, one per index
    "settings": { ... },      optional; every field has a default, e.g.
        {"form": {"lasso": {"lambda": {"absolute": 0.05}}}, "gap_tol": 1e-8, "debias": false}
        form: {"lasso": {"lambda": L}} | {"constrained": {"eps": E}} | "exact" | "min_l2"
        L: {"absolute": x} | {"fraction_of_max": f} | {"universal": {"sigma": S}}
        E: {"given": x} | {"from_sigma": {"sigma": S}}
        S: {"given": x} | "mad" | "residual"
        also: change_tol, max_iter, restart, debias, debias_cg_steps, eps_tol, exact_tol
    "warm_start": [...]       optional; n starting coefficients
  }

Output JSON:
  {"n", "basis", "coefficients": [n], "lasso_coefficients": [n], "signal": [n],
   "report": {iterations, fista_runs, objective, residual_norm, relative_residual,
              lasso_residual_norm, support, lambda, lambda_max, sigma, relative_gap,
              stop, converged, debiased, cg_steps}}

The computation is in f64. The objective is 0.5 ||A s - y||^2 + lambda ||s||_1 with
A = rows `indices` of the orthonormal synthesis matrix of the basis."#;

/// One window to reconstruct.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Problem {
    n: usize,
    basis: String,
    indices: Vec<u32>,
    values: Vec<f64>,
    #[serde(default)]
    settings: SolveSettings,
    #[serde(default)]
    warm_start: Option<Vec<f64>>,
}

/// The reconstruction written back.
#[derive(Debug, Serialize)]
struct Output {
    n: usize,
    basis: String,
    coefficients: Vec<f64>,
    lasso_coefficients: Vec<f64>,
    signal: Vec<f64>,
    report: SolveReport,
}

/// Runs `csgate solve`.
pub fn run(args: SolveArgs) -> anyhow::Result<ExitCode> {
    let text = if args.input.as_os_str() == "-" {
        let mut s = String::new();
        std::io::stdin()
            .read_to_string(&mut s)
            .context("reading the problem from standard input")?;
        s
    } else {
        std::fs::read_to_string(&args.input)
            .with_context(|| format!("reading {}", args.input.display()))?
    };
    let problem: Problem = serde_json::from_str(&text)
        .with_context(|| format!("parsing the problem in {}", args.input.display()))?;
    let kind: BasisKind = problem.basis.parse()?;
    let basis = BasisPlanner::<f64>::new()
        .plan(kind, problem.n)
        .context("planning the basis")?;
    let mut solver = Solver::new(basis);
    let solution = solver
        .solve(
            &problem.indices,
            &problem.values,
            &problem.settings,
            problem.warm_start.as_deref(),
        )
        .context("solving the window")?;
    let out = Output {
        n: problem.n,
        basis: kind.to_string(),
        coefficients: solution.coefficients,
        lasso_coefficients: solution.lasso_coefficients,
        signal: solution.signal,
        report: solution.report,
    };
    let json = serde_json::to_string(&out)?;
    if args.output.as_os_str() == "-" {
        let mut stdout = std::io::stdout().lock();
        writeln!(stdout, "{json}")?;
    } else {
        std::fs::write(&args.output, json + "\n")
            .with_context(|| format!("writing {}", args.output.display()))?;
    }
    Ok(ExitCode::SUCCESS)
}
