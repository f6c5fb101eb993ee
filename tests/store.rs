//! Integration tests: the HDF5 record store (layout round trip, gaps and segments, the writer
//! thread with rotation and the index, and a SIGKILL of a writing process).
#![cfg(feature = "hdf5-store")]

use crate::util::test_dir;
use csgate::store::layout::{self, stop_reason};
use csgate::store::{
    GapReason, GapRow, IndicatorRow, PeakRow, RecordIndex, RecordMsg, RecordReader, RecordSink,
    RecordWriter, SegmentRow, SinkConfig, StoreError, StreamKey, StreamMeta, WindowRow,
    WriterOptions,
};
use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

/// 2026-12-01T12:00:00Z in Unix nanoseconds (`date -u -d 2026-12-01T12:00:00Z +%s`).
const T0: i64 = 1_796_126_400_000_000_000;

fn meta(node: u32, channel: u16) -> StreamMeta {
    StreamMeta {
        node,
        channel,
        sample_rate_hz: 25_600.0,
        start_time_unix_ns: T0,
        capture_id: 7,
        units: "m/s^2".into(),
        basis: "dct".into(),
    }
}

/// Values exactly representable in f32, so every comparison can be exact.
fn pattern(i: u64) -> f32 {
    (i % 1000) as f32 * 0.25 - 100.0
}

fn window_row(seq: u64, start: u64) -> WindowRow {
    WindowRow {
        seq,
        capture_id: 7,
        start_sample: start,
        t0_unix_ns: T0,
        m: 256,
        n: 1024,
        lambda: 0.01,
        iterations: 120,
        duality_gap: 1e-4,
        residual: 0.02,
        support: 40,
        stop_reason: stop_reason::DUALITY_GAP,
        solve_time_us: 850.0,
        cv_error: f64::NAN,
        trust: layout::trust::UNKNOWN,
    }
}

#[test]
fn writer_round_trips_every_table_and_attribute() {
    let dir = test_dir();
    let path = dir.path().join("r.h5");
    let key = StreamKey::new(3, 1);
    let other = StreamKey::new(12, 0);
    let mut w = RecordWriter::create(
        &path,
        &[meta(3, 1), meta(12, 0)],
        &WriterOptions {
            deflate: Some(4),
            chunk_len: 1000,
            ..WriterOptions::default()
        },
        "abc123",
    )
    .unwrap();
    let samples: Vec<f32> = (0..2500).map(pattern).collect();
    w.append_samples(key, 0, &samples[..1200]).unwrap();
    w.append_samples(key, 1200, &samples[1200..]).unwrap();
    w.append_window(key, window_row(1, 0)).unwrap();
    let label = PeakRow::label_from_str("GMF+1").unwrap();
    let peak = PeakRow {
        t_unix_ns: T0,
        freq_hz: 123.5,
        amplitude: 0.7,
        prominence_db: 12.0,
        label,
        order: 1,
        source: layout::peak_source::ENVELOPE,
    };
    w.append_peak(key, peak).unwrap();
    let ind = IndicatorRow {
        t_unix_ns: T0,
        start_sample: 0,
        len: 2500,
        rms: 1.0,
        peak: 3.0,
        crest: 3.0,
        kurtosis: 3.1,
        velocity_rms_mm_s: 2.2,
        zone: layout::zone::B,
        low_trust: 0,
    };
    w.append_indicator(key, ind).unwrap();
    w.flush().unwrap();
    assert!(PeakRow::label_from_str("seventeen-bytes!!").is_none());
    w.close(layout::close_reason::SHUTDOWN).unwrap();

    let r = RecordReader::open(&path).unwrap();
    let attrs = r.attrs().unwrap();
    assert_eq!(attrs.layout_version, 1);
    assert_eq!(attrs.tool_version, csgate::VERSION);
    assert_eq!(attrs.config_digest, "abc123");
    assert!(attrs.created.ends_with('Z') && attrs.created.len() == 27);
    assert_eq!(r.streams().unwrap(), vec![key, other]);
    assert_eq!(r.stream_meta(key).unwrap(), meta(3, 1));
    assert_eq!(
        r.start_time_iso(key).unwrap(),
        "2026-12-01T12:00:00.000000Z"
    );
    assert_eq!(r.samples(key).unwrap(), samples);
    assert_eq!(
        r.samples_range(key, 1190, 20).unwrap(),
        &samples[1190..1210]
    );
    assert!(r.samples(other).unwrap().is_empty());
    let windows = r.windows(key).unwrap();
    assert_eq!(windows.len(), 1);
    assert!(windows[0].cv_error.is_nan());
    assert_eq!(windows[0].support, 40);
    assert_eq!(r.peaks(key).unwrap(), vec![peak]);
    assert_eq!(r.indicators(key).unwrap(), vec![ind]);
    assert!(r.gaps(key).unwrap().is_empty());
    assert_eq!(
        r.segments(key).unwrap(),
        vec![SegmentRow {
            start_sample: 0,
            capture_id: 7,
            t0_unix_ns: T0
        }]
    );
    assert_eq!(r.closed().unwrap().len(), 1);
    // 25.6 kHz: sample 256 is 10 ms after the start.
    assert_eq!(r.time_of_index(key, 256).unwrap(), T0 + 10_000_000);
}

