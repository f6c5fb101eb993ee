//! Sampling advice end to end: simulated nodes that follow the gateway's advice, over loopback
//! TCP into `serve`, and the records read back.
//!
//! What is outside the project here is the L1 phase transition the advice rests on (CHECK-VALUES
//! 6.1, through `csgate::plan::psi`, itself checked against that table in tests/plan.rs) and the
//! hold-out trust figure (Ward 2009), which the record carries per window. The machines are our
//! own invented ones: a steady fan with three shaft lines, and a pump whose mounting loosens
//! half-way (a train of 36 more shaft harmonics, the textbook looseness signature: common
//! practice), so its spectrum becomes far less sparse.

use crate::util::test_dir;
use csgate::daemon::config::NodeEntry;
use csgate::daemon::{Gateway, GatewayConfig, Shutdown};
use csgate::sim::advised::send_following_advice;
use csgate::sim::{Scenario, Simulation};
use csgate::store::layout::trust;
use csgate::store::{RecordIndex, RecordReader, StreamKey};
use std::path::Path;

const SECONDS: f64 = 16.0;

fn scenario() -> Scenario {
    let mut harmonics = String::new();
    for order in 4..40 {
        let amp = 0.25 / f64::from(order).sqrt();
        harmonics.push_str(&format!(
            "    {{ order = {order}, amplitude = {amp:.4}, phase_deg = {} }},\n",
            (order * 37) % 360
        ));
    }
    let text = format!(
        r#"
[site]
name = "Fernhollow test bench"
start_time = "2026-03-01T06:00:00Z"
seed = 77

[[node]]
id = 201
name = "FH-201 extract fan, steady"
sample_rate_hz = 25600.0
window_len = 2048
hop_len = 1024
ratio = 0.5
index_encoding = "seed"
value_encoding = "f32"
adc_bits = 16
auth_key = "00112233445566778899aabbccddeeff"

[[node.channel]]
channel = 0
kind = "vibration"
units = "m/s^2"
full_scale = 50.0
noise_rms = 0.002

[node.machine]
kind = "belt-driven extract fan"
shaft_hz = 24.8
speed_wander = 0.0
harmonics = [
    {{ order = 1, amplitude = 1.0 }},
    {{ order = 2, amplitude = 0.4, phase_deg = 30.0 }},
    {{ order = 3, amplitude = 0.15, phase_deg = 60.0 }},
]

[[node]]
id = 202
name = "FH-202 transfer pump, mounting loosens"
sample_rate_hz = 25600.0
window_len = 2048
hop_len = 1024
ratio = 0.25
index_encoding = "seed"
value_encoding = "f32"
adc_bits = 16

[[node.channel]]
channel = 0
kind = "vibration"
units = "m/s^2"
full_scale = 50.0
noise_rms = 0.002

[node.machine]
kind = "close-coupled transfer pump"
shaft_hz = 29.6
speed_wander = 0.0
harmonics = [
    {{ order = 1, amplitude = 1.0 }},
    {{ order = 2, amplitude = 0.3, phase_deg = 45.0 }},
    {{ order = 3, amplitude = 0.1, phase_deg = 90.0 }},
]

[node.machine.change]
at_s = {half}
harmonics = [
{harmonics}]
"#,
        half = SECONDS / 2.0
    );
    Scenario::from_toml_str(&text, Path::new("advice-test.toml")).expect("scenario parses")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn advice_rises_when_the_machine_changes_and_settles_on_a_steady_one() {
    let dir = test_dir();
    let folder = dir.path().join("records");
    let scenario = scenario();
    let mut config = GatewayConfig::loopback_ephemeral(&folder);
    config.nodes = scenario
        .nodes
        .iter()
        .map(|n| NodeEntry {
            id: n.id,
            name: n.name.clone(),
            key: n.auth_key.clone(),
            advise: true,
        })
        .collect();
    config.pipeline.workers = 2;
    config.http.enabled = false;
    let gateway = Gateway::bind(config, "advice-test".into()).await.unwrap();
    let ingest = gateway.ingest_addr();
    let shutdown = Shutdown::new();
    let run = tokio::spawn(gateway.run(shutdown.clone()));

    // Real time: 25 windows/s per node (hop 1024 at 25.6 kHz), so the advice (computed after each window is
    // reconstructed) reaches the node within a few windows. At twice real time the test failed
    // when other tests loaded both cores: windows of m = 112 of n = 2048 take 10-30 ms each
    // with the hold-out solve, the gateway fell 90 windows behind the node, and the advice came
    // too late for the last quarter of the run.
    let sim = Simulation::new(&scenario, SECONDS, false);
    let nodes = send_following_advice(sim, &scenario, ingest, 1.0)
        .await
        .unwrap();
    shutdown.signal();
    let report = run.await.unwrap().unwrap();
    assert_eq!(report.pipeline.failed_windows, 0);

    let index = RecordIndex::load(&folder).unwrap();
    let mut rows = Vec::new();
    for node in [201u32, 202] {
        let key = StreamKey { node, channel: 0 };
        let mut w = Vec::new();
        for f in &index.files {
            let reader = RecordReader::open(&folder.join(&f.file)).unwrap();
            if reader.streams().unwrap().contains(&key) {
                w.extend(reader.windows(key).unwrap());
            }
        }
        w.sort_by_key(|r| r.seq);
        rows.push(w);
    }

    let (fan, pump) = (&nodes[0], &nodes[1]);
    let windows = fan.m_per_window.len();
    assert_eq!(rows[0].len(), windows, "every fan window is in the record");
    assert_eq!(
        rows[1].len(),
        pump.m_per_window.len(),
        "every pump window too"
    );
    // The record's m is what the node sent.
    for (r, m) in rows[1].iter().zip(&pump.m_per_window) {
        assert_eq!(r.m, *m, "window {}", r.seq);
    }
    assert!(fan.advice_received > 0 && pump.advice_received > 0);
    assert_eq!(
        fan.advice_ignored, 0,
        "signed advice to the enrolled fan verifies"
    );

    let trusted = |rows: &[csgate::store::layout::WindowRow]| {
        rows.iter().filter(|r| r.trust == trust::OK).count() as f64 / rows.len().max(1) as f64
    };
    let half = windows / 2;
    let quarter = windows / 4;

    // Steady fan: the advice settles below the m it started with, and stays trusted.
    let fan_start = fan.m_per_window[0];
    let fan_end = *fan.m_per_window.last().unwrap();
    let fan_tail = &rows[0][windows - quarter..];
    eprintln!(
        "fan: m {fan_start} -> {fan_end}, advice messages {}, trusted {:.0}% (last quarter {:.0}%)",
        fan.advice_received,
        100.0 * trusted(&rows[0]),
        100.0 * trusted(fan_tail)
    );
    assert!(
        f64::from(fan_end) < 0.6 * f64::from(fan_start),
        "steady machine: {fan_start} -> {fan_end}"
    );
    assert!(
        trusted(fan_tail) >= 0.9,
        "the lower m keeps the windows trusted"
    );

    // Pump: before the change the advice falls; after it, it rises to at least twice that
    // level, and the windows are trusted again once the node follows it.
    let pump_start = pump.m_per_window[0];
    let before = pump.m_per_window[half - 1];
    let after = *pump.m_per_window.last().unwrap();
    let pump_tail = &rows[1][windows - quarter..];
    eprintln!(
        "pump: m {pump_start} at start, {before} before the change, {after} at the end; advice messages {}; trusted before {:.0}%, last quarter {:.0}%",
        pump.advice_received,
        100.0 * trusted(&rows[1][..half]),
        100.0 * trusted(pump_tail)
    );
    assert!(before < pump_start, "sparse pump: {pump_start} -> {before}");
    assert!(after >= 2 * before, "less sparse pump: {before} -> {after}");
    assert!(trusted(pump_tail) >= 0.9, "trust recovers at the advised m");
}
