//! PNG plots of a record per stream (plotters, bitmap backend). The font is DejaVu Sans,
//! embedded in the binary (`assets/fonts/`, licence beside it), so no system font is needed.
//!
//! Per stream `node<N>-ch<C>-`: `time.png` (an excerpt of the samples), `spectrum.png`
//! (Welch amplitude spectrum of the last analysed block with its labelled `peaks` rows marked),
//! `envelope.png` (envelope spectrum of the same block, labelled envelope peaks marked),
//! `spectrogram.png` (frames spread over the whole stream) and `trust.png` (per-window
//! `cv_error` over time, coloured by trust). The spectra are recomputed with the default
//! feature settings ([`FeatureConfig::default`]); the record does not store
//! the settings the analytics stage used, so the envelope band may differ from the one the
//! markers came from.

use super::{open_record, InspectError};
use crate::features::envelope::{
    candidate_bands, select_band, EnvelopeBand, EnvelopePlan, SpectralKurtosisPlan,
};
use crate::features::spectrum::{WelchConfig, WelchPlan};
use crate::features::FeatureConfig;
use crate::store::layout::{peak_source, trust};
use crate::store::{PeakRow, RecordReader, StreamKey};
use plotters::prelude::*;
use plotters::style::FontStyle;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

const FONT: &[u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
const FAMILY: &str = "sans-serif";
const SIZE: (u32, u32) = (1100, 560);
/// Length of the time excerpt, s.
const EXCERPT_S: f64 = 0.1;

fn register_font() -> Result<(), String> {
    static DONE: OnceLock<Result<(), String>> = OnceLock::new();
    DONE.get_or_init(|| {
        plotters::style::register_font(FAMILY, FontStyle::Normal, FONT)
            .map_err(|_| "embedded font could not be parsed".to_string())
    })
    .clone()
}

/// Writes the plots of every stream of the record `record` into `dir` (created if missing) and
/// returns the files written.
pub fn write_plots(record: &Path, dir: &Path) -> Result<Vec<PathBuf>, InspectError> {
    let reader = open_record(record)?;
    std::fs::create_dir_all(dir).map_err(|source| InspectError::Io {
        path: dir.to_path_buf(),
        source,
    })?;
    register_font().map_err(|what| InspectError::Plot {
        path: dir.to_path_buf(),
        what,
    })?;
    let mut written = Vec::new();
    for key in reader.streams()? {
        written.extend(stream_plots(&reader, key, dir)?);
    }
    Ok(written)
}

fn plot_err(path: &Path) -> impl Fn(String) -> InspectError + '_ {
    move |what| InspectError::Plot {
        path: path.to_path_buf(),
        what,
    }
}

