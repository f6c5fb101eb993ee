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
Exit code 2 for a missing file, a file that is not HDF5 or not a csgate record.
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
}

/// Runs `csgate inspect`.
pub fn run(args: InspectArgs) -> Result<ExitCode> {
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
