//! `csgate spectrum`: the Welch spectrum and detected peaks of a signal file, as text or JSON.
//! A quick look for users and the interface of the Python cross-check against scipy.
//!
//! # Input formats (chosen by extension)
//! - `.f32` / `.f64`: raw little-endian IEEE floats, nothing else in the file;
//! - anything else: text, one value per line. Blank lines and lines starting with `#` are
//!   skipped; on a comma-separated line the first field is taken; a first line that does not
//!   parse as a number is taken as a header and skipped.

use anyhow::{bail, Context};
use clap::Args;
use csgate::features::peaks::{
    amplitude_db, detect_peaks, prominent_peaks, Interpolation, PeakConfig,
};
use csgate::features::spectrum::{WelchConfig, WelchPlan};
use realfft::RealFftPlanner;
use serde::Serialize;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Options of `csgate spectrum`.
#[derive(Debug, Args)]
pub struct SpectrumArgs {
    /// Signal file (see the command's docs for the formats).
    #[arg(long)]
    pub input: PathBuf,
    /// Sample rate, Hz.
    #[arg(long)]
    pub fs: f64,
    /// Welch segment length (clipped to the signal length, as scipy does).
    #[arg(long, default_value_t = 4096)]
    pub nperseg: usize,
    /// Welch overlap in samples (default nperseg/2).
    #[arg(long)]
    pub noverlap: Option<usize>,
    /// Minimum peak prominence, dB.
    #[arg(long, default_value_t = 10.0)]
    pub prominence_db: f64,
    /// Minimum level above the running-median noise floor, dB.
    #[arg(long, default_value_t = 10.0)]
    pub snr_db: f64,
    /// Most peaks listed.
    #[arg(long, default_value_t = 20)]
    pub max_peaks: usize,
    /// Refine with parabolic interpolation on log magnitude instead of the exact Hann form.
    #[arg(long)]
    pub parabolic: bool,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

#[derive(Serialize)]
struct Output<'a> {
    sample_rate_hz: f64,
    samples: usize,
    nperseg: usize,
    noverlap: usize,
    segments: usize,
    bin_hz: f64,
    /// units²/Hz, scipy.signal.welch scaling='density'.
    psd: &'a [f64],
    /// 20 log10(peak amplitude), clipped `dynamic_range_db` below the maximum.
    amplitude_db: &'a [f64],
    dynamic_range_db: f64,
    prominence_db: f64,
    /// Every local maximum of `amplitude_db` with prominence >= `prominence_db`.
    candidate_bins: Vec<usize>,
    /// Candidates above the noise floor, refined, largest first.
    peaks: Vec<csgate::features::peaks::SpectralPeak>,
}

/// Runs the command.
pub fn run(args: SpectrumArgs) -> anyhow::Result<ExitCode> {
    let x =
        read_signal(&args.input).with_context(|| format!("reading {}", args.input.display()))?;
    if x.len() < 4 {
        bail!(
            "{}: need at least 4 samples, got {}",
            args.input.display(),
            x.len()
        );
    }
    if !(args.fs > 0.0 && args.fs.is_finite()) {
        bail!("--fs must be a positive sample rate, got {}", args.fs);
    }
    let nperseg = args.nperseg.min(x.len());
    let welch = WelchConfig {
        nperseg,
        noverlap: args.noverlap,
    };
    let mut plan = WelchPlan::new(&welch, &mut RealFftPlanner::new())?;
    let spectrum = plan.estimate(&x, args.fs)?;
    let pc = PeakConfig {
        min_prominence_db: args.prominence_db,
        min_snr_db: args.snr_db,
        max_peaks: args.max_peaks,
        interpolation: if args.parabolic {
            Interpolation::ParabolicLog
        } else {
            Interpolation::HannExact
        },
        ..PeakConfig::default()
    };
    let db = amplitude_db(&spectrum, pc.dynamic_range_db);
    let candidate_bins = prominent_peaks(&db, pc.min_prominence_db, None)
        .iter()
        .map(|p| p.index)
        .collect();
    let peaks = detect_peaks(&spectrum, &pc);
    let out = Output {
        sample_rate_hz: args.fs,
        samples: x.len(),
        nperseg,
        noverlap: plan.noverlap(),
        segments: spectrum.segments,
        bin_hz: spectrum.bin_hz,
        psd: &spectrum.psd,
        amplitude_db: &db,
        dynamic_range_db: pc.dynamic_range_db,
        prominence_db: pc.min_prominence_db,
        candidate_bins,
        peaks,
    };
    let stdout = std::io::stdout();
    let mut w = std::io::BufWriter::new(stdout.lock());
    if args.json {
        serde_json::to_writer(&mut w, &out)?;
        writeln!(w)?;
    } else {
        writeln!(
            w,
            "# {} samples at {} Hz; Welch Hann, nperseg {}, noverlap {}, {} segments, {} Hz bins",
            out.samples, out.sample_rate_hz, out.nperseg, out.noverlap, out.segments, out.bin_hz
        )?;
        writeln!(
            w,
            "# peaks (largest first): freq_hz amplitude(peak) level_db prominence_db snr_db"
        )?;
        for p in &out.peaks {
            writeln!(
                w,
                "# {:12.4} {:12.6e} {:9.2} {:9.2} {:9.2}",
                p.freq_hz, p.amplitude, p.level_db, p.prominence_db, p.snr_db
            )?;
        }
        writeln!(w, "freq_hz,psd,amplitude_db")?;
        for (k, (p, d)) in out.psd.iter().zip(out.amplitude_db).enumerate() {
            writeln!(w, "{},{:e},{:.3}", spectrum.freq_hz(k), p, d)?;
        }
    }
    w.flush()?;
    Ok(ExitCode::SUCCESS)
}

fn read_signal(path: &Path) -> anyhow::Result<Vec<f64>> {
    let ext = path.extension().and_then(|e| e.to_str()).unwrap_or("");
    match ext {
        "f32" | "f64" => {
            let bytes = std::fs::read(path)?;
            let width = if ext == "f32" { 4 } else { 8 };
            if bytes.len() % width != 0 {
                bail!("length {} is not a multiple of {width} bytes", bytes.len());
            }
            Ok(bytes
                .chunks_exact(width)
                .map(|c| {
                    if width == 4 {
                        f32::from_le_bytes(c.try_into().expect("4 bytes")) as f64
                    } else {
                        f64::from_le_bytes(c.try_into().expect("8 bytes"))
                    }
                })
                .collect())
        }
        _ => {
            let text = std::fs::read_to_string(path)?;
            let mut out = Vec::new();
            for (i, line) in text.lines().enumerate() {
                let line = line.trim();
                if line.is_empty() || line.starts_with('#') {
                    continue;
                }
                let field = line.split(',').next().unwrap_or("").trim();
                match field.parse::<f64>() {
                    Ok(v) => out.push(v),
                    Err(_) if out.is_empty() && i == 0 => continue,
                    Err(e) => bail!("line {}: {field:?} is not a number: {e}", i + 1),
                }
            }
            Ok(out)
        }
    }
}