fn stream_plots(
    reader: &RecordReader,
    key: StreamKey,
    dir: &Path,
) -> Result<Vec<PathBuf>, InspectError> {
    let meta = reader.stream_meta(key)?;
    let rate = meta.sample_rate_hz;
    let units = meta.units.clone();
    let prefix = format!("node{}-ch{}", key.node, key.channel);
    let indicators = reader.indicators(key)?;
    let peaks = reader.peaks(key)?;
    let total = reader.sample_count(key)?;

    // The block shown: the last analysed one, else the first second of the record.
    let (block_start, block_len, block_t) = match indicators.last() {
        Some(r) => (r.start_sample, r.len, Some(r.t_unix_ns)),
        None => (0, (rate.round() as u64).min(total), None),
    };
    let block: Vec<f64> = reader
        .samples_range(key, block_start, block_len)?
        .into_iter()
        .map(f64::from)
        .collect();
    let block_peaks: Vec<&PeakRow> = peaks
        .iter()
        .filter(|p| Some(p.t_unix_ns) == block_t && !p.label_str().is_empty())
        .collect();
    let t0 = reader.time_of_index(key, 0)?;
    let block_offset_s = reader
        .time_of_index(key, block_start)
        .map(|t| (t - t0) as f64 * 1e-9)?;
    let title_key = format!("node {} channel {}", key.node, key.channel);

    let mut out = Vec::new();
    let path = dir.join(format!("{prefix}-time.png"));
    let n_ex = ((EXCERPT_S * rate) as usize).clamp(2, block.len().max(2));
    time_plot(
        &path,
        &format!("{title_key}: samples from {block_offset_s:.3} s"),
        &block[..n_ex.min(block.len())],
        rate,
        &units,
    )
    .map_err(plot_err(&path))?;
    out.push(path);

    let finite = block.iter().all(|v| v.is_finite());
    let cfg = FeatureConfig::default();
    if finite && block.len() >= cfg.welch.nperseg {
        let mut planner = realfft::RealFftPlanner::<f64>::new();
        let mut welch =
            WelchPlan::new(&cfg.welch, &mut planner).map_err(|e| plot_err(dir)(e.to_string()))?;
        let spec = welch
            .estimate(&block, rate)
            .map_err(|e| plot_err(dir)(e.to_string()))?;
        let amps = spec.amplitudes();
        let pts: Vec<(f64, f64)> = (0..amps.len())
            .map(|k| (spec.freq_hz(k), amps[k]))
            .collect();
        let markers: Vec<(f64, f64, String)> = block_peaks
            .iter()
            .filter(|p| p.source == peak_source::DIRECT)
            .map(|p| (p.freq_hz, p.amplitude, p.label_str().to_string()))
            .collect();
        let path = dir.join(format!("{prefix}-spectrum.png"));
        spectrum_plot(
            &path,
            &format!(
                "{title_key}: spectrum of the block at {block_offset_s:.3} s (Welch, Hann, {} samples)",
                spec.nperseg
            ),
            &pts,
            &markers,
            rate / 2.0,
            &format!("amplitude (dB re 1 {units})"),
            "spectrum",
            Scale::Db(100.0),
        )
        .map_err(plot_err(&path))?;
        out.push(path);

        if let Some((band, env_pts)) = envelope_spectrum(&block, rate, &cfg) {
            let markers: Vec<(f64, f64, String)> = block_peaks
                .iter()
                .filter(|p| p.source == peak_source::ENVELOPE)
                .map(|p| (p.freq_hz, p.amplitude, p.label_str().to_string()))
                .collect();
            let top = markers.iter().map(|m| m.0).fold(0.0, f64::max);
            let x_max = (top * 1.25).max(500.0).min(rate / 2.0);
            let path = dir.join(format!("{prefix}-envelope.png"));
            spectrum_plot(
                &path,
                &format!(
                    "{title_key}: envelope spectrum, band {:.0}-{:.0} Hz",
                    band.0, band.1
                ),
                &env_pts,
                &markers,
                x_max,
                &format!("envelope amplitude ({units})"),
                "envelope spectrum",
                Scale::Linear,
            )
            .map_err(plot_err(&path))?;
            out.push(path);
        }
    }

    if let Some(grid) = spectrogram_grid(reader, key, total, rate)? {
        let path = dir.join(format!("{prefix}-spectrogram.png"));
        spectrogram_plot(
            &path,
            &format!("{title_key}: spectrogram across the record"),
            &grid,
            &units,
        )
        .map_err(plot_err(&path))?;
        out.push(path);
    }

    let windows = reader.windows(key)?;
    let path = dir.join(format!("{prefix}-trust.png"));
    let pts: Vec<(f64, f64, u8)> = windows
        .iter()
        .filter(|w| w.cv_error.is_finite())
        .map(|w| ((w.t0_unix_ns - t0) as f64 * 1e-9, w.cv_error, w.trust))
        .collect();
    trust_plot(
        &path,
        &format!("{title_key}: per-window cross-validation error"),
        &pts,
    )
    .map_err(plot_err(&path))?;
    out.push(path);
    Ok(out)
}

/// A frequency band (low, high), Hz.
type Band = (f64, f64);

