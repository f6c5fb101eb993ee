//! The analytics stage end to end: simulator logs of machines with a known bearing defect,
//! replayed at m/n = 0.25 with their kinematics; the envelope spectrum's labelled peaks of the
//! record must name the defect and its harmonics, and name no defect on a healthy machine.

use crate::util::test_dir;
use csgate::features::envelope::EnvelopeBand;
use csgate::features::PeakRow;
use csgate::pipeline::analytics::MachineEntry;
use csgate::pipeline::replay::{replay, ReplayOptions};
use csgate::pipeline::run::PipelineConfig;
use csgate::sim::run::{key_ring, write_log, FilePace, Simulation};
use csgate::sim::scenario::Scenario;
use csgate::store::{RecordReader, StreamKey};
use std::collections::BTreeMap;
use std::path::Path;

/// Three invented machines on one shaft design (Nb = 9, d = 7.94 mm, D = 39.04 mm, the
/// geometry of CHECK-VALUES 7; at 29.95 Hz BPFO = 107.36 Hz, BPFI = 162.19 Hz): node 1 with an
/// outer-race spall, node 2 with an inner-race spall (modulated at the shaft rate), node 3
/// healthy. The defect model is the simulator's (impacts ringing a resonance, Randall & Antoni
/// 2011, from memory).
fn scenario(seed: u64) -> String {
    let node = |id: u32, defect: &str| {
        format!(
            r#"
[[node]]
id = {id}
name = "test machine {id}"
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
harmonics = [{{ order = 1, amplitude = 0.7 }}, {{ order = 2, amplitude = 0.25, phase_deg = 110.0 }}]
broadband_rms = 0.05

[node.machine.bearing]
rolling_elements = 9
element_diameter_mm = 7.94
pitch_diameter_mm = 39.04
{defect}
"#
        )
    };
    let outer = "[node.machine.bearing.defect]\nkind = \"outer_race\"\namplitude = 6.0\nresonance_hz = 3400.0\ndecay_ms = 0.6\n";
    let inner = "[node.machine.bearing.defect]\nkind = \"inner_race\"\namplitude = 6.0\nresonance_hz = 4100.0\ndecay_ms = 0.5\nmodulation_depth = 0.6\n";
    format!(
        "[site]\nname = \"analytics test site\"\nseed = {seed}\n{}{}{}",
        node(1, outer),
        node(2, inner),
        node(3, "")
    )
}

/// Per stream, the labelled envelope peaks of each block, largest first.
fn envelope_labels(path: &Path, key: StreamKey) -> Vec<Vec<String>> {
    let rec = RecordReader::open(path).unwrap();
    let mut blocks: BTreeMap<i64, Vec<String>> = BTreeMap::new();
    for p in rec.peaks(key).unwrap() {
        let p: PeakRow = p;
        let labels = blocks.entry(p.t_unix_ns).or_default();
        if p.source == 1 && !p.label_str().is_empty() {
            labels.push(p.label_str().to_string());
        }
    }
    let ind = rec.indicators(key).unwrap();
    assert_eq!(
        ind.len(),
        blocks.len(),
        "one indicator row per block with peaks"
    );
    blocks.into_values().collect()
}

fn is_bearing(label: &str) -> bool {
    ["BPFO", "BPFI", "BSF", "FTF"]
        .iter()
        .any(|b| label.contains(b))
}

