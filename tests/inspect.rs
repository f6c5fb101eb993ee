//! `csgate inspect`: a short simulated log of a machine with an outer-race defect is replayed
//! into a record; `inspect --json` must give the documented keys with figures that agree with
//! the record's own rows, `inspect --plots` must write valid PNG files, and bad input must give
//! exit code 2 with a message that says what was wrong.

use crate::util::{csgate_bin, test_dir};
use csgate::features::envelope::EnvelopeBand;
use csgate::pipeline::analytics::MachineEntry;
use csgate::pipeline::replay::{replay, ReplayOptions};
use csgate::pipeline::run::PipelineConfig;
use csgate::sim::run::{key_ring, write_log, FilePace, Simulation};
use csgate::sim::scenario::Scenario;
use csgate::store::{RecordReader, StreamKey};
use std::path::{Path, PathBuf};
use std::process::Command;

/// One invented machine with an outer-race spall, the bearing geometry of CHECK-VALUES 7
/// (Nb = 9, d = 7.94 mm, D = 39.04 mm; at 29.95 Hz BPFO = 107.36 Hz), as in tests/analytics.rs.
const SCENARIO: &str = r#"
[site]
name = "inspect test site"
seed = 7

[[node]]
id = 5
name = "test fan 5"
sample_rate_hz = 25600.0
window_len = 4096
hop_len = 2048
ratio = 0.25
index_encoding = "seed"
value_encoding = "f32"

[[node.channel]]
channel = 0
kind = "vibration"
units = "m/s^2"
full_scale = 100.0
noise_rms = 0.01

[node.machine]
shaft_rpm = 1797.0
harmonics = [{ order = 1, amplitude = 0.7 }, { order = 2, amplitude = 0.25, phase_deg = 110.0 }]
broadband_rms = 0.05

[node.machine.bearing]
rolling_elements = 9
element_diameter_mm = 7.94
pitch_diameter_mm = 39.04

[node.machine.bearing.defect]
kind = "outer_race"
amplitude = 6.0
resonance_hz = 3400.0
decay_ms = 0.6
"#;

/// A record of 2.5 s (two complete 1 s analysis blocks) with trust figures and analytics.
fn make_record(dir: &Path) -> PathBuf {
    let sc_path = dir.join("site.toml");
    std::fs::write(&sc_path, SCENARIO).unwrap();
    let sc = Scenario::load(&sc_path).unwrap();
    let log = dir.join("site.cslog");
    write_log(
        Simulation::new(&sc, 2.5, false),
        &sc,
        &log,
        FilePace::Fast,
        |_| Ok(()),
    )
    .unwrap();
    let mut pipeline = PipelineConfig::default();
    // The resonance band, as in tests/analytics.rs (the automatic band is discussed there).
    pipeline.analytics.features.envelope.band = EnvelopeBand::Fixed {
        low_hz: 2800.0,
        high_hz: 4800.0,
    };
    pipeline.analytics.machines = sc
        .machine_kinematics()
        .into_iter()
        .map(|(node, machine)| MachineEntry {
            node,
            channel: None,
            machine,
        })
        .collect();
    let out = dir.join("record.h5");
    replay(
        &ReplayOptions {
            logs: vec![log],
            out: out.clone(),
            pipeline,
            limits: Default::default(),
            keys: key_ring(&sc),
            deflate: None,
            config_digest: String::new(),
            events: None,
        },
        |_, _| {},
    )
    .unwrap();
    out
}

/// Checks the PNG signature and the IHDR chunk: "PNG (Portable Network Graphics)
/// Specification", W3C / ISO/IEC 15948: the 8-byte signature 137 80 78 71 13 10 26 10 (section
/// 5.2); the first chunk is IHDR (5.6), length 13, with width and height as big-endian 4-byte
/// integers, both non-zero (11.2.2). Returns (width, height).
fn check_png(path: &Path) -> (u32, u32) {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    assert!(bytes.len() > 33, "{}: too short for a PNG", path.display());
    assert_eq!(
        &bytes[..8],
        &[137, 80, 78, 71, 13, 10, 26, 10],
        "{}: PNG signature",
        path.display()
    );
    assert_eq!(&bytes[8..12], &13u32.to_be_bytes(), "IHDR length");
    assert_eq!(&bytes[12..16], b"IHDR", "{}: first chunk", path.display());
    let w = u32::from_be_bytes(bytes[16..20].try_into().unwrap());
    let h = u32::from_be_bytes(bytes[20..24].try_into().unwrap());
    assert!(w > 0 && h > 0, "{}: {w} x {h}", path.display());
    // IEND closes every PNG (section 11.2.5).
    assert_eq!(&bytes[bytes.len() - 8..bytes.len() - 4], b"IEND");
    (w, h)
}

fn inspect(args: &[&std::ffi::OsStr]) -> std::process::Output {
    Command::new(csgate_bin())
        .arg("inspect")
        .args(args)
        .output()
        .expect("run csgate inspect")
}

