//! `csgate plan`: how many random samples per window a node must send, and what that costs on
//! the radio. Thin front end of [`csgate::plan`].

use anyhow::{bail, Context};
use clap::Args;
use csgate::basis::BasisKind;
use csgate::plan::{measure_sparsity, plan, MeasuredSparsity, Plan, PlanRequest};
use std::fmt::Write as _;
use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;

/// Options of `csgate plan`.
#[derive(Debug, Args)]
#[command(
    about = "Plan samples per window (m) from the L1 phase transition, with radio payload",
    long_about = "Computes the minimum number m of random samples per window of n for sparse \
recovery: m = ceil(n psi(k/n) (1 + margin)), where psi is the L1 phase-transition curve \
(statistical dimension; Amelunxen, Lotz, McCoy & Tropp 2014). At margin 0 this is the 50% \
success edge for noise-free signals; real windows are noisy and only compressible, so use a \
margin. The sparsity k is given (--sparsity, a count, or a fraction of n when below 1) or \
measured from a record (--from-record: per window, the fewest coefficients holding --energy of \
its energy; the 90th percentile over windows is used). Prints the compression ratio, the \
payload per stream for every index/value encoding of the wire format, and a warning when the \
basis is coherent with time samples (wavelets), where the curve does not apply."
)]
pub struct PlanArgs {
    /// Window length n, in samples.
    #[arg(long = "window-len", short = 'n')]
    pub window_len: usize,
    /// Expected sparsity: a count k (>= 1) or a fraction of n (below 1).
    #[arg(
        long,
        conflicts_with = "from_record",
        required_unless_present = "from_record"
    )]
    pub sparsity: Option<f64>,
    /// Measure the sparsity from the samples of this HDF5 record instead.
    #[arg(long = "from-record")]
    pub from_record: Option<PathBuf>,
    /// With --from-record: the stream to measure, NODE:CHANNEL (default: the first).
    #[arg(long)]
    pub stream: Option<String>,
    /// With --from-record: share of a window's energy the best k coefficients must hold.
    #[arg(long, default_value_t = 0.99)]
    pub energy: f64,
    /// Fraction above the 50% edge: 0.25 asks 25% more samples than the curve.
    #[arg(long, default_value_t = 0.0)]
    pub margin: f64,
    /// Sparsity basis: dct, fourier, db1..db10.
    #[arg(long, default_value = "dct")]
    pub basis: BasisKind,
    /// Sample rate of the ADC grid, Hz (default: the record's, else 25600).
    #[arg(long = "rate")]
    pub sample_rate_hz: Option<f64>,
    /// Hop between window starts, samples (default n/2, half overlap).
    #[arg(long)]
    pub hop: Option<usize>,
    /// Frames carry the 16-byte authentication tag.
    #[arg(long)]
    pub auth: bool,
    /// Print one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
}

#[derive(serde::Serialize)]
struct Output {
    #[serde(flatten)]
    plan: Plan,
    measured: Option<MeasuredSparsity>,
}