/// The envelope spectrum of `block` as the analytics stage forms it with `cfg`: band by
/// spectral kurtosis (or fixed), envelope of the analytic signal, Welch.
fn envelope_spectrum(
    block: &[f64],
    rate: f64,
    cfg: &FeatureConfig,
) -> Option<(Band, Vec<(f64, f64)>)> {
    let n = block.len();
    let mut real = realfft::RealFftPlanner::<f64>::new();
    let band = match cfg.envelope.band {
        EnvelopeBand::Fixed { low_hz, high_hz } => (low_hz, high_hz.min(rate / 2.0)),
        EnvelopeBand::Auto {
            max_level,
            min_bandwidth_hz,
            stft_len,
        } => {
            let mut sk = SpectralKurtosisPlan::new(stft_len, &mut real).ok()?;
            let k = sk.estimate(block).ok()?;
            let bands = candidate_bands(rate, max_level, min_bandwidth_hz);
            let b = select_band(k, rate / stft_len as f64, &bands)?;
            (b.low_hz, b.high_hz)
        }
    };
    let fft = real.plan_fft_forward(n);
    let mean = block.iter().sum::<f64>() / n as f64;
    let mut input: Vec<f64> = block.iter().map(|v| v - mean).collect();
    let mut spectrum = fft.make_output_vec();
    fft.process(&mut input, &mut spectrum).ok()?;
    let mut plan = EnvelopePlan::new(n, &mut rustfft::FftPlanner::new());
    let mut env = Vec::new();
    plan.envelope(&spectrum, rate, band.0, band.1, &mut env);
    let wc = WelchConfig {
        nperseg: cfg.envelope.nperseg.min(n),
        noverlap: None,
    };
    let spec = WelchPlan::new(&wc, &mut real)
        .ok()?
        .estimate(&env, rate)
        .ok()?;
    let amps = spec.amplitudes();
    Some((
        band,
        (0..amps.len())
            .map(|k| (spec.freq_hz(k), amps[k]))
            .collect(),
    ))
}

fn e2s<E: std::fmt::Debug>(e: E) -> String {
    format!("{e:?}")
}

fn range_of(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
            (l.min(v), h.max(v))
        });
    if !lo.is_finite() {
        return (-1.0, 1.0);
    }
    if hi - lo < 1e-12 {
        return (lo - 1.0, hi + 1.0);
    }
    let pad = 0.05 * (hi - lo);
    (lo - pad, hi + pad)
}

fn time_plot(path: &Path, title: &str, x: &[f64], rate: f64, units: &str) -> Result<(), String> {
    let root = BitMapBackend::new(path, SIZE).into_drawing_area();
    root.fill(&WHITE).map_err(e2s)?;
    let t_end_ms = (x.len().max(2) - 1) as f64 * 1e3 / rate;
    let (lo, hi) = range_of(x.iter().copied());
    // Headroom for the legend.
    let hi = hi + 0.25 * (hi - lo);
    let mut chart = ChartBuilder::on(&root)
        .caption(title, (FAMILY, 22))
        .margin(15)
        .x_label_area_size(50)
        .y_label_area_size(80)
        .build_cartesian_2d(0.0..t_end_ms, lo..hi)
        .map_err(e2s)?;
    chart
        .configure_mesh()
        .x_desc("time from the excerpt start (ms)")
        .y_desc(format!("amplitude ({units})"))
        .label_style((FAMILY, 15))
        .axis_desc_style((FAMILY, 17))
        .draw()
        .map_err(e2s)?;
    let pts = x
        .iter()
        .enumerate()
        .filter(|(_, v)| v.is_finite())
        .map(|(i, &v)| (i as f64 * 1e3 / rate, v));
    chart
        .draw_series(LineSeries::new(pts, BLUE.stroke_width(1)))
        .map_err(e2s)?
        .label(format!("reconstructed samples ({rate} Hz)"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], BLUE));
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .label_font((FAMILY, 15))
        .draw()
        .map_err(e2s)?;
    root.present().map_err(e2s)
}

/// Amplitude scale of a spectrum plot.
#[derive(Clone, Copy, PartialEq)]
enum Scale {
    /// Linear, stream units.
    Linear,
    /// `20 log10(a / 1 unit)`, with this many dB shown below the largest value.
    Db(f64),
}

