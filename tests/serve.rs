//! Integration tests of the gateway daemon (`csgate serve`): simulated nodes over loopback TCP
//! into the running gateway, the metrics endpoint scraped and parsed, the event feed read,
//! SIGTERM to a child process, restarts, and the configuration errors.
//!
//! Consistency checks use the fault-injecting sender's own account of what it did (which
//! windows went out intact, which were dropped or corrupted) as the outside reference.

use crate::util::{csgate_bin, test_dir};
use csgate::daemon::config::NodeEntry;
use csgate::daemon::{Gateway, GatewayConfig, Shutdown};
use csgate::sim::run::{parse_faults, send_to_target};
use csgate::sim::{Scenario, Simulation};
use csgate::sources::{Pace, WindowKey};
use csgate::store::{RecordIndex, RecordReader};
use std::collections::{BTreeMap, BTreeSet};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// The demo scenario cut down to one vibration channel per node and n = 1024 (fast solves).
fn small_scenario() -> Scenario {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("configs/demo-site.toml");
    let mut s = Scenario::load(&path).expect("demo scenario loads");
    for node in &mut s.nodes {
        node.channels.truncate(1);
        node.window_len = 1024;
        node.hop_len = Some(512);
    }
    s
}

fn enrol(config: &mut GatewayConfig, scenario: &Scenario) {
    config.nodes = scenario
        .nodes
        .iter()
        .map(|n| NodeEntry {
            id: n.id,
            name: n.name.clone(),
            key: n.auth_key.clone(),
            advise: false,
        })
        .collect();
}

/// One HTTP/1.1 GET over loopback; returns (head, body) for a response with a length.
pub(crate) async fn http_get(addr: SocketAddr, path: &str) -> (String, String) {
    let mut s = TcpStream::connect(addr).await.unwrap();
    let req = format!("GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n");
    s.write_all(req.as_bytes()).await.unwrap();
    let mut buf = Vec::new();
    s.read_to_end(&mut buf).await.unwrap();
    let text = String::from_utf8(buf).unwrap();
    let (head, body) = text.split_once("\r\n\r\n").unwrap();
    (head.to_string(), body.to_string())
}