pub fn run(args: PlanArgs) -> anyhow::Result<ExitCode> {
    let n = args.window_len;
    if n < 2 {
        bail!("--window-len {n}: expected at least 2 samples");
    }
    if !(args.energy > 0.0 && args.energy <= 1.0) {
        bail!("--energy {}: expected a fraction in (0, 1]", args.energy);
    }
    let mut rate = args.sample_rate_hz;
    let (k, measured) = match (&args.sparsity, &args.from_record) {
        (Some(s), _) => {
            let s = *s;
            if !(s.is_finite() && s > 0.0) {
                bail!("--sparsity {s}: expected a count >= 1 or a fraction in (0, 1)");
            }
            let k = if s < 1.0 {
                (s * n as f64).round().max(1.0)
            } else {
                s.round()
            };
            (k as usize, None)
        }
        (None, Some(path)) => {
            let (samples, fs) = read_record(path, args.stream.as_deref())?;
            rate.get_or_insert(fs);
            let m = measure_sparsity(&samples, args.basis, n, args.energy)
                .with_context(|| format!("measuring sparsity in {}", path.display()))?;
            (m.k_p90, Some(m))
        }
        (None, None) => bail!("give --sparsity or --from-record"),
    };
    let req = PlanRequest {
        n,
        k,
        margin: args.margin,
        basis: args.basis,
        sample_rate_hz: rate.unwrap_or(25_600.0),
        hop_len: args.hop.unwrap_or(n / 2),
        authenticated: args.auth,
    };
    let p = plan(&req)?;
    if args.json {
        let mut json = serde_json::to_string_pretty(&Output { plan: p, measured })?;
        json.push('\n');
        std::io::stdout().write_all(json.as_bytes())?;
        return Ok(ExitCode::SUCCESS);
    }
    let mut out = String::new();
    if let Some(ms) = &measured {
        writeln!(
            out,
            "measured sparsity ({} windows, {:.1}% energy): median k = {}, p90 k = {}, max k = {}",
            ms.windows,
            100.0 * ms.energy_fraction,
            ms.k_median,
            ms.k_p90,
            ms.k_max
        )?;
    }
    writeln!(
        out,
        "window n = {}, sparsity k = {} (rho = {:.4}), basis {}",
        p.n, p.k, p.rho, p.basis
    )?;
    writeln!(
        out,
        "phase-transition edge psi(rho) = {:.8}, n psi = {:.1}",
        p.psi, p.m_edge
    )?;
    writeln!(
        out,
        "samples per window m = {} (margin {:.0}%), compression ratio n/m = {:.2}",
        p.m,
        100.0 * p.margin,
        p.compression_ratio
    )?;
    if let Some(mu) = p.coherence {
        writeln!(
            out,
            "coherence with time samples mu = {mu:.3} (1 ideal, sqrt(n) = {:.1} worst)",
            (n as f64).sqrt()
        )?;
    }
    if p.coherence_warning {
        writeln!(
            out,
            "warning: basis {} is coherent with random time samples; the phase transition does \
not apply and m is too optimistic (prefer dct or fourier)",
            p.basis
        )?;
    }
    writeln!(out, "payload per stream at {:.2} frames/s:", p.frames_per_s)?;
    writeln!(
        out,
        "  {:<13} {:<6} {:>11} {:>12}",
        "index coding", "values", "frame bytes", "bytes/s"
    )?;
    for e in &p.encodings {
        writeln!(
            out,
            "  {:<13} {:<6} {:>11} {:>12.0}",
            e.index_coding, e.values, e.frame_bytes, e.bytes_per_s
        )?;
    }
    std::io::stdout().write_all(out.as_bytes())?;
    Ok(ExitCode::SUCCESS)
}

#[cfg(feature = "hdf5-store")]
fn read_record(path: &std::path::Path, stream: Option<&str>) -> anyhow::Result<(Vec<f32>, f64)> {
    use csgate::store::RecordReader;
    if !path.is_file() {
        bail!("record {}: no such file", path.display());
    }
    let reader =
        RecordReader::open(path).with_context(|| format!("opening record {}", path.display()))?;
    let streams = reader.streams()?;
    let key = match stream {
        Some(s) => {
            let (node, ch) = s
                .split_once(':')
                .with_context(|| format!("--stream {s}: expected NODE:CHANNEL"))?;
            let key = csgate::store::StreamKey::new(
                node.parse()
                    .with_context(|| format!("--stream {s}: bad node"))?,
                ch.parse()
                    .with_context(|| format!("--stream {s}: bad channel"))?,
            );
            if !streams.contains(&key) {
                bail!("--stream {s}: not in {}", path.display());
            }
            key
        }
        None => *streams
            .first()
            .with_context(|| format!("{} holds no stream", path.display()))?,
    };
    let meta = reader.stream_meta(key)?;
    Ok((reader.samples(key)?, meta.sample_rate_hz))
}

#[cfg(not(feature = "hdf5-store"))]
fn read_record(_: &std::path::Path, _: Option<&str>) -> anyhow::Result<(Vec<f32>, f64)> {
    bail!("--from-record needs the hdf5-store feature")
}