#[allow(clippy::too_many_arguments)]
fn spectrum_plot(
    path: &Path,
    title: &str,
    pts: &[(f64, f64)],
    markers: &[(f64, f64, String)],
    x_max: f64,
    y_desc: &str,
    series: &str,
    scale: Scale,
) -> Result<(), String> {
    let root = BitMapBackend::new(path, SIZE).into_drawing_area();
    root.fill(&WHITE).map_err(e2s)?;
    let to_y = |a: f64| match scale {
        Scale::Linear => a,
        Scale::Db(_) => 20.0 * a.max(1e-300).log10(),
    };
    let shown: Vec<(f64, f64)> = pts
        .iter()
        .filter(|p| p.0 <= x_max)
        .map(|p| (p.0, to_y(p.1)))
        .collect();
    let in_view: Vec<(f64, f64, &str)> = markers
        .iter()
        .filter(|m| m.0 <= x_max)
        .map(|m| (m.0, to_y(m.1), m.2.as_str()))
        .collect();
    let top = shown
        .iter()
        .map(|p| p.1)
        .chain(in_view.iter().map(|m| m.1))
        .filter(|v| v.is_finite())
        .fold(f64::NEG_INFINITY, f64::max);
    let (y_lo, y_top) = match scale {
        Scale::Linear => (0.0, top.max(1e-12) * 1.25),
        Scale::Db(range) => {
            let top = if top.is_finite() { top } else { 0.0 };
            let floor = shown
                .iter()
                .map(|p| p.1)
                .filter(|v| v.is_finite())
                .fold(f64::INFINITY, f64::min);
            ((top - range).max(floor.min(top - 10.0)), top + 0.2 * range)
        }
    };
    let mut chart = ChartBuilder::on(&root)
        .caption(title, (FAMILY, 20))
        .margin(15)
        .x_label_area_size(50)
        .y_label_area_size(90)
        .build_cartesian_2d(0.0..x_max, y_lo..y_top)
        .map_err(e2s)?;
    chart
        .configure_mesh()
        .x_desc("frequency (Hz)")
        .y_desc(y_desc)
        .label_style((FAMILY, 15))
        .axis_desc_style((FAMILY, 17))
        .draw()
        .map_err(e2s)?;
    let clipped = shown.into_iter().map(|(f, y)| (f, y.max(y_lo)));
    chart
        .draw_series(LineSeries::new(clipped, BLUE.stroke_width(1)))
        .map_err(e2s)?
        .label(series)
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], BLUE));
    if !in_view.is_empty() {
        let marker_colour = RED.mix(0.7);
        chart
            .draw_series(in_view.iter().map(|m| {
                PathElement::new(vec![(m.0, y_lo), (m.0, m.1)], marker_colour.stroke_width(1))
            }))
            .map_err(e2s)?
            .label("labelled peak (record's peaks rows)")
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], RED));
        chart
            .draw_series(
                in_view
                    .iter()
                    .map(|m| Circle::new((m.0, m.1), 3, RED.filled())),
            )
            .map_err(e2s)?;
        chart
            .draw_series(in_view.iter().map(|m| {
                Text::new(
                    m.2.to_string(),
                    (m.0, m.1 + 0.02 * (y_top - y_lo)),
                    (FAMILY, 14).into_font().color(&RED),
                )
            }))
            .map_err(e2s)?;
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .label_font((FAMILY, 15))
        .draw()
        .map_err(e2s)?;
    root.present().map_err(e2s)
}

