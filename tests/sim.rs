//! Integration tests of the node simulator: fault frequencies against a worked example, the
//! periodicity of simulated defect impacts, `csgate simulate` to a packet log read back with
//! the wire reader, the truth file read back with the store reader, the TCP output through
//! the fault-injecting sender, and scenario errors.

use crate::util::{csgate_bin, test_dir};
use csgate::packet::log::LogReader;
use csgate::packet::{indices, Frame, IndexCoding, Limits, Packet, StreamId};
use csgate::sim::machine::{BearingGeometry, MachineSpec, MachineSynth};
use csgate::sim::run::{covered_len, key_ring, window_count};
use csgate::sim::{Scenario, ScenarioError, Simulation};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

fn demo_scenario_path() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("configs/demo-site.toml")
}

fn demo_scenario() -> Scenario {
    Scenario::load(&demo_scenario_path()).expect("demo scenario loads")
}

/// Invented generic geometry (Nb = 9, d = 7.94 mm, D = 39.04 mm). Expected values worked out
/// from the formulas of R. B. Randall, "Vibration-based Condition Monitoring", Wiley 2011, and
/// Randall & Antoni, "Rolling element bearing diagnostics: a tutorial", MSSP 2011 (from
/// memory), at fr = 29.95 Hz.
#[test]
fn bearing_fault_frequencies_match_worked_example() {
    let mut g = BearingGeometry {
        rolling_elements: 9,
        element_diameter_mm: 7.94,
        pitch_diameter_mm: 39.04,
        contact_angle_deg: 0.0,
    };
    let f = g.fault_frequencies(29.95);
    let close = |a: f64, b: f64| (a - b).abs() < 1e-6;
    assert!(close(f.bpfo_hz, 107.364306), "BPFO {}", f.bpfo_hz);
    assert!(close(f.bpfi_hz, 162.185694), "BPFI {}", f.bpfi_hz);
    assert!(close(f.bsf_hz, 70.584594), "BSF {}", f.bsf_hz);
    assert!(
        close(2.0 * f.bsf_hz, 141.169188),
        "2 BSF {}",
        2.0 * f.bsf_hz
    );
    assert!(close(f.ftf_hz, 11.929367), "FTF {}", f.ftf_hz);
    // Identities of the same formulas: BPFO + BPFI = Nb fr, FTF = BPFO / Nb.
    assert!(close(f.bpfo_hz + f.bpfi_hz, 269.55));
    assert!(close(f.ftf_hz, f.bpfo_hz / 9.0));
    g.contact_angle_deg = 15.0;
    let f = g.fault_frequencies(29.95);
    assert!(close(f.bpfo_hz, 108.298303), "BPFO at 15 deg {}", f.bpfo_hz);
    assert!(close(f.bpfi_hz, 161.251697), "BPFI at 15 deg {}", f.bpfi_hz);
    assert!(close(f.bsf_hz, 70.788613), "BSF at 15 deg {}", f.bsf_hz);
    assert!(close(f.ftf_hz, 12.033145), "FTF at 15 deg {}", f.ftf_hz);
}

fn node_machine(scenario: &Scenario, id: u32) -> MachineSpec {
    scenario
        .nodes
        .iter()
        .find(|n| n.id == id)
        .expect("node in demo scenario")
        .machine
        .clone()
}

/// Impact times of `seconds` of a machine, read off the synthesizer as they start.
fn impact_times(spec: &MachineSpec, fs: f64, seconds: f64) -> Vec<f64> {
    let mut m = MachineSynth::new(spec, fs, 11);
    let mut times: Vec<f64> = Vec::new();
    for _ in 0..(seconds * fs) as usize {
        m.next_sample();
        if let Some(i) = m.last_impact() {
            if times.last() != Some(&i.t_s) {
                times.push(i.t_s);
            }
        }
    }
    times
}

