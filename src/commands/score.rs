//! `csgate score`: compares a record with the simulator's ground truth, stream by stream.

use anyhow::Context;
use clap::Args;
use csgate::store::RecordReader;
use std::path::PathBuf;
use std::process::ExitCode;

/// Options of `csgate score`.
#[derive(Debug, Args)]
#[command(
    about = "Score a record against ground truth (SNR per stream)",
    long_about = "Compares every stream of a record with the same stream of a ground-truth file \
written by `csgate simulate --truth`, aligned by time, and prints the reconstruction SNR \
10 log10(sum truth^2 / sum (record - truth)^2) in dB over the samples both hold (gaps, NaN in \
the record, are left out and counted)."
)]
pub struct ScoreArgs {
    /// The record to score.
    #[arg(long)]
    pub record: PathBuf,
    /// The ground-truth file.
    #[arg(long)]
    pub truth: PathBuf,
    /// Print one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// The score of one stream.
#[derive(Debug, serde::Serialize)]
pub struct StreamScore {
    /// Node id.
    pub node: u32,
    /// Channel.
    pub channel: u16,
    /// Samples compared.
    pub compared: u64,
    /// Record samples that are gaps (NaN).
    pub gap_samples: u64,
    /// SNR in dB.
    pub snr_db: f64,
}

/// Runs the comparison.
pub fn run(args: ScoreArgs) -> anyhow::Result<ExitCode> {
    let rec = RecordReader::open(&args.record)
        .with_context(|| format!("open record {}", args.record.display()))?;
    let truth = RecordReader::open(&args.truth)
        .with_context(|| format!("open truth {}", args.truth.display()))?;
    let scores = score(&rec, &truth)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&scores)?);
    } else {
        println!(
            "{:>6} {:>7} {:>10} {:>8} {:>9}",
            "node", "channel", "samples", "gaps", "SNR dB"
        );
        for s in &scores {
            println!(
                "{:>6} {:>7} {:>10} {:>8} {:>9.2}",
                s.node, s.channel, s.compared, s.gap_samples, s.snr_db
            );
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// SNR of every stream of `rec` present in `truth`.
pub fn score(rec: &RecordReader, truth: &RecordReader) -> anyhow::Result<Vec<StreamScore>> {
    let truth_streams = truth.streams()?;
    let mut out = Vec::new();
    for key in rec.streams()? {
        if !truth_streams.contains(&key) {
            continue;
        }
        let meta = rec.stream_meta(key)?;
        let tmeta = truth.stream_meta(key)?;
        anyhow::ensure!(
            (meta.sample_rate_hz - tmeta.sample_rate_hz).abs() < 1e-9,
            "stream {}/{}: sample rates differ",
            key.node,
            key.channel
        );
        let offset_ns = meta.start_time_unix_ns - tmeta.start_time_unix_ns;
        let offset = (offset_ns as f64 * meta.sample_rate_hz / 1e9).round() as i64;
        anyhow::ensure!(offset >= 0, "record starts before its truth");
        let x = rec.samples(key)?;
        let t = truth.samples(key)?;
        let (mut s, mut e, mut n, mut gaps) = (0.0f64, 0.0f64, 0u64, 0u64);
        for (i, &v) in x.iter().enumerate() {
            let Some(&tv) = t.get(i + offset as usize) else {
                break;
            };
            if !v.is_finite() {
                gaps += 1;
                continue;
            }
            s += f64::from(tv).powi(2);
            e += (f64::from(v) - f64::from(tv)).powi(2);
            n += 1;
        }
        out.push(StreamScore {
            node: key.node,
            channel: key.channel,
            compared: n,
            gap_samples: gaps,
            snr_db: 10.0 * (s / e.max(f64::MIN_POSITIVE)).log10(),
        });
    }
    Ok(out)
}
