//! A short seeded run of every fuzz target (`csgate::fuzz`; the long run is
//! `csgate bench --fuzz N`, figures in BENCHMARKS.md), and regression cases for the bugs the
//! fuzzer found.

use csgate::fuzz::{run_target, Target};

/// Fixed so that a failure here reproduces with `csgate bench --fuzz-seed`.
const SEED: u64 = 0x00C5_6A7E_F022_0001;

fn run(target: Target, cases: u64) {
    let report = run_target(target, cases, SEED, |_| {});
    assert_eq!(report.cases, cases);
    let lines: Vec<String> = report.failures.iter().map(|f| f.to_string()).collect();
    assert!(
        report.failed == 0,
        "{} of {cases} {target} cases failed:\n{}",
        report.failed,
        lines.join("\n")
    );
    // The mix must reach the accepting paths too, or the round-trip invariants go untested.
    assert!(report.accepted > 0, "no {target} case was accepted");
    assert!(report.accepted < cases, "no {target} case was rejected");
}

#[test]
fn frame_decoder_short_run() {
    run(Target::Frame, 20_000);
}

#[test]
fn streaming_codec_short_run() {
    run(Target::Codec, 5_000);
}

#[test]
fn packet_log_reader_short_run() {
    run(Target::Log, 5_000);
}

#[test]
fn config_parser_short_run() {
    run(Target::Config, 3_000);
}

#[test]
fn record_reader_short_run() {
    run(Target::Record, 100);
}