#[test]
fn outer_race_impacts_come_at_bpfo_within_jitter() {
    let scenario = demo_scenario();
    let spec = node_machine(&scenario, 102);
    let bearing = spec.bearing.expect("bearing");
    let defect = bearing.defect.expect("defect");
    let shaft = spec.nominal_shaft_hz();
    let bpfo = bearing.geometry().fault_frequencies(shaft).bpfo_hz;
    let times = impact_times(&spec, 25_600.0, 5.0);
    let gaps: Vec<f64> = times.windows(2).map(|w| w[1] - w[0]).collect();
    assert!(gaps.len() > 500, "{} impacts in 5 s", times.len());
    // Each spacing is 1/BPFO at the instantaneous speed, times (1 +/- jitter); the speed is
    // within +/- speed_wander of nominal.
    let slack = (1.0 + defect.jitter) * (1.0 + spec.speed_wander) + 1e-9;
    for &g in &gaps {
        let r = g * bpfo;
        assert!(r < slack && r > 1.0 / slack, "spacing {g} s is {r} periods");
    }
    let mean = gaps.iter().sum::<f64>() / gaps.len() as f64;
    assert!(
        (mean * bpfo - 1.0).abs() < spec.speed_wander + 0.002,
        "mean spacing {mean} s vs 1/BPFO {}",
        1.0 / bpfo
    );
    // The spacing really varies (slip), by about the configured jitter: a uniform draw in
    // +/-j has standard deviation j/sqrt(3).
    let sd = (gaps
        .iter()
        .map(|g| (g * bpfo - mean * bpfo).powi(2))
        .sum::<f64>()
        / gaps.len() as f64)
        .sqrt();
    let expected = defect.jitter / 3f64.sqrt();
    assert!(
        sd > 0.5 * expected && sd < 2.0 * expected,
        "sd {sd}, expected about {expected}"
    );

    // The healthy pump's bearing never strikes.
    assert!(impact_times(&node_machine(&scenario, 101), 25_600.0, 2.0).is_empty());
}

/// Magnitude of the Hann-windowed DFT of `x` at `freq_hz` (Goertzel-style direct sum).
fn tone_magnitude(x: &[f64], fs: f64, freq_hz: f64) -> f64 {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let (mut re, mut im) = (0.0, 0.0);
    for (k, &v) in x.iter().enumerate() {
        let w = 0.5 - 0.5 * (std::f64::consts::TAU * k as f64 / n).cos();
        let ph = std::f64::consts::TAU * freq_hz * k as f64 / fs;
        re += w * (v - mean) * ph.cos();
        im += w * (v - mean) * ph.sin();
    }
    (re * re + im * im).sqrt()
}

/// Envelope (squared signal) spectrum at BPFO against its neighbourhood, for node `id` of the
/// demo site with the speed wander turned off so the line stays in one bin.
fn envelope_line_ratio(id: u32) -> f64 {
    let mut scenario = demo_scenario();
    let node = scenario.nodes.iter_mut().find(|n| n.id == id).unwrap();
    node.machine.speed_wander = 0.0;
    let fs = node.sample_rate_hz;
    let shaft = node.machine.nominal_shaft_hz();
    let bpfo = node
        .machine
        .bearing
        .unwrap()
        .geometry()
        .fault_frequencies(shaft)
        .bpfo_hz;
    let mut m = MachineSynth::new(&node.machine, fs, 5);
    let mix = node.channels[0].mix;
    let x: Vec<f64> = (0..(2.0 * fs) as usize)
        .map(|_| mix.truth(&m.next_sample()).powi(2))
        .collect();
    let line = tone_magnitude(&x, fs, bpfo);
    // Reference: the envelope spectrum between the shaft harmonics around BPFO.
    let offs = [-9.0, -6.5, -4.0, 4.0, 6.5, 9.0];
    let floor = offs
        .iter()
        .map(|d| tone_magnitude(&x, fs, bpfo + d))
        .sum::<f64>()
        / offs.len() as f64;
    line / floor
}

#[test]
fn envelope_spectrum_shows_bpfo_only_on_the_faulty_machine() {
    // Thresholds: a clear line stands an order of magnitude over its surroundings; with no
    // defect the envelope has nothing at BPFO (common practice for a detection margin).
    let faulty = envelope_line_ratio(102);
    let healthy = envelope_line_ratio(101);
    assert!(faulty > 10.0, "outer-race defect: BPFO line ratio {faulty}");
    assert!(healthy < 3.0, "healthy pump: BPFO line ratio {healthy}");
}

fn simulate(args: &[&str]) -> std::process::Output {
    Command::new(csgate_bin())
        .arg("simulate")
        .args(args)
        .output()
        .expect("run csgate simulate")
}

fn read_log(path: &Path) -> Vec<Packet> {
    let mut reader = LogReader::open(path).expect("open log");
    let mut out = Vec::new();
    while let Some(rec) = reader.next_record().expect("read record") {
        match rec.frame.parse(&Limits::default()).expect("frame parses") {
            Frame::Window(p) => out.push(p),
            other => panic!("unexpected frame {other:?}"),
        }
    }
    assert_eq!(reader.stats().garbage_regions, 0);
    assert!(reader.stats().truncated.is_none());
    out
}

