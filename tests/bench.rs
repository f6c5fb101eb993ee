//! `csgate bench --json` at tiny sizes: the command runs end to end and prints the documented
//! keys. No figure is checked (tests never assert wall-clock time; BENCHMARKS.md has them).

use crate::util::{csgate_bin, test_dir};

#[test]
fn bench_json_has_the_documented_keys() {
    let dir = test_dir();
    let out = std::process::Command::new(csgate_bin())
        .args([
            "bench",
            "--json",
            "--quiet",
            "--channels",
            "2",
            "--seconds",
            "0.3",
            "--n",
            "256",
            "--solve-windows",
            "3",
            "--workers",
            "2",
            "--scratch",
        ])
        .arg(dir.path())
        .output()
        .expect("run csgate bench");
    assert!(
        out.status.success(),
        "csgate bench failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("one JSON object");
    // The keys issue 7 fixes for `csgate bench --json`.
    for key in [
        "n",
        "m_over_n",
        "ms_per_window",
        "iteration_floor_ratio",
        "channels_realtime",
        "peak_rss_mib",
    ] {
        assert!(v.get(key).is_some(), "missing key {key} in {v}");
    }
    assert_eq!(v["n"], 256);
    // The scratch folder is removed when the run ends.
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
}

#[test]
fn bench_refuses_a_bad_hop_with_a_clear_message() {
    let out = std::process::Command::new(csgate_bin())
        .args(["bench", "--json", "--n", "256", "--hop", "100"])
        .output()
        .expect("run csgate bench");
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("hop 100"), "{err}");
}