#[test]
fn an_existing_record_is_never_overwritten() {
    let dir = test_dir();
    let path = dir.path().join("r.h5");
    std::fs::write(&path, b"keep me").unwrap();
    let err = RecordWriter::create(&path, &[meta(1, 0)], &WriterOptions::default(), "")
        .err()
        .unwrap();
    assert!(matches!(err, StoreError::Exists(_)), "{err}");
    assert_eq!(std::fs::read(&path).unwrap(), b"keep me");
}

#[test]
fn gaps_are_nan_with_a_row_and_long_gaps_start_a_segment() {
    let dir = test_dir();
    let path = dir.path().join("g.h5");
    let key = StreamKey::new(1, 0);
    let opts = WriterOptions {
        max_nan_fill: 100,
        ..WriterOptions::default()
    };
    let mut w = RecordWriter::create(&path, &[meta(1, 0)], &opts, "").unwrap();
    w.append_samples(key, 0, &[1.0; 10]).unwrap();
    w.append_gap(key, 10, 5, GapReason::WindowMissing).unwrap();
    w.append_samples(key, 15, &[2.0; 10]).unwrap();
    // A hole nobody explained: NaN-filled with reason Unspecified.
    w.append_samples(key, 30, &[3.0; 10]).unwrap();
    // 1000 missing samples > max_nan_fill: a new segment, no NaN.
    w.append_gap(key, 40, 1000, GapReason::Late).unwrap();
    w.append_samples(key, 1040, &[4.0; 10]).unwrap();
    // A window of the new stretch is stored at its index into samples.
    w.append_window(key, window_row(9, 1040)).unwrap();
    // Capture restart: grid position 0 of capture 8 follows at the end.
    w.begin_segment(key, 8, T0 + 5_000_000_000).unwrap();
    w.append_samples(key, 0, &[5.0; 10]).unwrap();
    assert!(matches!(
        w.append_samples(key, 5, &[0.0; 2]),
        Err(StoreError::Overlap { .. })
    ));
    w.close(layout::close_reason::SHUTDOWN).unwrap();

    let r = RecordReader::open(&path).unwrap();
    let s = r.samples(key).unwrap();
    assert_eq!(s.len(), 60);
    assert!(s[10..15].iter().all(|v| v.is_nan()));
    assert!(s[25..30].iter().all(|v| v.is_nan()));
    assert!(s[40..50].iter().all(|&v| v == 4.0));
    assert!(s[50..60].iter().all(|&v| v == 5.0));
    assert_eq!(s.iter().filter(|v| v.is_nan()).count(), 10);
    assert_eq!(
        r.gaps(key).unwrap(),
        vec![
            GapRow {
                start_sample: 10,
                length: 5,
                reason: GapReason::WindowMissing.code()
            },
            GapRow {
                start_sample: 25,
                length: 5,
                reason: GapReason::Unspecified.code()
            },
        ]
    );
    let seg = r.segments(key).unwrap();
    // 1040 samples after T0 at 25.6 kHz = 40.625 ms.
    assert_eq!(
        seg,
        vec![
            SegmentRow {
                start_sample: 0,
                capture_id: 7,
                t0_unix_ns: T0
            },
            SegmentRow {
                start_sample: 40,
                capture_id: 7,
                t0_unix_ns: T0 + 40_625_000
            },
            SegmentRow {
                start_sample: 50,
                capture_id: 8,
                t0_unix_ns: T0 + 5_000_000_000
            },
        ]
    );
    assert_eq!(r.windows(key).unwrap()[0].start_sample, 40);
    assert_eq!(r.time_of_index(key, 41).unwrap(), T0 + 40_625_000 + 39_063);
    assert_eq!(
        r.time_of_index(key, 52).unwrap(),
        T0 + 5_000_000_000 + 78_125
    );
}