#[test]
fn simulate_to_log_reads_back_and_is_deterministic() {
    let dir = test_dir();
    let log = dir.path().join("demo.cslog");
    let truth = dir.path().join("truth.h5");
    let scenario_path = demo_scenario_path();
    let scenario_arg = scenario_path.to_str().unwrap();
    let out = simulate(&[
        "--scenario",
        scenario_arg,
        "--out",
        log.to_str().unwrap(),
        "--truth",
        truth.to_str().unwrap(),
        "--duration",
        "2",
        "--quiet",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(stdout.contains("4 nodes, 6 streams"), "{stdout}");

    let scenario = demo_scenario();
    let packets = read_log(&log);
    let keys = key_ring(&scenario);
    let mut per_stream: BTreeMap<StreamId, Vec<&Packet>> = BTreeMap::new();
    for p in &packets {
        per_stream.entry(p.stream()).or_default().push(p);
    }
    assert_eq!(per_stream.len(), 6);
    for node in &scenario.nodes {
        let windows = window_count(node, 2.0);
        // 2 s at 25.6 kHz = 51200 instants: (51200 - 4096) / 2048 + 1 = 24 windows.
        assert_eq!(windows, 24);
        for ch in &node.channels {
            let stream = StreamId {
                node: node.id,
                channel: ch.channel,
            };
            let ps = &per_stream[&stream];
            assert_eq!(ps.len() as u64, windows, "{stream}");
            for (k, p) in ps.iter().enumerate() {
                assert_eq!(p.header.seq, k as u64);
                assert_eq!(p.header.window_len, 4096);
                assert_eq!(p.header.hop_len, 2048);
                assert_eq!(p.sample_count(), 1024);
                assert_eq!(p.header.units, node.units(ch));
                assert_eq!(p.is_authenticated(), node.auth_key.is_some());
                match p.index_coding {
                    IndexCoding::Seeded { seed } => {
                        assert_eq!(
                            node.index_encoding,
                            csgate::sim::scenario::IndexEncoding::Seed
                        );
                        assert_eq!(p.indices, indices::sample_indices(seed, 4096, 1024));
                    }
                    _ => assert_eq!(
                        node.index_encoding,
                        csgate::sim::scenario::IndexEncoding::List
                    ),
                }
            }
            // Windows start every hop on the node clock: t0 advances by 2048 / 25600 s.
            assert_eq!(ps[1].header.t0_us - ps[0].header.t0_us, 80_000);
        }
    }
    // Tagged frames verify with the scenario's keys.
    let mut reader = LogReader::open(&log).unwrap();
    let mut tagged = 0;
    while let Some(rec) = reader.next_record().unwrap() {
        if keys.check(rec.frame.as_bytes()).expect("tag verifies") {
            tagged += 1;
        }
    }
    assert_eq!(tagged, 24);

    // Same seed: identical bytes. Another seed: different.
    let again = dir.path().join("again.cslog");
    let other = dir.path().join("other.cslog");
    for (path, seed) in [(&again, None), (&other, Some("99"))] {
        let mut args = vec![
            "--scenario",
            scenario_arg,
            "--out",
            path.to_str().unwrap(),
            "--duration",
            "2",
            "--quiet",
        ];
        if let Some(s) = seed {
            args.extend(["--seed", s]);
        }
        let out = simulate(&args);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let bytes = std::fs::read(&log).unwrap();
    assert_eq!(bytes, std::fs::read(&again).unwrap());
    assert_ne!(bytes, std::fs::read(&other).unwrap());

    check_truth(&truth, &scenario, &packets);
}

#[cfg(feature = "hdf5-store")]
fn check_truth(path: &Path, scenario: &Scenario, packets: &[Packet]) {
    use csgate::store::{RecordReader, StreamKey};
    let reader = RecordReader::open(path).expect("open truth");
    let streams = reader.streams().unwrap();
    assert_eq!(streams.len(), 6);
    for node in &scenario.nodes {
        for ch in &node.channels {
            let key = StreamKey::new(node.id, ch.channel);
            assert!(streams.contains(&key));
            let meta = reader.stream_meta(key).unwrap();
            assert_eq!(meta.basis, "truth");
            assert_eq!(meta.sample_rate_hz, 25_600.0);
            assert_eq!(meta.start_time_unix_ns, scenario.start_time_us() * 1000);
            assert_eq!(
                reader.sample_count(key).unwrap(),
                covered_len(node, window_count(node, 2.0))
            );
        }
    }
    // The sampled values are the truth plus noise and quantization: for QP-101's
    // accelerometer the difference stays within 6 sigma of broadband plus sensor noise
    // (0.05 and 0.01 m/s^2 RMS) plus one count.
    let key = StreamKey::new(101, 0);
    let truth = reader.samples(key).unwrap();
    let node = &scenario.nodes[0];
    let sigma = (0.05f64.powi(2) + 0.01f64.powi(2)).sqrt();
    let bound = 6.0 * sigma + node.count_scale(&node.channels[0]);
    let mut n = 0;
    for p in packets.iter().filter(|p| {
        p.stream()
            == StreamId {
                node: 101,
                channel: 0,
            }
    }) {
        let start = p.header.seq as usize * 2048;
        for (&i, &v) in p.indices.iter().zip(&p.values) {
            let d = (f64::from(v) - f64::from(truth[start + i as usize])).abs();
            assert!(d < bound, "window {} index {i}: {d}", p.header.seq);
            n += 1;
        }
    }
    assert_eq!(n, 24 * 1024);
    // The truth is not trivially zero.
    let rms =
        (truth.iter().map(|&x| f64::from(x).powi(2)).sum::<f64>() / truth.len() as f64).sqrt();
    assert!(rms > 0.3, "truth rms {rms}");
}

#[cfg(not(feature = "hdf5-store"))]
fn check_truth(_: &Path, _: &Scenario, _: &[Packet]) {}

#[test]
fn simulate_windows_come_in_time_order_and_ratio_overrides() {
    let mut scenario = demo_scenario();
    scenario.override_ratio(0.125).unwrap();
    let mut sim = Simulation::new(&scenario, 1.0, false);
    let mut last = i64::MIN;
    let mut count = 0;
    while let Some(w) = sim.next_window().unwrap() {
        assert!(w.ready_us >= last);
        last = w.ready_us;
        assert!(w.packets.iter().all(|p| p.sample_count() == 512));
        count += 1;
    }
    // 1 s: (25600 - 4096) / 2048 + 1 = 11 windows per node.
    assert_eq!(count, 4 * 11);
    assert!(scenario.override_ratio(1.5).unwrap_err().contains("ratio"));
}

#[tokio::test]
async fn simulate_to_tcp_with_faults_reports_what_it_did() {
    use csgate::sim::run::{parse_faults, send_to_target};
    use csgate::sources::inject::Pace;
    use tokio::io::AsyncReadExt;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    // A minimal gateway: reads each connection to its end, counts bytes, then closes.
    let server = tokio::spawn(async move {
        let mut total = 0usize;
        let mut conns = 0usize;
        loop {
            let accept =
                tokio::time::timeout(std::time::Duration::from_secs(5), listener.accept()).await;
            let Ok(Ok((mut sock, _))) = accept else { break };
            conns += 1;
            let mut buf = Vec::new();
            let _ = sock.read_to_end(&mut buf).await;
            total += buf.len();
            if conns == 4 {
                break;
            }
        }
        (conns, total)
    });
    let mut scenario = demo_scenario();
    scenario
        .nodes
        .iter_mut()
        .for_each(|n| n.channels.truncate(1));
    let sim = Simulation::new(&scenario, 3.0, false);
    let plan = parse_faults("drop=0.1,dup=0.05", 3).unwrap();
    let summary = send_to_target(sim, &scenario, addr, &plan, Pace::AsFastAsPossible, |_| {
        Ok(())
    })
    .await
    .unwrap();
    let (conns, bytes) = server.await.unwrap();
    let faults = summary.faults.unwrap();
    // 3 s: (76800 - 4096) / 2048 + 1 = 36 windows per node, one stream each.
    assert_eq!(summary.windows, 4 * 36);
    assert_eq!(faults.frames_in, 4 * 36);
    assert_eq!(faults.delivered.len() + faults.dropped.len(), 4 * 36);
    assert!(!faults.dropped.is_empty() && faults.duplicated > 0);
    assert_eq!(conns, 4, "one connection per node");
    assert!(bytes > 0);
}

fn load_err(text: &str) -> String {
    Scenario::from_toml_str(text, Path::new("bad.toml"))
        .unwrap_err()
        .to_string()
}

const GOOD: &str = r#"
[site]
name = "Bench"

[[node]]
id = 1
sample_rate_hz = 25600.0
window_len = 4096
ratio = 0.25
index_encoding = "seed"
value_encoding = "i16"

[[node.channel]]
channel = 0
kind = "vibration"
units = "m/s^2"
full_scale = 50.0

[node.machine]
shaft_hz = 25.0
"#;

#[test]
fn scenario_errors_name_file_and_key() {
    assert!(Scenario::from_toml_str(GOOD, Path::new("good.toml")).is_ok());

    let e = load_err(&GOOD.replace("ratio = 0.25", "ratio = 0.25\nratoi = 0.3"));
    assert!(
        e.contains("bad.toml") && e.contains("unknown field `ratoi`"),
        "{e}"
    );

    let e = load_err(&GOOD.replace("ratio = 0.25\n", ""));
    assert!(e.contains("missing field `ratio`"), "{e}");

    let e = load_err(&GOOD.replace("window_len = 4096", "window_len = 8"));
    assert!(
        e.contains("node[0].window_len") && e.contains("16..=65536"),
        "{e}"
    );

    let e = load_err(&GOOD.replace("ratio = 0.25", "ratio = 1.5"));
    assert!(e.contains("node[0].ratio"), "{e}");

    let e = load_err(&GOOD.replace("index_encoding = \"seed\"", "index_encoding = \"magic\""));
    assert!(e.contains("magic") && e.contains("seed"), "{e}");

    let e = load_err(&GOOD.replace("shaft_hz = 25.0", "shaft_hz = 25.0\nshaft_rpm = 1500.0"));
    assert!(e.contains("node[0].machine.shaft_hz"), "{e}");

    let e = load_err(&format!(
        "{GOOD}\n[node.machine.bearing]\nrolling_elements = 9\nelement_diameter_mm = 8.0\n\
         pitch_diameter_mm = 40.0\n[node.machine.bearing.defect]\nkind = \"outer_race\"\n\
         amplitude = 1.0\nresonance_hz = 20000.0\ndecay_ms = 1.0\n"
    ));
    assert!(
        e.contains("node[0].machine.bearing.defect.resonance_hz"),
        "{e}"
    );

    let e = load_err(&GOOD.replace("units = \"m/s^2\"", "units = \"furlong\""));
    assert!(e.contains("node[0].channel[0].units"), "{e}");

    let e = load_err(&GOOD.replace(
        "[site]\nname = \"Bench\"",
        "[site]\nname = \"Bench\"\nstart_time = \"yesterday\"",
    ));
    assert!(e.contains("site.start_time"), "{e}");

    let e = load_err("[site\nname = 1");
    assert!(e.contains("bad.toml") && e.contains("line"), "{e}");

    match Scenario::load(Path::new("/nonexistent/scenario.toml")) {
        Err(ScenarioError::Io { path, .. }) => assert!(path.ends_with("scenario.toml")),
        other => panic!("expected an i/o error, got {other:?}"),
    }
}

#[test]
fn simulate_command_reports_bad_input() {
    let dir = test_dir();
    let bad = dir.path().join("bad.toml");
    std::fs::write(
        &bad,
        GOOD.replace("window_len = 4096", "window_len = 4096\nwindow = 2"),
    )
    .unwrap();
    let log = dir.path().join("x.cslog");
    let out = simulate(&[
        "--scenario",
        bad.to_str().unwrap(),
        "--out",
        log.to_str().unwrap(),
    ]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("bad.toml") && err.contains("unknown field `window`"),
        "{err}"
    );

    let out = simulate(&[
        "--scenario",
        "/nonexistent.toml",
        "--out",
        log.to_str().unwrap(),
    ]);
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("/nonexistent.toml"));

    let good = dir.path().join("good.toml");
    std::fs::write(&good, GOOD).unwrap();
    let out = simulate(&[
        "--scenario",
        good.to_str().unwrap(),
        "--out",
        log.to_str().unwrap(),
        "--duration",
        "0.01",
    ]);
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("shorter than one window"));

    // Faults only apply to the TCP link.
    let out = simulate(&[
        "--scenario",
        good.to_str().unwrap(),
        "--out",
        log.to_str().unwrap(),
        "--faults",
        "drop=0.1",
    ]);
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("need --target"));
}