#[test]
fn envelope_names_the_defect_and_not_on_a_healthy_machine() {
    let dir = test_dir();
    let dir_path = dir.path();
    let mut failures = Vec::new();
    for seed in [11u64, 22, 33] {
        let text = scenario(seed);
        let path = dir_path.join(format!("site-{seed}.toml"));
        std::fs::write(&path, &text).unwrap();
        let sc = Scenario::load(&path).unwrap();
        let log = dir_path.join(format!("site-{seed}.cslog"));
        // 3.5 s: three full 1 s blocks (13 hops of 2048) per stream.
        write_log(
            Simulation::new(&sc, 3.5, false),
            &sc,
            &log,
            FilePace::Fast,
            |_| Ok(()),
        )
        .unwrap();
        let mut pipeline = PipelineConfig::default();
        // Trust is tested on its own (tests/trust.rs); here it would only double the time.
        pipeline.trust.enabled = false;
        // The structural resonance band as a tap test would give it (both defects ring
        // resonances in 3.4-4.1 kHz). With the automatic spectral-kurtosis band on records
        // reconstructed at m/n = 0.25, some blocks chose a near-empty band close to Nyquist
        // (measured: 12.3-12.8 kHz), where the reconstruction's few remaining coefficients
        // look impulsive; see the report of issue 5.
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
        let out = dir_path.join(format!("record-{seed}.h5"));
        let events = dir_path.join(format!("events-{seed}.jsonl"));
        let rep = replay(
            &ReplayOptions {
                logs: vec![log],
                out: out.clone(),
                pipeline,
                limits: Default::default(),
                keys: key_ring(&sc),
                deflate: None,
                config_digest: String::new(),
                events: Some(events.clone()),
            },
            |_, _| {},
        )
        .unwrap();
        assert_eq!(rep.pipeline.blocks, 9, "seed {seed}");
        assert_eq!(
            std::fs::read_to_string(&events).unwrap().lines().count(),
            9,
            "seed {seed}: one event per block per stream"
        );
        for (node, defect) in [(1u32, "BPFO"), (2, "BPFI"), (3, "")] {
            let blocks = envelope_labels(&out, StreamKey::new(node, 0));
            assert_eq!(blocks.len(), 3, "seed {seed} node {node}");
            for (b, labels) in blocks.iter().enumerate() {
                // Shaft lines (1X, 2X) in the envelope are the inner race's load-zone
                // modulation, expected there; the fault lines are the bearing labels.
                let bearing: Vec<&str> = labels
                    .iter()
                    .map(String::as_str)
                    .filter(|l| is_bearing(l))
                    .collect();
                eprintln!("seed {seed} node {node} block {b}: {labels:?}");
                if defect.is_empty() {
                    if !bearing.is_empty() {
                        failures.push(format!("seed {seed} healthy node, block {b}: {labels:?}"));
                    }
                } else {
                    // The defect frequency is the largest bearing line and one of its first
                    // harmonics is among the next two. (2 BPFI = 324.4 Hz and 3 BPFO = 322.1 Hz
                    // lie 0.7% apart, inside the 2% label tolerance, so 2xBPFI can carry the
                    // other label; the harmonics check allows 2x or 3x.)
                    let (two, three) = (format!("2x{defect}"), format!("3x{defect}"));
                    let top = &bearing[..bearing.len().min(3)];
                    if !(bearing.first() == Some(&defect)
                        && (top.contains(&two.as_str()) || top.contains(&three.as_str())))
                    {
                        failures.push(format!("seed {seed} node {node} block {b}: {labels:?}"));
                    }
                }
            }
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

#[test]
fn gearbox_mesh_and_sidebands_are_labelled() {
    // The demo site's gearbox (configs/demo-site.toml, node 103): 23 teeth on a 24.6 Hz input
    // shaft, so GMF = 23 x 24.6 = 565.8 Hz with sidebands at GMF +/- 24.6 Hz and 2 x GMF
    // (the mesh frequency is teeth times shaft rate; Randall 2011, from memory, CHECK-VALUES 7).
    // Replayed at m/n = 0.25 with the site's kinematics, the direct spectrum of every block must
    // carry the GMF label near 565.8 Hz and at least one first-order sideband label.
    let dir = test_dir();
    let site = Path::new(env!("CARGO_MANIFEST_DIR")).join("configs/demo-site.toml");
    let sc = Scenario::load(&site).unwrap();
    let log = dir.path().join("site.cslog");
    write_log(
        Simulation::new(&sc, 3.5, false),
        &sc,
        &log,
        FilePace::Fast,
        |_| Ok(()),
    )
    .unwrap();
    let mut pipeline = PipelineConfig::default();
    pipeline.trust.enabled = false;
    pipeline.analytics.machines = sc
        .machine_kinematics()
        .into_iter()
        .map(|(node, machine)| MachineEntry {
            node,
            channel: None,
            machine,
        })
        .collect();
    let out = dir.path().join("record.h5");
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
    let rec = RecordReader::open(&out).unwrap();
    let mut blocks: BTreeMap<i64, Vec<(String, f64)>> = BTreeMap::new();
    for p in rec.peaks(StreamKey::new(103, 0)).unwrap() {
        if p.source == 0 {
            blocks
                .entry(p.t_unix_ns)
                .or_default()
                .push((p.label_str().to_string(), p.freq_hz));
        }
    }
    assert_eq!(blocks.len(), 3, "three 1 s blocks in 3.5 s");
    for (t, peaks) in &blocks {
        let gmf = peaks.iter().find(|(l, _)| l == "GMF");
        let gmf = gmf.unwrap_or_else(|| panic!("block {t}: no GMF label in {peaks:?}"));
        // Within half a bin (6.25 Hz at 25.6 kHz / 4096) of 565.8 Hz: the interpolation bias on
        // a clean tone is at most 0.016 bins (CHECK-VALUES 4.1), but the reconstruction at
        // m/n = 0.25 and the sidebands four bins away move it further (measured: 565.28 Hz).
        assert!((gmf.1 - 565.8).abs() < 3.125, "block {t}: GMF at {}", gmf.1);
        assert!(
            peaks.iter().any(|(l, _)| l == "GMF-1" || l == "GMF+1"),
            "block {t}: no first-order sideband in {peaks:?}"
        );
    }
}