fn wait_join(
    h: std::thread::JoinHandle<Result<csgate::store::SinkStats, StoreError>>,
) -> csgate::store::SinkStats {
    h.join().expect("writer thread panicked").unwrap()
}

#[test]
fn sink_rotates_for_a_late_stream_and_keeps_the_index() {
    let dir = test_dir();
    let folder = dir.path().join("rec");
    let mut config = SinkConfig::new(&folder);
    config.config_digest = "d1".into();
    config.flush_interval = Duration::from_millis(50);
    let a = StreamKey::new(1, 0);
    let b = StreamKey::new(2, 3);
    let (sink, handle) = RecordSink::spawn(config.clone());
    sink.send(RecordMsg::OpenStream(meta(1, 0))).unwrap();
    let block = |start: u64, len: u64| RecordMsg::Samples {
        stream: a,
        start,
        samples: (start..start + len).map(pattern).collect(),
    };
    sink.send(block(0, 1000)).unwrap();
    sink.send(RecordMsg::OpenStream(meta(2, 3))).unwrap();
    sink.send(block(1000, 500)).unwrap();
    sink.send(RecordMsg::Samples {
        stream: b,
        start: 0,
        samples: vec![1.5; 10],
    })
    .unwrap();
    sink.send(RecordMsg::Window {
        stream: a,
        row: window_row(1, 900),
        effective_support: None,
    })
    .unwrap();
    sink.send(RecordMsg::Shutdown).unwrap();
    let stats = wait_join(handle);
    assert_eq!(stats.files, 2);
    assert_eq!(stats.samples_written, 1510);
    assert_eq!(stats.errors, 0);

    let index = RecordIndex::load(&folder).unwrap();
    assert_eq!(index.files.len(), 2);
    let (f1, f2) = (&index.files[0], &index.files[1]);
    assert_eq!((f1.seq, f2.seq), (1, 2));
    assert_eq!(f1.close_reason.as_deref(), Some("rotated"));
    assert_eq!(f2.close_reason.as_deref(), Some("shutdown"));
    assert_eq!(f1.streams.len(), 1);
    assert_eq!(f1.streams[0].samples, 1000);
    assert_eq!(f2.streams.len(), 2);
    assert_eq!(f2.streams[0].samples, 500);
    // The second file continues stream a's grid where the first ended.
    assert_eq!(
        f2.streams[0].start_time_unix_ns,
        f1.streams[0].end_time_unix_ns
    );
    assert!(f1.file.starts_with("rec-") && f1.file.ends_with("-0001.h5"));

    let r2 = RecordReader::open(&folder.join(&f2.file)).unwrap();
    let s = r2.samples(a).unwrap();
    assert_eq!(s, (1000..1500).map(pattern).collect::<Vec<_>>());
    // The window started at grid position 900, before this file's first sample: index 0.
    assert_eq!(r2.windows(a).unwrap()[0].start_sample, 0);
    assert_eq!(r2.samples(b).unwrap(), vec![1.5; 10]);
    drop(r2);

    // A restart continues the series and overwrites nothing.
    let (sink, handle) = RecordSink::spawn(config);
    sink.send(RecordMsg::OpenStream(meta(1, 0))).unwrap();
    sink.send(block(0, 10)).unwrap();
    drop(sink);
    assert_eq!(wait_join(handle).files, 1);
    let index = RecordIndex::load(&folder).unwrap();
    assert_eq!(index.files.len(), 3);
    assert_eq!(index.files[2].seq, 3);
    assert_eq!(
        RecordReader::open(&folder.join(&index.files[0].file))
            .unwrap()
            .sample_count(a)
            .unwrap(),
        1000
    );
}

