//! Security posture: loopback defaults, keys never printed, only enrolled nodes with valid tags
//! accepted.

use crate::util::{csgate_bin, test_dir};
use csgate::daemon::config::NodeEntry;
use csgate::daemon::GatewayConfig;
use csgate::packet::wire::encode_window_to_vec;
use csgate::packet::{KeyRing, NodeKey};
use csgate::sources::IngestConfig;
use std::process::Command;

/// An invented key: long and distinctive, so finding it in output cannot be a coincidence.
const KEY: &str = "5ec7e75ec7e7a11ce0ffee0ddba11c0de5ec7e75ec7e7a11";

#[test]
fn ingest_and_http_default_to_loopback() {
    let ingest = IngestConfig::default();
    assert!(ingest.listen.ip().is_loopback(), "{}", ingest.listen);
    let config = GatewayConfig::default();
    assert!(config.ingest.listen.ip().is_loopback());
    assert!(config.http.listen.ip().is_loopback());
    // The same through the file: a config that leaves the addresses out.
    let parsed =
        GatewayConfig::from_toml_str("[site]\nname = \"x\"\n", std::path::Path::new("x.toml"))
            .unwrap();
    assert!(parsed.ingest.listen.ip().is_loopback());
    assert!(parsed.http.listen.ip().is_loopback());
}

#[test]
fn debug_forms_redact_keys() {
    let mut config = GatewayConfig::default();
    config.nodes.push(NodeEntry {
        id: 5,
        name: "pump".into(),
        key: Some(KEY.into()),
        advise: false,
    });
    let text = format!("{config:?} {:?}", config.ingest_config());
    assert!(!text.contains(KEY), "{text}");
    assert!(text.contains("redacted"));
    let key = NodeKey::from_hex(KEY).unwrap();
    assert!(!format!("{key:?}").contains("5ec7"));
}

fn run(args: &[&str]) -> String {
    let out = Command::new(csgate_bin()).args(args).output().unwrap();
    format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    )
}

#[test]
fn serve_check_and_error_paths_never_print_a_key() {
    let dir = test_dir();
    let records = dir.path().join("records");
    let good = format!(
        "[[node]]\nid = 5\nkey = \"{KEY}\"\n[record]\nfolder = {:?}\n",
        records.display()
    );
    let cases = [
        good.clone(),
        // Odd number of digits, too short, wrong type, a duplicate node, a bad neighbour key,
        // a syntax error on the key's own line.
        format!("[[node]]\nid = 5\nkey = \"{KEY}0\"\n"),
        format!("[[node]]\nid = 5\nkey = \"{}\"\n", &KEY[..20]),
        format!("[[node]]\nid = 5\nkey = [\"{KEY}\"]\n"),
        format!("[[node]]\nid = 5\nkey = \"{KEY}\"\n[[node]]\nid = 5\nkey = \"{KEY}\"\n"),
        format!("[[node]]\nid = 5\nkey = \"{KEY}\"\nbogus = 1\n"),
        format!("[[node]]\nid = 5\nkey = \"{KEY}\n"),
        format!("[[node]]\nid = 5\nkey = {KEY}\n"),
        format!("[[node]]\nid = \"five\"\nkey = \"{KEY}\"\n"),
    ];
    for (i, text) in cases.iter().enumerate() {
        let path = dir.path().join(format!("c{i}.toml"));
        std::fs::write(&path, text).unwrap();
        let out = run(&["serve", "--check", "--config", path.to_str().unwrap()]);
        assert!(!out.contains(KEY), "case {i} printed the key:\n{out}");
        assert!(
            !out.contains(&KEY[..20]),
            "case {i} printed part of the key:\n{out}"
        );
        if i == 0 {
            assert!(out.contains("valid"), "{out}");
        }
    }
    let out = run(&["serve", "--print-defaults"]);
    assert!(!out.contains("key ="), "{out}");
    // The replay command's --key: malformed forms are refused without echoing the key.
    for spec in [KEY.to_string(), format!("x={KEY}"), format!("5={KEY}0")] {
        let out = run(&["replay", "missing.cslog", "--key", &spec]);
        assert!(!out.contains(KEY), "--key {spec}: {out}");
    }
}

#[test]
fn with_enrolment_only_enrolled_nodes_with_valid_tags_pass() {
    let mut ring = KeyRing::new(true);
    ring.insert(5, NodeKey::from_hex(KEY).unwrap());
    let own = NodeKey::new(vec![0x42; 16]);
    let frame = |node: u32, key: Option<&NodeKey>| {
        let mut p = crate::fuzz::packet(0);
        p.header.stream.node = node;
        encode_window_to_vec(&p, key).unwrap()
    };
    let enrolled = NodeKey::from_hex(KEY).unwrap();
    assert!(
        ring.check(&frame(5, Some(&enrolled))).is_ok(),
        "enrolled, valid tag"
    );
    assert!(
        ring.check(&frame(5, Some(&own))).is_err(),
        "enrolled, wrong key"
    );
    assert!(ring.check(&frame(5, None)).is_err(), "enrolled, untagged");
    assert!(
        ring.check(&frame(6, Some(&own))).is_err(),
        "not enrolled, own key"
    );
    assert!(
        ring.check(&frame(6, None)).is_err(),
        "not enrolled, untagged"
    );
    // A valid frame with one byte changed (CRC fixed up) no longer verifies.
    let mut f = frame(5, Some(&enrolled));
    f[30] ^= 1;
    let n = f.len();
    let crc = crc32fast::hash(&f[..n - 4]);
    f[n - 4..].copy_from_slice(&crc.to_le_bytes());
    assert!(ring.check(&f).is_err(), "tampered");
}