#[test]
fn json_summary_and_plots_of_a_record() {
    let dir = test_dir();
    let record = make_record(dir.path());
    let plots = dir.path().join("plots");
    let out = inspect(&[
        record.as_os_str(),
        "--json".as_ref(),
        "--plots".as_ref(),
        plots.as_os_str(),
    ]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "inspect failed: {stderr}");
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("one JSON document");

    for k in [
        "file",
        "layout_version",
        "tool_version",
        "created",
        "closed_cleanly",
        "streams",
        "plots",
        "caution",
    ] {
        assert!(doc.get(k).is_some(), "top-level key {k} missing: {doc}");
    }
    assert_eq!(doc["caution"], csgate::features::CAUTION);
    assert_eq!(doc["closed_cleanly"], true);
    let streams = doc["streams"].as_array().unwrap();
    assert_eq!(streams.len(), 1);
    let st = &streams[0];
    for k in [
        "node",
        "channel",
        "units",
        "basis",
        "sample_rate_hz",
        "start_time",
        "samples",
        "duration_s",
        "segments",
        "gaps",
        "gap_samples",
        "windows",
        "severity",
        "top_peaks",
    ] {
        assert!(st.get(k).is_some(), "stream key {k} missing: {st}");
    }
    for k in [
        "count",
        "assessed",
        "trust_ok",
        "trust_low",
        "mean_cv_error",
        "worst_cv_error",
        "worst_cv_error_seq",
        "mean_residual",
        "mean_m",
        "n",
    ] {
        assert!(st["windows"].get(k).is_some(), "windows.{k} missing");
    }
    for k in [
        "blocks",
        "blocks_per_zone",
        "worst_zone",
        "last_zone",
        "max_velocity_rms_mm_s",
        "max_rms",
        "low_trust_blocks",
    ] {
        assert!(st["severity"].get(k).is_some(), "severity.{k} missing");
    }

    // The figures agree with the record's rows, read through the library's reader.
    let key = StreamKey::new(5, 0);
    let rec = RecordReader::open(&record).unwrap();
    let windows = rec.windows(key).unwrap();
    let samples = rec.sample_count(key).unwrap();
    assert_eq!(st["node"], 5);
    assert_eq!(st["units"], "m/s^2");
    assert_eq!(st["samples"], samples);
    // No gap and one segment: duration = samples / rate.
    let duration = st["duration_s"].as_f64().unwrap();
    assert!(
        (duration - samples as f64 / 25600.0).abs() < 1e-6,
        "{duration}"
    );
    assert_eq!(st["windows"]["count"], windows.len());
    let worst = windows
        .iter()
        .map(|w| w.cv_error)
        .filter(|v| v.is_finite())
        .fold(f64::NEG_INFINITY, f64::max);
    assert!(worst.is_finite(), "trust figures were computed");
    assert_eq!(st["windows"]["worst_cv_error"].as_f64().unwrap(), worst);
    let ind = rec.indicators(key).unwrap();
    assert_eq!(ind.len(), 2, "two complete 1 s blocks in 2.5 s");
    assert_eq!(st["severity"]["blocks"], 2);
    let worst_zone = ind.iter().map(|r| r.zone).max().unwrap();
    assert_eq!(
        st["severity"]["worst_zone"],
        csgate::inspect::zone_name(worst_zone)
    );
    // The outer-race defect shows in the envelope spectrum (tests/analytics.rs checks the
    // labelling itself; here only that the summary carries it).
    let peaks = st["top_peaks"].as_array().unwrap();
    assert!(
        peaks
            .iter()
            .any(|p| p["source"] == "envelope" && p["label"] == "BPFO"),
        "BPFO among the top envelope peaks: {peaks:?}"
    );

    // Plots: every file listed exists and is a valid PNG; each kind is there.
    let listed: Vec<PathBuf> = doc["plots"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| PathBuf::from(p.as_str().unwrap()))
        .collect();
    for kind in ["time", "spectrum", "envelope", "spectrogram", "trust"] {
        let path = plots.join(format!("node5-ch0-{kind}.png"));
        assert!(listed.contains(&path), "{} not listed", path.display());
    }
    for path in &listed {
        let (w, h) = check_png(path);
        assert!(w >= 640 && h >= 400, "{}: {w} x {h}", path.display());
    }

    // The table form carries the caution too.
    let out = inspect(&[record.as_os_str()]);
    assert!(out.status.success());
    let table = String::from_utf8_lossy(&out.stdout);
    assert!(table.contains("stream node 5 channel 0"), "{table}");
    assert!(table.contains(csgate::features::CAUTION));
}

#[test]
fn bad_input_exits_2_with_a_message() {
    let dir = test_dir();
    let missing = dir.path().join("nothing-here.h5");
    let text = dir.path().join("notes.h5");
    std::fs::write(&text, "these are not HDF5 bytes\n".repeat(100)).unwrap();
    let other = dir.path().join("other.h5");
    hdf5::File::create(&other)
        .unwrap()
        .new_dataset::<f64>()
        .shape(4)
        .create("x")
        .unwrap();
    let folder = dir.path().to_path_buf();
    for (path, expected) in [
        (&missing, "no such file"),
        (&folder, "is a folder"),
        (&text, "not an HDF5 file"),
        (&other, "not a csgate record"),
    ] {
        for json in [false, true] {
            let mut args = vec![path.as_os_str()];
            if json {
                args.push("--json".as_ref());
            }
            let out = inspect(&args);
            let stderr = String::from_utf8_lossy(&out.stderr);
            assert_eq!(out.status.code(), Some(2), "{}: {stderr}", path.display());
            assert!(
                stderr.contains(expected) && stderr.contains(&*path.to_string_lossy()),
                "{}: {stderr}",
                path.display()
            );
            assert!(!stderr.contains("panicked"), "{stderr}");
            assert!(out.stdout.is_empty(), "nothing on stdout on error");
        }
    }
}