/// Sum of the samples of one metric (any labels) in OpenMetrics text, with an optional label
/// filter such as `reason="crc"`.
pub(crate) fn metric(text: &str, name: &str, label: Option<&str>) -> f64 {
    let mut sum = 0.0;
    for line in text.lines().filter(|l| !l.starts_with('#')) {
        let (series, value) = line.rsplit_once(' ').unwrap();
        let base = series.split('{').next().unwrap();
        if base != name {
            continue;
        }
        if let Some(l) = label {
            if !series.contains(l) {
                continue;
            }
        }
        sum += value.parse::<f64>().unwrap();
    }
    sum
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn simulated_nodes_to_records_with_metrics_and_feed() {
    let dir = test_dir();
    let scenario = small_scenario();
    let mut config = GatewayConfig::loopback_ephemeral(&dir.path().join("records"));
    enrol(&mut config, &scenario);
    config.pipeline.workers = 2;
    // A corrupt frame whose length field is hit leaves the gateway waiting for bytes that
    // never come; a short idle timeout frees that connection quickly.
    config.ingest.idle_timeout_ms = 2000;
    let gateway = Gateway::bind(config, "test".into()).await.unwrap();
    let (ingest, http) = (gateway.ingest_addr(), gateway.http_addr().unwrap());
    let shutdown = Shutdown::new();
    let run = tokio::spawn(gateway.run(shutdown.clone()));

    // The feed streams JSON lines with chunked transfer encoding.
    let mut feed = TcpStream::connect(http).await.unwrap();
    feed.write_all(b"GET /events HTTP/1.1\r\nHost: x\r\n\r\n")
        .await
        .unwrap();
    let mut got = Vec::new();
    while !String::from_utf8_lossy(&got).contains("\"kind\":\"feed_open\"") {
        let mut b = [0u8; 512];
        let n = feed.read(&mut b).await.unwrap();
        assert!(n > 0, "feed closed early");
        got.extend_from_slice(&b[..n]);
    }
    let head = String::from_utf8_lossy(&got).to_lowercase();
    assert!(head.contains("transfer-encoding: chunked"), "{head}");
    assert!(head.contains("application/x-ndjson"), "{head}");

    let (h, body) = http_get(http, "/health").await;
    assert!(h.starts_with("HTTP/1.1 200"), "{h}");
    assert!(body.contains("\"status\":\"running\""), "{body}");

    let sim = Simulation::new(&scenario, 2.0, false);
    let plan = parse_faults("drop=0.05,dup=0.05,corrupt=0.02", 11).unwrap();
    let summary = send_to_target(
        sim,
        &scenario,
        ingest,
        &plan,
        Pace::AsFastAsPossible,
        |_| Ok(()),
    )
    .await
    .unwrap();
    let faults = summary.faults.unwrap();
    assert!(
        !faults.dropped.is_empty() && faults.duplicated > 0,
        "plan too mild"
    );

    // Wait (bounded by a count, not a clock) until the ingest has handed everything over.
    let mut text = String::new();
    for _ in 0..600 {
        text = http_get(http, "/metrics").await.1;
        let accepted = metric(&text, "csgate_frames_accepted_total", None);
        let taken = metric(&text, "csgate_pipeline_packets_total", None);
        let active = metric(&text, "csgate_connections_active", None);
        if active == 0.0 && accepted == taken && accepted > 0.0 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(
        text.ends_with("# EOF\n"),
        "OpenMetrics text ends with # EOF"
    );
    for name in [
        "csgate_windows_reconstructed_total",
        "csgate_solve_duration_seconds_bucket",
        "csgate_queue_depth",
        "csgate_worker_busy_seconds_total",
        "csgate_record_written_bytes_total",
    ] {
        assert!(text.contains(name), "{name} missing:\n{text}");
    }
    // Per-stream duplicates and late windows add up to the gateway totals.
    assert_eq!(
        metric(&text, "csgate_stream_frames_dropped_total", None),
        metric(&text, "csgate_frames_dropped_total", None)
    );
    // Every frame the sender corrupted was refused at ingest, for some reason.
    let rejected = metric(&text, "csgate_frames_rejected_total", None);
    assert_eq!(rejected as usize, faults.corrupted.len(), "{text}");
    // Intact frames written = accepted (duplicates included; the reorder buffer drops them).
    assert_eq!(
        metric(&text, "csgate_frames_accepted_total", None) as usize,
        faults.delivered.len() + faults.duplicated
    );

    // The trust and analytics figures appear once windows and a feature block are done
    // (bounded by a count of scrapes, not a clock).
    let mut analytics = String::new();
    for _ in 0..600 {
        analytics = http_get(http, "/metrics").await.1;
        if analytics.contains("csgate_window_trust{") && analytics.contains("csgate_band_rms{") {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    for name in [
        "csgate_window_trust{",
        "csgate_window_cv_error_ratios{",
        "csgate_band_rms{",
        "csgate_advice_messages_sent_total",
    ] {
        assert!(analytics.contains(name), "{name} missing:\n{analytics}");
    }
    let trust = metric(&analytics, "csgate_window_trust", None);
    assert!(trust >= 0.0, "trust is 0 or 1 per stream");

    shutdown.signal();
    let report = run.await.unwrap().unwrap();
    assert!(!report.forced);

    // Per (stream, capture): intact windows, and lost ones before the last intact one (after
    // it nobody can know).
    let mut delivered: BTreeMap<(u32, u16, u32), BTreeSet<u64>> = BTreeMap::new();
    for WindowKey {
        stream,
        capture_id,
        seq,
    } in &faults.delivered
    {
        delivered
            .entry((stream.node, stream.channel, *capture_id))
            .or_default()
            .insert(*seq);
    }
    let knowable_lost = faults
        .lost()
        .iter()
        .filter(|k| {
            delivered
                .get(&(k.stream.node, k.stream.channel, k.capture_id))
                .and_then(|s| s.last())
                .is_some_and(|&last| k.seq < last)
        })
        .count() as u64;
    let intact: u64 = delivered.values().map(|s| s.len() as u64).sum();
    assert_eq!(report.pipeline.windows, intact, "every intact window once");
    assert_eq!(report.pipeline.lost_windows, knowable_lost);
    assert_eq!(
        report.pipeline.windows + knowable_lost + (faults.lost().len() as u64 - knowable_lost),
        faults.frames_in as u64,
        "windows + lost = sent"
    );
    assert_eq!(
        report.pipeline.duplicates + report.pipeline.late,
        faults.duplicated as u64
    );

    // The feed ended with the gateway and carried the shutdown notice.
    let mut rest = Vec::new();
    let _ = feed.read_to_end(&mut rest).await;
    got.extend_from_slice(&rest);
    assert!(String::from_utf8_lossy(&got).contains("\"kind\":\"shutting_down\""));

    // Every record file is closed and readable; together they hold every stream.
    let folder = dir.path().join("records");
    let index = RecordIndex::load(&folder).unwrap();
    let mut streams = BTreeSet::new();
    for f in &index.files {
        assert!(f.closed.is_some(), "{} closed", f.file);
        let reader = RecordReader::open(&folder.join(&f.file)).unwrap();
        for key in reader.streams().unwrap() {
            streams.insert((key.node, key.channel));
            let _ = reader.samples(key).unwrap();
        }
    }
    assert_eq!(streams.len(), scenario.nodes.len());
    assert_eq!(index.files.len() as u64, report.record_files);
}

pub(crate) fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

fn write_config(dir: &Path, ingest: u16, http: u16, scenario: &Scenario) -> PathBuf {
    let mut text = format!(
        "[site]\nname = \"Test bench\"\n[ingest]\nlisten = \"127.0.0.1:{ingest}\"\n\
         [http]\nlisten = \"127.0.0.1:{http}\"\n[pipeline]\nworkers = 2\n\
         [record]\nfolder = \"records\"\n[log]\nformat = \"json\"\n"
    );
    for n in &scenario.nodes {
        text.push_str(&format!("[[node]]\nid = {}\n", n.id));
        if let Some(k) = &n.auth_key {
            text.push_str(&format!("key = \"{k}\"\n"));
        }
    }
    let path = dir.join("gateway.toml");
    std::fs::write(&path, text).unwrap();
    path
}

/// Runs `csgate serve` as a child, sends one simulated second, SIGTERMs it; returns its exit
/// status.
fn serve_child_once(config: &Path, ingest: u16, scenario: &Scenario) -> std::process::ExitStatus {
    let mut child = Command::new(csgate_bin())
        .args(["serve", "--config"])
        .arg(config)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let addr: SocketAddr = format!("127.0.0.1:{ingest}").parse().unwrap();
    let rt = tokio::runtime::Runtime::new().unwrap();
    rt.block_on(async {
        let mut up = false;
        for _ in 0..200 {
            if TcpStream::connect(addr).await.is_ok() {
                up = true;
                break;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        assert!(up, "the child gateway never listened");
        let sim = Simulation::new(scenario, 1.0, false);
        let plan = parse_faults("none", 1).unwrap();
        send_to_target(sim, scenario, addr, &plan, Pace::AsFastAsPossible, |_| {
            Ok(())
        })
        .await
        .unwrap();
    });
    // Common practice for daemons: SIGTERM asks for an orderly stop.
    let status = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    child.wait().unwrap()
}

#[test]
fn sigterm_closes_every_record_and_a_restart_starts_a_new_file() {
    let dir = test_dir();
    let mut scenario = small_scenario();
    scenario.nodes.truncate(2);
    let (ingest, http) = (free_port(), free_port());
    let config = write_config(dir.path(), ingest, http, &scenario);
    let status = serve_child_once(&config, ingest, &scenario);
    assert_eq!(status.code(), Some(0), "exit 0 after SIGTERM");

    let folder = dir.path().join("records");
    let first = RecordIndex::load(&folder).unwrap();
    assert!(!first.files.is_empty());
    let mut before = BTreeMap::new();
    let mut samples = 0;
    for f in &first.files {
        assert!(f.closed.is_some(), "{} closed", f.file);
        let path = folder.join(&f.file);
        let reader = RecordReader::open(&path).unwrap();
        for key in reader.streams().unwrap() {
            samples += reader.samples(key).unwrap().len();
        }
        before.insert(f.file.clone(), std::fs::read(&path).unwrap());
    }
    assert_eq!(
        first.files.last().unwrap().close_reason.as_deref(),
        Some("shutdown")
    );
    assert!(samples > 0, "the records hold the stitched samples");

    // Restart into the same folder.
    let status = serve_child_once(&config, ingest, &scenario);
    assert_eq!(status.code(), Some(0));
    let second = RecordIndex::load(&folder).unwrap();
    assert!(second.files.len() > first.files.len(), "a new file");
    let max_first = first.files.iter().map(|f| f.seq).max().unwrap();
    for f in &second.files[first.files.len()..] {
        assert!(f.seq > max_first && f.closed.is_some());
        RecordReader::open(&folder.join(&f.file)).unwrap();
    }
    for (name, bytes) in before {
        assert_eq!(
            std::fs::read(folder.join(&name)).unwrap(),
            bytes,
            "{name} untouched by the restart"
        );
    }
}

/// Runs `csgate serve --check` on `text`; returns (exit code, stderr).
fn check(dir: &Path, text: &str) -> (Option<i32>, String) {
    let path = dir.join("bad.toml");
    std::fs::write(&path, text).unwrap();
    let out = Command::new(csgate_bin())
        .args(["serve", "--check", "--config"])
        .arg(&path)
        .output()
        .unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn bad_configs_name_file_key_and_expectation() {
    let dir = test_dir();
    let cases: &[(&str, &[&str])] = &[
        (
            "[ingest]\nlisten_addr = \"127.0.0.1:1\"\n",
            &["unknown key `ingest.listen_addr`"],
        ),
        (
            "[pipeline.solver]\nmax_iters = 5\n",
            &["unknown key `pipeline.solver.max_iters`"],
        ),
        ("colour = 1\n", &["unknown key `colour`"]),
        (
            "[ingest]\nmax_connections = \"many\"\n",
            &["`ingest.max_connections`", "line 2", "expected"],
        ),
        (
            "[ingest]\nlisten = \"localhost\"\n",
            &["`ingest.listen`", "socket address"],
        ),
        ("[http]\nlisten = \"127.0.0.1:99999\"\n", &["`http.listen`"]),
        (
            "[[node]]\nid = 7\nkey = \"xyz\"\n",
            &["`node[0].key`", "hex"],
        ),
        (
            "[[node]]\nid = 7\nkey = \"abcd\"\n",
            &["`node[0].key`", "at least 16"],
        ),
        (
            "[[node]]\nid = 7\n[[node]]\nid = 7\n",
            &["`node[1].id`", "twice"],
        ),
        (
            "[pipeline]\nworkers = 0\n",
            &["`pipeline.workers`", "at least 1"],
        ),
        ("[pipeline]\nbasis = \"haar\"\n", &["`pipeline.basis`"]),
        (
            "[record]\ndeflate = 12\n",
            &["`record.deflate`", "0 (none) to 9"],
        ),
        ("[log]\nformat = \"xml\"\n", &["`log.format`", "human"]),
        ("[ingest\n", &["not valid TOML", "line 1"]),
    ];
    for (text, wants) in cases {
        let (code, err) = check(dir.path(), text);
        assert_eq!(code, Some(2), "{text:?}: {err}");
        assert!(err.contains("bad.toml"), "{text:?}: names the file: {err}");
        assert!(!err.contains("panicked"), "{err}");
        for w in *wants {
            assert!(err.contains(w), "{text:?}: wanted {w:?} in: {err}");
        }
    }

    // A record folder that cannot be created (its parent is a file).
    std::fs::write(dir.path().join("plain-file"), b"").unwrap();
    let (code, err) = check(dir.path(), "[record]\nfolder = \"plain-file/records\"\n");
    assert_eq!(code, Some(2));
    assert!(
        err.contains("`record.folder`") && err.contains("cannot create"),
        "{err}"
    );

    // A record folder without write permission (skipped where permissions are not enforced,
    // e.g. when the tests run as root).
    use std::os::unix::fs::PermissionsExt;
    let ro = dir.path().join("read-only");
    std::fs::create_dir(&ro).unwrap();
    std::fs::set_permissions(&ro, std::fs::Permissions::from_mode(0o500)).unwrap();
    if std::fs::write(ro.join("probe"), b"").is_err() {
        let (code, err) = check(dir.path(), "[record]\nfolder = \"read-only\"\n");
        assert_eq!(code, Some(2));
        assert!(
            err.contains("`record.folder`") && err.contains("cannot create files"),
            "{err}"
        );
    }
    std::fs::set_permissions(&ro, std::fs::Permissions::from_mode(0o700)).unwrap();

    // The shipped example is valid.
    let shipped = Path::new(env!("CARGO_MANIFEST_DIR")).join("configs/gateway.toml");
    let text = std::fs::read_to_string(&shipped).unwrap().replace(
        "folder = \"records\"",
        &format!("folder = {:?}", dir.path().join("r")),
    );
    let (code, err) = check(dir.path(), &text);
    assert_eq!(code, Some(0), "{err}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_second_signal_shortens_the_drain_and_records_stay_complete() {
    let dir = test_dir();
    let mut scenario = small_scenario();
    for node in &mut scenario.nodes {
        node.window_len = 4096;
        node.hop_len = Some(2048);
    }
    let mut config = GatewayConfig::loopback_ephemeral(&dir.path().join("records"));
    enrol(&mut config, &scenario);
    config.pipeline.workers = 1;
    config.http.enabled = false;
    let gateway = Gateway::bind(config, "test".into()).await.unwrap();
    let ingest = gateway.ingest_addr();
    let shutdown = Shutdown::new();
    let run = tokio::spawn(gateway.run(shutdown.clone()));
    let sim = Simulation::new(&scenario, 3.0, false);
    let plan = parse_faults("none", 1).unwrap();
    let summary = send_to_target(
        sim,
        &scenario,
        ingest,
        &plan,
        Pace::AsFastAsPossible,
        |_| Ok(()),
    )
    .await
    .unwrap();
    shutdown.signal();
    shutdown.signal();
    let report = run.await.unwrap().unwrap();
    assert!(report.forced);
    // Nothing is counted twice: reconstructed, discarded and still-unsent windows add up to
    // at most what was sent (the reorder buffer may turn discarded ones into gaps).
    assert!(report.pipeline.windows + report.discarded_packets <= summary.frames as u64);
    let folder = dir.path().join("records");
    let index = RecordIndex::load(&folder).unwrap();
    for f in &index.files {
        assert!(f.closed.is_some(), "{} closed", f.file);
        let reader = RecordReader::open(&folder.join(&f.file)).unwrap();
        for key in reader.streams().unwrap() {
            let _ = reader.samples(key).unwrap();
        }
    }
}
