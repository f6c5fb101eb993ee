//! `plan`: the L1 phase-transition curve against its published values, the command's JSON
//! and its errors on bad input.

use super::util::csgate_bin;
use csgate::basis::BasisKind;
use csgate::plan::{coherence, plan, psi, PlanRequest};
use std::process::Command;

/// CHECK-VALUES 6.1: psi(rho) from the statistical dimension of the L1 descent cone
/// (Amelunxen, Lotz, McCoy & Tropp, "Living on the edge", Information and Inference, 2014),
/// computed there by brentq and independently by quadrature (agreement 1e-8).
const PSI_TABLE: [(f64, f64); 8] = [
    (0.005, 0.03542413),
    (0.01, 0.06124396),
    (0.02, 0.10418139),
    (0.05, 0.20389986),
    (0.1, 0.32879351),
    (0.2, 0.51112961),
    (0.3, 0.64557229),
    (0.5, 0.83129991),
];

#[test]
fn psi_reproduces_the_published_table() {
    for (rho, want) in PSI_TABLE {
        let got = psi(rho).unwrap();
        // The table has 8 decimals: half a unit in the last place.
        assert!(
            (got - want).abs() < 6e-9,
            "psi({rho}) = {got}, table {want}"
        );
    }
}

#[test]
fn default_margin_gives_the_absolute_edges() {
    // CHECK-VALUES 6.1 absolute edges (Amelunxen et al. 2014): n psi(k/n) = 251.0, 835.8,
    // 208.2, 52.8 (one decimal).
    for (n, k, edge) in [
        (4096, 41, 251.0),
        (4096, 205, 835.8),
        (1024, 51, 208.2),
        (256, 13, 52.8),
    ] {
        let p = plan(&PlanRequest {
            n,
            k,
            margin: 0.0,
            basis: BasisKind::Dct,
            sample_rate_hz: 25_600.0,
            hop_len: n / 2,
            authenticated: false,
        })
        .unwrap();
        assert!((p.m_edge - edge).abs() < 0.05, "n {n} k {k}: {}", p.m_edge);
        assert_eq!(p.m, (p.m_edge).ceil() as usize);
        assert!(!p.coherence_warning);
        assert_eq!(p.encodings.len(), 6);
    }
}

#[test]
fn coherence_matches_the_reference_values() {
    // CHECK-VALUES 6.4 (computed): time samples vs orthonormal DCT at n = 256: 1.414187;
    // periodized db4, full depth: 11.44; DFT exactly 1 (theory).
    assert!((coherence(BasisKind::Dct, 256).unwrap() - 1.414187).abs() < 1e-5);
    let db4 = BasisKind::Daubechies {
        order: 4,
        levels: None,
    };
    assert!((coherence(db4, 256).unwrap() - 11.44).abs() < 0.01);
}

#[test]
fn command_json_has_the_documented_keys() {
    let out = Command::new(csgate_bin())
        .args(["plan", "-n", "4096", "--sparsity", "41", "--json"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    for key in [
        "n",
        "k",
        "rho",
        "psi",
        "m_edge",
        "margin",
        "m",
        "compression_ratio",
        "basis",
        "coherence",
        "coherence_warning",
        "frames_per_s",
        "encodings",
    ] {
        assert!(v.get(key).is_some(), "missing {key}");
    }
    // CHECK-VALUES 6.1: n = 4096, k = 41 gives m* = 251.0.
    assert_eq!(v["m"], 252);
    let enc = v["encodings"].as_array().unwrap();
    assert!(enc.iter().all(|e| e["frame_bytes"].as_u64().unwrap() > 72));
}

#[test]
fn wavelet_basis_warns() {
    let out = Command::new(csgate_bin())
        .args(["plan", "-n", "256", "--sparsity", "13", "--basis", "db4"])
        .output()
        .unwrap();
    assert!(out.status.success());
    assert!(String::from_utf8_lossy(&out.stdout).contains("warning: basis db4 is coherent"));
}

#[test]
fn bad_inputs_fail_with_a_message() {
    let dir = tempfile::tempdir().unwrap();
    let junk = dir.path().join("junk.h5");
    std::fs::write(&junk, b"not hdf5").unwrap();
    let missing = dir.path().join("missing.h5");
    let cases: Vec<(Vec<String>, &str)> = vec![
        (
            vec![
                "-n".into(),
                "1001".into(),
                "--sparsity".into(),
                "10".into(),
                "--basis".into(),
                "db4".into(),
            ],
            "window length 1001",
        ),
        (
            vec!["-n".into(), "256".into(), "--sparsity".into(), "300".into()],
            "sparsity 300",
        ),
        (
            vec![
                "-n".into(),
                "256".into(),
                "--from-record".into(),
                missing.display().to_string(),
            ],
            "no such file",
        ),
        (
            vec![
                "-n".into(),
                "256".into(),
                "--from-record".into(),
                junk.display().to_string(),
            ],
            "opening record",
        ),
    ];
    for (args, want) in cases {
        let out = Command::new(csgate_bin())
            .arg("plan")
            .args(&args)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        assert!(err.contains(want), "{args:?}: {err}");
        assert!(!err.contains("panicked"), "{args:?}: {err}");
    }
}
