//! `csgate bench --fuzz N`: the long fuzzing run over every input decoder (`csgate::fuzz`).

use csgate::fuzz::{case_seed, run_case, run_target, CaseOutcome, Failure, Target, TargetReport};
use indicatif::{ProgressBar, ProgressStyle};
use std::os::unix::process::ExitStatusExt;
use std::process::ExitCode;
use std::time::Duration;
use std::time::Instant;

/// What the fuzz run was asked for (from `BenchArgs`).
pub struct FuzzRun {
    /// Cases of each fast (in-memory) target.
    pub cases: u64,
    /// Cases of the HDF5 record target.
    pub record_cases: u64,
    /// Base seed.
    pub seed: u64,
    /// Targets (empty: all).
    pub targets: Vec<Target>,
    /// No progress bar.
    pub quiet: bool,
    /// One JSON object instead of text.
    pub json: bool,
    /// Time limit of one record case (the child is killed after it).
    pub record_case_limit: Duration,
    /// Record cases run at once, each in its own child process.
    pub jobs: usize,
}

/// Runs the fuzz targets and prints counts, wall time, inputs/s and every failure with its
/// seed. Exit status 1 when any case failed.
pub fn run(opts: FuzzRun) -> anyhow::Result<ExitCode> {
    let targets = if opts.targets.is_empty() {
        Target::all()
    } else {
        opts.targets.clone()
    };
    // A panic in a case is caught and reported with its seed; keep the hook from printing
    // a message for each one in the middle of the progress bar.
    let hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    // The decoders log what they reject (a warning per garbage region, ...); millions of
    // rejected inputs are the point here, so this thread logs nothing during the run.
    let quiet_logs = tracing::subscriber::set_default(tracing::subscriber::NoSubscriber::default());
    let start = Instant::now();
    let mut reports: Vec<TargetReport> = Vec::new();
    for target in targets {
        let cases = if target == Target::Record {
            opts.record_cases
        } else {
            opts.cases
        };
        let bar = if opts.quiet || opts.json {
            ProgressBar::hidden()
        } else {
            let b = ProgressBar::new(cases);
            b.set_style(
                ProgressStyle::with_template(
                    "{prefix:>7} [{bar:40}] {human_pos}/{human_len} {per_sec} eta {eta}",
                )
                .expect("valid template")
                .progress_chars("=> "),
            );
            b.set_prefix(target.name());
            b
        };
        let report = if target == Target::Record {
            isolated_record_run(
                cases,
                opts.seed,
                opts.record_case_limit,
                opts.jobs,
                |done| bar.set_position(done),
            )?
        } else {
            run_target(target, cases, opts.seed, |done| bar.set_position(done))
        };
        bar.finish_and_clear();
        reports.push(report);
    }
    drop(quiet_logs);
    std::panic::set_hook(hook);
    let wall = start.elapsed().as_secs_f64();
    let total: u64 = reports.iter().map(|r| r.cases).sum();
    let failed: u64 = reports.iter().map(|r| r.failed).sum();
    if opts.json {
        let per: Vec<_> = reports
            .iter()
            .map(|r| {
                serde_json::json!({
                    "target": r.target.name(),
                    "cases": r.cases,
                    "accepted": r.accepted,
                    "failed": r.failed,
                    "crashed": r.crashed,
                    "hung": r.hung,
                    "wall_s": r.elapsed.as_secs_f64(),
                    "cases_per_s": r.rate(),
                    "slowest_case_ms": r.slowest.0.as_secs_f64() * 1e3,
                    "slowest_case_seed": format!("{:#018x}", r.slowest.1),
                    "failures": r.failures.iter().map(|f| serde_json::json!({
                        "seed": format!("{:#018x}", f.seed),
                        "message": f.message,
                    })).collect::<Vec<_>>(),
                })
            })
            .collect();
        let out = serde_json::json!({
            "seed": opts.seed,
            "cases": total,
            "failed": failed,
            "wall_s": wall,
            "cases_per_s": total as f64 / wall.max(1e-9),
            "targets": per,
        });
        println!("{}", serde_json::to_string_pretty(&out)?);
    } else {
        println!(
            "{:<8} {:>10} {:>10} {:>7} {:>9} {:>11} {:>12}",
            "target", "cases", "accepted", "failed", "wall s", "cases/s", "slowest ms"
        );
        for r in &reports {
            println!(
                "{:<8} {:>10} {:>10} {:>7} {:>9.2} {:>11.0} {:>12.2}",
                r.target.name(),
                r.cases,
                r.accepted,
                r.failed,
                r.elapsed.as_secs_f64(),
                r.rate(),
                r.slowest.0.as_secs_f64() * 1e3
            );
        }
        println!(
            "total    {total:>10} cases in {wall:.1} s, {:.0} cases/s, {failed} failed (base seed {})",
            total as f64 / wall.max(1e-9),
            opts.seed
        );
        for r in &reports {
            if r.crashed + r.hung > 0 {
                println!(
                    "{:<8} of the failed: {} crashed (signal), {} hung (killed at the time limit)",
                    r.target.name(),
                    r.crashed,
                    r.hung
                );
            }
            for f in &r.failures {
                println!("FAILED   {f}");
                println!(
                    "         reproduce: csgate bench --fuzz-case {}:{:#x}",
                    f.target, f.seed
                );
            }
            if r.failed > r.failures.len() as u64 {
                println!(
                    "         ... and {} more {} failures",
                    r.failed - r.failures.len() as u64,
                    r.target
                );
            }
        }
    }
    Ok(if failed == 0 {
        ExitCode::SUCCESS
    } else {
        ExitCode::FAILURE
    })
}