fn trust_plot(path: &Path, title: &str, pts: &[(f64, f64, u8)]) -> Result<(), String> {
    let root = BitMapBackend::new(path, SIZE).into_drawing_area();
    root.fill(&WHITE).map_err(e2s)?;
    let limit = crate::pipeline::trust::TrustConfig::default().max_cv_error;
    let x_max = pts.iter().map(|p| p.0).fold(0.0, f64::max).max(1e-3);
    let y_max = pts
        .iter()
        .map(|p| p.1)
        .fold(limit, f64::max)
        .max(limit * 1.2)
        * 1.4;
    let mut chart = ChartBuilder::on(&root)
        .caption(title, (FAMILY, 22))
        .margin(15)
        .x_label_area_size(50)
        .y_label_area_size(80)
        .build_cartesian_2d(0.0..x_max * 1.02, 0.0..y_max)
        .map_err(e2s)?;
    chart
        .configure_mesh()
        .x_desc("window start, time from the first sample (s)")
        .y_desc("cv_error (relative RMS, 0 = perfect)")
        .label_style((FAMILY, 15))
        .axis_desc_style((FAMILY, 17))
        .draw()
        .map_err(e2s)?;
    for (code, colour, name) in [
        (trust::OK, BLUE, "trust ok"),
        (trust::LOW, RED, "trust low"),
    ] {
        let sel: Vec<(f64, f64)> = pts
            .iter()
            .filter(|p| p.2 == code)
            .map(|p| (p.0, p.1))
            .collect();
        chart
            .draw_series(sel.iter().map(|&p| Circle::new(p, 3, colour.filled())))
            .map_err(e2s)?
            .label(format!("{name} ({} windows)", sel.len()))
            .legend(move |(x, y)| Circle::new((x + 10, y), 4, colour.filled()));
    }
    chart
        .draw_series(LineSeries::new(
            vec![(0.0, limit), (x_max * 1.02, limit)],
            BLACK.mix(0.6).stroke_width(1),
        ))
        .map_err(e2s)?
        .label(format!("default low-trust limit {limit}"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], BLACK));
    if pts.is_empty() {
        chart
            .draw_series(std::iter::once(Text::new(
                "no assessed windows (trust off or linear method)",
                (x_max * 0.05, y_max * 0.5),
                (FAMILY, 18),
            )))
            .map_err(e2s)?;
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .label_font((FAMILY, 15))
        .draw()
        .map_err(e2s)?;
    root.present().map_err(e2s)
}

/// Frame length of the spectrogram (25 Hz bins at 25.6 kHz).
const SPECTROGRAM_FRAME: usize = 1024;
/// At most this many frames (columns) across the record, evenly spaced.
const SPECTROGRAM_COLUMNS: u64 = 300;
/// At most this many frequency rows (bins are merged by their maximum).
const SPECTROGRAM_ROWS: usize = 256;
/// Range of the colour scale below the largest value, dB.
const SPECTROGRAM_RANGE_DB: f64 = 80.0;

/// Spectrogram cells: per column its start (s) and the dB values of its rows.
struct Grid {
    col_s: f64,
    columns: Vec<(f64, Option<Vec<f64>>)>,
    row_hz: f64,
    max_db: f64,
}

/// Hann-windowed frames spread over the whole stream, read one by one (a record of hours is
/// never read whole); frames touching NaN (gaps) stay empty.
fn spectrogram_grid(
    reader: &RecordReader,
    key: StreamKey,
    total: u64,
    rate: f64,
) -> Result<Option<Grid>, InspectError> {
    let n = SPECTROGRAM_FRAME;
    if total < n as u64 * 2 {
        return Ok(None);
    }
    let frames = total / n as u64;
    let cols = frames.min(SPECTROGRAM_COLUMNS);
    let step = (total - n as u64) / (cols - 1).max(1);
    let mut planner = realfft::RealFftPlanner::<f64>::new();
    let fft = planner.plan_fft_forward(n);
    let window = crate::features::spectrum::hann_periodic(n);
    let sum_w: f64 = window.iter().sum();
    let bins = n / 2 + 1;
    let merge = bins.div_ceil(SPECTROGRAM_ROWS);
    let mut input = fft.make_input_vec();
    let mut output = fft.make_output_vec();
    let mut columns = Vec::with_capacity(cols as usize);
    let mut max_db = f64::NEG_INFINITY;
    for c in 0..cols {
        let start = c * step;
        let x = reader.samples_range(key, start, n as u64)?;
        let t = start as f64 / rate;
        if x.len() < n || x.iter().any(|v| !v.is_finite()) {
            columns.push((t, None));
            continue;
        }
        let mean = x.iter().map(|&v| f64::from(v)).sum::<f64>() / n as f64;
        for ((d, &v), w) in input.iter_mut().zip(&x).zip(&window) {
            *d = (f64::from(v) - mean) * w;
        }
        if fft.process(&mut input, &mut output).is_err() {
            columns.push((t, None));
            continue;
        }
        // Peak amplitude of a bin-centred tone: 2 |X_k| / sum(w) (common practice).
        let rows: Vec<f64> = output
            .chunks(merge)
            .map(|chunk| {
                let a = chunk.iter().map(|z| z.norm()).fold(0.0, f64::max) * 2.0 / sum_w;
                20.0 * a.max(1e-300).log10()
            })
            .collect();
        max_db = rows.iter().copied().fold(max_db, f64::max);
        columns.push((t, Some(rows)));
    }
    if !max_db.is_finite() {
        return Ok(None);
    }
    Ok(Some(Grid {
        col_s: step as f64 / rate,
        columns,
        row_hz: merge as f64 * rate / n as f64,
        max_db,
    }))
}