#[test]
fn sink_reports_a_write_error_instead_of_panicking() {
    let dir = test_dir();
    let (sink, handle) = RecordSink::spawn(SinkConfig::new(dir.path()));
    let key = StreamKey::new(1, 0);
    sink.send(RecordMsg::OpenStream(meta(1, 0))).unwrap();
    sink.send(RecordMsg::Samples {
        stream: key,
        start: 10,
        samples: vec![1.0; 10],
    })
    .unwrap();
    // Overlapping what is written is refused; the thread ends with that error.
    let _ = sink.send(RecordMsg::Samples {
        stream: key,
        start: 0,
        samples: vec![1.0; 10],
    });
    let err = handle.join().expect("no panic").unwrap_err();
    assert!(matches!(err, StoreError::Overlap { .. }), "{err}");
    assert!(matches!(
        sink.send(RecordMsg::Flush),
        Err(StoreError::SinkStopped)
    ));
}

const CRASH_ENV: &str = "CSGATE_STORE_CRASH_FILE";
const CRASH_BLOCK: u64 = 4096;

/// Child side of `sigkill_leaves_a_readable_record`: writes blocks and window rows forever,
/// flushing after every block and reporting each flush on stdout. Does nothing unless the
/// parent set the environment variable.
#[test]
#[ignore = "run only as the child of sigkill_leaves_a_readable_record"]
fn crash_child_writer() {
    let Some(path) = std::env::var_os(CRASH_ENV) else {
        return;
    };
    let key = StreamKey::new(5, 2);
    let mut w = RecordWriter::create(
        Path::new(&path),
        &[meta(5, 2)],
        &WriterOptions {
            chunk_len: 8192,
            ..WriterOptions::default()
        },
        "crash",
    )
    .unwrap();
    for seq in 0u64.. {
        let start = seq * CRASH_BLOCK;
        let block: Vec<f32> = (start..start + CRASH_BLOCK).map(pattern).collect();
        w.append_samples(key, start, &block).unwrap();
        w.append_window(key, window_row(seq, start)).unwrap();
        w.flush().unwrap();
        println!("flushed {}", seq + 1);
    }
}

#[test]
fn sigkill_leaves_a_readable_record() {
    let dir = test_dir();
    let path = dir.path().join("crash.h5");
    let mut child = Command::new(std::env::current_exe().unwrap())
        .args([
            "store::crash_child_writer",
            "--exact",
            "--ignored",
            "--nocapture",
            "--test-threads=1",
        ])
        .env(CRASH_ENV, &path)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let stdout = child.stdout.take().unwrap();
    let mut flushed = 0u64;
    // The kill lands at a varying point: after a number of flushes that depends on the
    // process id, while the child is in the middle of its next append.
    let target = 5 + u64::from(std::process::id() % 17);
    for line in BufReader::new(stdout).lines() {
        let line = line.unwrap();
        if let Some(n) = line.strip_prefix("flushed ") {
            flushed = n.parse().unwrap();
            if flushed >= target {
                break;
            }
        }
    }
    child.kill().unwrap(); // SIGKILL on Unix
    child.wait().unwrap();
    assert!(
        flushed >= target,
        "child stopped early after {flushed} flushes"
    );

    // SWMR read needs no repair after the kill.
    let key = StreamKey::new(5, 2);
    let r = RecordReader::open(&path).unwrap();
    let windows = r.windows(key).unwrap();
    assert!(windows.len() as u64 >= flushed);
    for (i, row) in windows.iter().enumerate() {
        assert_eq!(row.seq, i as u64);
    }
    let samples = r.samples(key).unwrap();
    assert!(samples.len() as u64 >= flushed * CRASH_BLOCK);
    for (i, &v) in samples.iter().enumerate() {
        assert_eq!(v, pattern(i as u64), "sample {i}");
    }
    assert!(
        r.closed().unwrap().is_empty(),
        "no clean close was recorded"
    );
    drop(r);

    // Opening for write again needs the SWMR status flag cleared, as HDF5 documents.
    if Command::new("h5clear").arg("--version").output().is_ok() {
        let status = Command::new("h5clear")
            .args(["-s", "--increment"])
            .arg(&path)
            .status()
            .unwrap();
        assert!(status.success());
        let r = RecordReader::open(&path).unwrap();
        assert!(r.windows(key).unwrap().len() as u64 >= flushed);
    }
}