/// Parses `TARGET:SEED` (seed in decimal or 0x hex).
pub fn parse_case(s: &str) -> Result<(Target, u64), String> {
    let (t, seed) = s
        .split_once(':')
        .ok_or_else(|| format!("{s:?}: expected TARGET:SEED, e.g. frame:0x1f"))?;
    let target: Target = t.parse()?;
    let seed = match seed.strip_prefix("0x") {
        Some(hex) => u64::from_str_radix(hex, 16),
        None => seed.parse(),
    }
    .map_err(|e| format!("{s:?}: seed {seed:?} is not a u64 ({e})"))?;
    Ok((target, seed))
}

/// Runs one case (with the default panic hook, so a panic shows its location).
pub fn run_one(target: Target, seed: u64) -> ExitCode {
    match run_case(target, seed) {
        Ok(outcome) => {
            println!("{target} seed {seed:#018x}: ok ({outcome:?})");
            ExitCode::SUCCESS
        }
        Err(f) => {
            println!("FAILED {f}");
            ExitCode::FAILURE
        }
    }
}

/// The record target with every case in a child process (`csgate bench --fuzz-case`): the HDF5
/// C library can crash the process outright on some damaged files (a segmentation fault,
/// which no `catch_unwind` sees) or spin in it for minutes, and such a case must be reported
/// with its seed, not end or stall the run. `jobs` children run at once; a child that has not
/// finished after `limit` is killed and its case reported as a hang.
fn isolated_record_run(
    cases: u64,
    base_seed: u64,
    limit: Duration,
    jobs: usize,
    mut progress: impl FnMut(u64),
) -> anyhow::Result<TargetReport> {
    let exe = std::env::current_exe()?;
    let start = Instant::now();
    let mut report = TargetReport {
        target: Target::Record,
        cases: 0,
        accepted: 0,
        elapsed: Duration::ZERO,
        failures: Vec::new(),
        failed: 0,
        slowest: (Duration::ZERO, 0),
        crashed: 0,
        hung: 0,
    };
    let mut running: Vec<(u64, Instant, std::process::Child)> = Vec::new();
    let mut next = 0u64;
    let mut pause = Duration::from_micros(200);
    while next < cases || !running.is_empty() {
        while next < cases && running.len() < jobs.max(1) {
            let seed = case_seed(base_seed, next);
            let child = std::process::Command::new(&exe)
                .args(["bench", "--fuzz-case", &format!("record:{seed:#x}")])
                .stdin(std::process::Stdio::null())
                .stdout(std::process::Stdio::piped())
                .stderr(std::process::Stdio::null())
                .spawn()?;
            running.push((seed, Instant::now(), child));
            next += 1;
        }
        let mut finished = false;
        let mut k = 0;
        while k < running.len() {
            let (seed, began, child) = &mut running[k];
            let took = began.elapsed();
            let status = match child.try_wait()? {
                Some(status) => Some(status),
                None if took >= limit => {
                    // Hung inside the library: kill it (SIGKILL) and report the case.
                    let _ = child.kill();
                    let _ = child.wait();
                    None
                }
                None => {
                    k += 1;
                    continue;
                }
            };
            let (seed, took) = (*seed, took);
            let mut text = String::new();
            if let Some(out) = child.stdout.as_mut() {
                use std::io::Read;
                let _ = out.read_to_string(&mut text);
            }
            running.swap_remove(k);
            finished = true;
            if took > report.slowest.0 {
                report.slowest = (took, seed);
            }
            match status {
                None => report.hung += 1,
                Some(s) if s.signal().is_some() => report.crashed += 1,
                Some(_) => {}
            }
            let failure = match status {
                None => Some(format!(
                    "no result after {:.0} s: killed (a hang inside the HDF5 C library)",
                    limit.as_secs_f64()
                )),
                Some(status) => match (status.code(), status.signal()) {
                    (Some(0), _) => {
                        if text.contains(&format!("{:?}", CaseOutcome::Accepted)) {
                            report.accepted += 1;
                        }
                        None
                    }
                    (_, Some(sig)) => Some(format!(
                        "the process died of signal {sig} (a crash inside the HDF5 C library)"
                    )),
                    (code, _) => Some(format!("exit {code:?}: {}", text.trim())),
                },
            };
            if let Some(message) = failure {
                report.failed += 1;
                if report.failures.len() < csgate::fuzz::MAX_FAILURES_KEPT {
                    report.failures.push(Failure {
                        target: Target::Record,
                        seed,
                        message,
                    });
                }
            }
            report.cases += 1;
            if report.cases % 16 == 0 {
                progress(report.cases);
            }
        }
        // Poll with a short, growing pause: a case takes a few milliseconds.
        if finished {
            pause = Duration::from_micros(200);
        } else {
            std::thread::sleep(pause);
            pause = (pause * 2).min(Duration::from_millis(5));
        }
    }
    progress(cases);
    report.elapsed = start.elapsed();
    Ok(report)
}