/// Dark blue, teal, green, yellow: a sequential scale that stays readable in grey. Written
/// out here because the plotters features in use leave out its colour maps.
fn colour(v: f64) -> RGBColor {
    const STOPS: [(f64, (f64, f64, f64)); 4] = [
        (0.0, (20.0, 20.0, 80.0)),
        (0.35, (30.0, 120.0, 160.0)),
        (0.7, (60.0, 180.0, 110.0)),
        (1.0, (245.0, 230.0, 60.0)),
    ];
    let v = v.clamp(0.0, 1.0);
    let i = STOPS.iter().position(|s| s.0 >= v).unwrap_or(3).max(1);
    let (a, b) = (STOPS[i - 1], STOPS[i]);
    let f = (v - a.0) / (b.0 - a.0);
    let mix = |x: f64, y: f64| (x + f * (y - x)).round() as u8;
    RGBColor(
        mix(a.1 .0, b.1 .0),
        mix(a.1 .1, b.1 .1),
        mix(a.1 .2, b.1 .2),
    )
}

fn spectrogram_plot(path: &Path, title: &str, grid: &Grid, units: &str) -> Result<(), String> {
    let root = BitMapBackend::new(path, SIZE).into_drawing_area();
    root.fill(&WHITE).map_err(e2s)?;
    let (main, bar) = root.split_horizontally(SIZE.0 - 130);
    let lo = grid.max_db - SPECTROGRAM_RANGE_DB;
    let t_end = grid.columns.last().map_or(1.0, |c| c.0) + grid.col_s;
    let rows = grid
        .columns
        .iter()
        .find_map(|c| c.1.as_ref().map(Vec::len))
        .unwrap_or(1);
    let f_end = rows as f64 * grid.row_hz;
    let mut chart = ChartBuilder::on(&main)
        .caption(title, (FAMILY, 22))
        .margin(15)
        .x_label_area_size(50)
        .y_label_area_size(80)
        .build_cartesian_2d(0.0..t_end, 0.0..f_end)
        .map_err(e2s)?;
    chart
        .configure_mesh()
        .disable_mesh()
        .x_desc("time from the first sample (s; unfilled long gaps not shown)")
        .y_desc("frequency (Hz)")
        .label_style((FAMILY, 15))
        .axis_desc_style((FAMILY, 17))
        .draw()
        .map_err(e2s)?;
    for (t, col) in &grid.columns {
        let Some(col) = col else { continue };
        chart
            .draw_series(col.iter().enumerate().map(|(r, &db)| {
                let c = colour((db - lo) / SPECTROGRAM_RANGE_DB);
                Rectangle::new(
                    [
                        (*t, r as f64 * grid.row_hz),
                        (t + grid.col_s, (r + 1) as f64 * grid.row_hz),
                    ],
                    c.filled(),
                )
            }))
            .map_err(e2s)?;
    }
    let mut scale = ChartBuilder::on(&bar)
        .margin_top(50)
        .margin_bottom(65)
        .margin_right(10)
        .y_label_area_size(70)
        .build_cartesian_2d(0.0..1.0, lo..grid.max_db)
        .map_err(e2s)?;
    scale
        .configure_mesh()
        .disable_mesh()
        .disable_x_axis()
        .y_desc(format!("dB re 1 {units}"))
        .label_style((FAMILY, 13))
        .axis_desc_style((FAMILY, 15))
        .draw()
        .map_err(e2s)?;
    let steps = 100;
    scale
        .draw_series((0..steps).map(|i| {
            let a = lo + SPECTROGRAM_RANGE_DB * i as f64 / steps as f64;
            let b = lo + SPECTROGRAM_RANGE_DB * (i + 1) as f64 / steps as f64;
            Rectangle::new(
                [(0.0, a), (1.0, b)],
                colour(i as f64 / steps as f64).filled(),
            )
        }))
        .map_err(e2s)?;
    root.present().map_err(e2s)
}
