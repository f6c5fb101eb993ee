//! `csgate inspect`: summary table (or JSON) and PNG plots of a record file.

use anyhow::Result;
use clap::Args;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `csgate inspect`.
#[derive(Debug, Args)]
#[command(after_help = "\
JSON document (--json): {file, layout_version, tool_version, created, closed_cleanly, plots[],
caution, streams[]}; each stream: {node, channel, units, basis, sample_rate_hz, start_time,
samples, duration_s, segments, gaps, gap_samples,
windows{count, assessed, trust_ok, trust_low, mean_cv_error, worst_cv_error, worst_cv_error_seq,
mean_residual, mean_m, n},
severity{blocks, blocks_per_zone[unknown,A,B,C,D], worst_zone, last_zone, max_velocity_rms_mm_s,
max_rms, low_trust_blocks},
top_peaks[{label, source (direct|envelope), blocks, freq_hz, mean_amplitude, max_amplitude}]}.
Figures not available are null. Plots (--plots DIR), per stream node<N>-ch<C>-: time.png,
spectrum.png and envelope.png (of the last analysed block; left out when it holds NaN),
spectrogram.png (records of at least 2048 samples), trust.png.
Exit code 2 for a missing file, a file that is not HDF5 or not a csgate record, and for a
damaged file on which the HDF5 library crashes or does not finish within --timeout (the file is
read in a child process, so that such a file gives an error instead of a crash or a hang).
Severity zones and fault labels are indicative only.")]
pub struct InspectArgs {
    /// Record file (.h5) written by `csgate replay` or `csgate serve`.
    pub file: PathBuf,
    /// Print one JSON document instead of the table (keys below).
    #[arg(long)]
    pub json: bool,
    /// Also write PNG plots per stream into DIR (created if missing).
    #[arg(long, value_name = "DIR")]
    pub plots: Option<PathBuf>,
    /// Seconds the reading may take before it is stopped (0: no limit).
    #[arg(long, default_value_t = 120.0, value_name = "SECONDS")]
    pub timeout: f64,
    /// Read in this process (the child side of the guard).
    #[arg(long, hide = true)]
    pub in_process: bool,
}

/// Runs `csgate inspect`: in a child process (see [`guarded`]) unless `--in-process`.
pub fn run(args: InspectArgs) -> Result<ExitCode> {
    if !args.in_process {
        return guarded(&args);
    }
    let mut summary = csgate::inspect::summarize(&args.file)?;
    if let Some(dir) = &args.plots {
        let files = csgate::inspect::plots::write_plots(&args.file, dir)?;
        summary.plots = files.iter().map(|p| p.display().to_string()).collect();
    }
    if args.json {
        println!("{}", serde_json::to_string_pretty(&summary)?);
    } else {
        print!("{}", csgate::inspect::render_table(&summary));
        if let Some(dir) = &args.plots {
            eprintln!("wrote {} plot(s) to {}", summary.plots.len(), dir.display());
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Runs this command again as a child with `--in-process` and passes its output and exit code
/// on. The HDF5 C library can die of a segmentation fault or loop for minutes on some damaged
/// files (found by the `record` fuzz target; seeds in BENCHMARKS.md section 7), which no
/// error handling inside the process can catch; the child turns either into a plain error
/// and exit code 2.
fn guarded(args: &InspectArgs) -> Result<ExitCode> {
    use std::io::Read;
    use std::os::unix::process::ExitStatusExt;
    use std::time::{Duration, Instant};
    let exe = std::env::current_exe()?;
    let mut cmd = std::process::Command::new(exe);
    cmd.arg("inspect").arg(&args.file).arg("--in-process");
    if args.json {
        cmd.arg("--json");
    }
    if let Some(dir) = &args.plots {
        cmd.arg("--plots").arg(dir);
    }
    let mut child = cmd
        .stdin(std::process::Stdio::null())
        .stdout(std::process::Stdio::piped())
        .spawn()?;
    // The summary can be long: read it while waiting, so the child never blocks on a full pipe.
    let mut out = child.stdout.take().expect("piped above");
    let reader = std::thread::spawn(move || {
        let mut buf = Vec::new();
        let _ = out.read_to_end(&mut buf);
        buf
    });
    let limit = (args.timeout.is_finite() && args.timeout > 0.0)
        .then(|| Duration::from_secs_f64(args.timeout.min(1e7)));
    let began = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait()? {
            break Some(status);
        }
        if limit.is_some_and(|l| began.elapsed() >= l) {
            let _ = child.kill();
            let _ = child.wait();
            break None;
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    let output = reader.join().unwrap_or_default();
    let file = args.file.display();
    match status {
        Some(s) if s.code().is_some() => {
            use std::io::Write;
            let mut stdout = std::io::stdout().lock();
            stdout.write_all(&output)?;
            stdout.flush()?;
            Ok(ExitCode::from(s.code().unwrap_or(2).clamp(0, 255) as u8))
        }
        Some(s) => {
            eprintln!(
                "csgate: error: {file}: the HDF5 library crashed reading this file (signal {}); \
                 the file is damaged in a way the library does not survive",
                s.signal().unwrap_or(0)
            );
            Ok(ExitCode::from(2))
        }
        None => {
            eprintln!(
                "csgate: error: {file}: reading did not finish within {} s and was stopped (the \
                 HDF5 library can loop on some damaged files; raise --timeout for a very large \
                 record)",
                args.timeout
            );
            Ok(ExitCode::from(2))
        }
    }
}
