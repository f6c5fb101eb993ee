//! Writes small record files for the Python layout checks (`tests/python/test_record_layout.py`).
//!
//! ```text
//! record_fixture layout <file.h5>   a fixed record: two streams, every table non-empty
//! record_fixture crash <file.h5>    writes and flushes forever, printing "flushed <n>" after
//!                                   each flush, until it is killed
//! ```
//!
//! Sample values are `(i % 1000) * 0.25 - 100`, exact in f32, so readers can compare exactly.

use csgate::store::layout::{close_reason, peak_source, stop_reason, trust, zone};
use csgate::store::{
    GapReason, IndicatorRow, PeakRow, RecordWriter, StreamKey, StreamMeta, WindowRow, WriterOptions,
};
use std::path::Path;
use std::process::ExitCode;

/// 2026-12-01T12:00:00Z in Unix nanoseconds.
const T0: i64 = 1_796_126_400_000_000_000;

fn pattern(i: u64) -> f32 {
    (i % 1000) as f32 * 0.25 - 100.0
}

fn meta(node: u32, channel: u16, basis: &str) -> StreamMeta {
    StreamMeta {
        node,
        channel,
        sample_rate_hz: 25_600.0,
        start_time_unix_ns: T0,
        capture_id: 7,
        units: "m/s^2".into(),
        basis: basis.into(),
    }
}

fn window(seq: u64, start: u64) -> WindowRow {
    WindowRow {
        seq,
        capture_id: 7,
        start_sample: start,
        t0_unix_ns: T0 + (start as i64 * 1_000_000_000) / 25_600,
        m: 256,
        n: 1024,
        lambda: 0.01,
        iterations: 100 + seq as u32,
        duality_gap: 1e-4,
        residual: 0.02,
        support: 40,
        stop_reason: stop_reason::DUALITY_GAP,
        solve_time_us: 850.0,
        cv_error: f64::NAN,
        trust: trust::UNKNOWN,
    }
}

fn write_layout(path: &Path) -> Result<(), csgate::store::StoreError> {
    let a = StreamKey::new(3, 1);
    let b = StreamKey::new(12, 0);
    let options = WriterOptions {
        deflate: Some(4),
        ..WriterOptions::default()
    };
    let mut w = RecordWriter::create(
        path,
        &[meta(3, 1, "dct"), meta(12, 0, "truth")],
        &options,
        "0123abcd",
    )?;
    // Stream a: samples 0..1000, a gap 1000..1100, samples 1100..3000, then capture 8
    // restarts and adds 500 samples (indices 3000..3500, grid positions 0..500).
    let block = |r: std::ops::Range<u64>| r.map(pattern).collect::<Vec<f32>>();
    w.append_samples(a, 0, &block(0..1000))?;
    w.append_gap(a, 1000, 100, GapReason::WindowMissing)?;
    w.append_samples(a, 1100, &block(1100..3000))?;
    for (seq, start) in [(0, 0), (1, 512), (3, 1536)] {
        w.append_window(a, window(seq, start))?;
    }
    w.begin_segment(a, 8, T0 + 10_000_000_000)?;
    w.append_samples(a, 0, &block(3000..3500))?;
    w.append_peak(
        a,
        PeakRow {
            t_unix_ns: T0,
            freq_hz: 157.25,
            amplitude: 0.5,
            prominence_db: 18.0,
            label: PeakRow::label_from_str("BPFO").expect("ascii label"),
            order: 1,
            source: peak_source::ENVELOPE,
        },
    )?;
    w.append_indicator(
        a,
        IndicatorRow {
            t_unix_ns: T0,
            start_sample: 0,
            len: 1000,
            rms: 1.25,
            peak: 4.0,
            crest: 3.2,
            kurtosis: 3.0,
            velocity_rms_mm_s: 2.5,
            zone: zone::B,
            low_trust: 0,
        },
    )?;
    // Stream b: ground truth, samples only.
    w.append_samples(b, 0, &block(0..2000))?;
    w.close(close_reason::SHUTDOWN)
}

fn write_forever(path: &Path) -> Result<(), csgate::store::StoreError> {
    let key = StreamKey::new(5, 2);
    let mut w = RecordWriter::create(
        path,
        &[meta(5, 2, "dct")],
        &WriterOptions {
            chunk_len: 8192,
            ..WriterOptions::default()
        },
        "crash",
    )?;
    const BLOCK: u64 = 4096;
    for seq in 0u64.. {
        let start = seq * BLOCK;
        let block: Vec<f32> = (start..start + BLOCK).map(pattern).collect();
        w.append_samples(key, start, &block)?;
        w.append_window(key, window(seq, start))?;
        w.flush()?;
        println!("flushed {}", seq + 1);
    }
    unreachable!("the loop above runs until the process is killed")
}

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().collect();
    let result = match (args.get(1).map(String::as_str), args.get(2)) {
        (Some("layout"), Some(path)) => write_layout(Path::new(path)),
        (Some("crash"), Some(path)) => write_forever(Path::new(path)),
        _ => {
            eprintln!("usage: record_fixture layout|crash <file.h5>");
            return ExitCode::from(2);
        }
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            eprintln!("record_fixture: {err}");
            ExitCode::FAILURE
        }
    }
}
