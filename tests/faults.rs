//! Fault injection against the running gateway (`csgate::daemon::Gateway`, as `csgate serve`
//! runs it) over loopback. Each test damages the traffic, the peers or the record folder in one
//! way and checks the outcome written above it: the log line an operator sees, the counter in
//! `/metrics`, and that nothing valid is lost from the record.
//!
//! The nodes here are hand-driven sockets sending windows built by [`window`] (n = 256, hop
//! 128 at 25.6 kHz, seeded samples: quick solves), so each test decides exactly which bytes go
//! out when; an acknowledgement read back is the sign that the gateway accepted a window.
//! Covered elsewhere and not repeated: random drops, duplicates, swaps, bit flips, disconnects
//! and reboots on many streams at once (`tcp_ingest::faulty_links_deliver_every_intact_window_once_in_order`,
//! `serve::simulated_nodes_to_records_with_metrics_and_feed`); a silent peer
//! (`tcp_ingest::idle_connections_time_out`); the exact permit count of the connection cap
//! (`tcp_ingest::connection_cap_holds_extra_connections_in_the_backlog`); SIGTERM and restart
//! (`serve::sigterm_closes_every_record_and_a_restart_starts_a_new_file`); a killed record
//! writer (`store::sigkill_leaves_a_readable_record`).

use crate::serve::{free_port, http_get, metric};
use crate::util::{csgate_bin, test_dir};
use csgate::daemon::config::NodeEntry;
use csgate::daemon::{DaemonError, Gateway, GatewayConfig, ServeReport, Shutdown};
use csgate::packet::indices::sample_indices;
use csgate::packet::{wire, NodeKey, Packet, RawValues, Sampling, StreamId, Units, WindowHeader};
use csgate::store::{
    GapRow, RecordIndex, RecordReader, SegmentRow, StreamKey, WindowRow, WriteFault,
};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

const N: u32 = 256;
const HOP: u32 = 128;
const FS: f64 = 25_600.0;
/// 2026-12-01 12:00:00 UTC, microseconds.
const T0_US: i64 = 1_796_126_400_000_000;

/// Window `seq` of a capture of node `node` (channel 0): two tones at `m` seeded instants.
fn window(node: u32, capture: u32, seq: u64, m: u32) -> Packet {
    let seed = (u64::from(node) << 40) ^ (u64::from(capture) << 20) ^ seq;
    let indices = sample_indices(seed, N, m);
    let values = indices
        .iter()
        .map(|&i| {
            let t = seq.wrapping_mul(u64::from(HOP)).wrapping_add(u64::from(i)) as f64 / FS;
            let w = 2.0 * std::f64::consts::PI * t;
            ((1000.0 * w).sin() + 0.5 * (3150.0 * w).sin()) as f32
        })
        .collect();
    let header = WindowHeader {
        stream: StreamId { node, channel: 0 },
        capture_id: capture,
        seq,
        sample_rate_hz: FS,
        window_len: N,
        hop_len: HOP,
        t0_us: T0_US.saturating_add((seq as f64 * f64::from(HOP) / FS * 1e6) as i64),
        units: Units::MetersPerSecond2,
        scale: 1.0,
        adc_bits: 16,
    };
    Packet::new(header, Sampling::Seeded { seed, m }, RawValues::F32(values)).unwrap()
}

fn frame(p: &Packet, key: Option<&NodeKey>) -> Vec<u8> {
    wire::encode_window_to_vec(p, key).unwrap()
}

fn stream(node: u32) -> StreamKey {
    StreamKey::new(node, 0)
}

/// A gateway running in this process.
struct Running {
    ingest: SocketAddr,
    http: SocketAddr,
    shutdown: Shutdown,
    run: tokio::task::JoinHandle<Result<ServeReport, DaemonError>>,
    folder: PathBuf,
    fault: WriteFault,
}

async fn start(dir: &Path, tweak: impl FnOnce(&mut GatewayConfig)) -> Running {
    let folder = dir.join("records");
    let mut config = GatewayConfig::loopback_ephemeral(&folder);
    config.pipeline.workers = 1;
    tweak(&mut config);
    let gateway = Gateway::bind(config, "faults".into()).await.unwrap();
    let (ingest, http) = (gateway.ingest_addr(), gateway.http_addr().unwrap());
    let fault = gateway.record_write_fault();
    let shutdown = Shutdown::new();
    let run = tokio::spawn(gateway.run(shutdown.clone()));
    Running {
        ingest,
        http,
        shutdown,
        run,
        folder,
        fault,
    }
}

impl Running {
    async fn metrics(&self) -> String {
        http_get(self.http, "/metrics").await.1
    }

    /// Scrapes `/metrics` until `done` holds; bounded by a count of scrapes, not a clock.
    async fn wait_for(&self, what: &str, done: impl Fn(&str) -> bool) -> String {
        let mut text = String::new();
        for _ in 0..800 {
            text = self.metrics().await;
            if done(&text) {
                return text;
            }
            tokio::time::sleep(Duration::from_millis(25)).await;
        }
        panic!("{what}: not reached; last scrape:\n{text}");
    }

    /// Waits until the pipeline has taken every accepted frame.
    async fn settle(&self) -> String {
        self.wait_for("pipeline caught up", |t| {
            let accepted = metric(t, "csgate_frames_accepted_total", None);
            accepted == metric(t, "csgate_pipeline_packets_total", None)
                && metric(t, "csgate_queue_depth", None) == 0.0
        })
        .await
    }

    async fn stop(self) -> (ServeReport, PathBuf) {
        self.shutdown.signal();
        let report = self.run.await.unwrap().unwrap();
        assert!(!report.forced, "the drain completed");
        (report, self.folder)
    }
}

/// A node's connection.
struct Node(TcpStream);

impl Node {
    async fn connect(addr: SocketAddr) -> Node {
        Node(TcpStream::connect(addr).await.unwrap())
    }

    async fn send(&mut self, bytes: &[u8]) {
        self.0.write_all(bytes).await.unwrap();
    }

    /// Reads one acknowledgement: (capture id, seq) of the window it acknowledges (wire
    /// format section 5.1).
    async fn ack(&mut self) -> (u32, u64) {
        let mut head = [0u8; 8];
        self.0.read_exact(&mut head).await.unwrap();
        assert_eq!(head[..4], wire::MAGIC);
        let len = u32::from_le_bytes(head[4..8].try_into().unwrap()) as usize;
        let mut rest = vec![0u8; len - 8];
        self.0.read_exact(&mut rest).await.unwrap();
        let capture = u32::from_le_bytes(rest[12..16].try_into().unwrap());
        let seq = u64::from_le_bytes(rest[16..24].try_into().unwrap());
        (capture, seq)
    }

    /// Sends each window and reads its acknowledgement.
    async fn send_windows(&mut self, windows: &[Packet], key: Option<&NodeKey>) {
        for p in windows {
            self.send(&frame(p, key)).await;
        }
        for p in windows {
            assert_eq!(self.ack().await, (p.header.capture_id, p.header.seq));
        }
    }

    /// The gateway closes: end of stream (or a reset) with no acknowledgement.
    async fn expect_closed(mut self) {
        let mut buf = Vec::new();
        let n = self.0.read_to_end(&mut buf).await.unwrap_or(0);
        assert_eq!(n, 0, "closed without an acknowledgement");
    }
}

/// One stream's tables over every file of the record folder, in series order.
#[derive(Debug, Default)]
struct Tables {
    windows: Vec<WindowRow>,
    gaps: Vec<GapRow>,
    segments: Vec<SegmentRow>,
    samples: Vec<f32>,
}

fn tables(folder: &Path, key: StreamKey) -> Tables {
    let mut t = Tables::default();
    for f in RecordIndex::load(folder).unwrap().files {
        let r = RecordReader::open(&folder.join(&f.file)).unwrap();
        if !r.streams().unwrap().contains(&key) {
            continue;
        }
        t.windows.extend(r.windows(key).unwrap());
        t.gaps.extend(r.gaps(key).unwrap());
        t.segments.extend(r.segments(key).unwrap());
        t.samples.extend(r.samples(key).unwrap());
    }
    t
}

fn seqs(rows: &[WindowRow]) -> Vec<(u32, u64)> {
    rows.iter().map(|w| (w.capture_id, w.seq)).collect()
}

fn all_streams(folder: &Path) -> std::collections::BTreeSet<StreamKey> {
    let mut s = std::collections::BTreeSet::new();
    for f in RecordIndex::load(folder).unwrap().files {
        let r = RecordReader::open(&folder.join(&f.file)).unwrap();
        s.extend(r.streams().unwrap());
    }
    s
}

/// A node whose link drops in the middle of a frame, then reconnects and goes on with the same
/// capture. Expected: the gateway logs "connection ended inside a frame; the partial frame is
/// discarded" and counts it in `csgate_frames_rejected_total{reason="truncated"}` (not as a
/// connection it rejected); the record holds every window the node sent whole: 0..9 in order,
/// one segment, no gap (the node sent window 5 again on the new connection).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_node_cut_off_mid_frame_loses_only_the_partial_frame() {
    let dir = test_dir();
    let gw = start(dir.path(), |_| {}).await;
    let ws: Vec<Packet> = (0..10).map(|s| window(1, 100, s, 64)).collect();
    let mut a = Node::connect(gw.ingest).await;
    a.send_windows(&ws[..5], None).await;
    let cut = frame(&ws[5], None);
    a.send(&cut[..cut.len() / 2]).await;
    drop(a);
    let text = gw
        .wait_for("the cut frame counted", |t| {
            metric(
                t,
                "csgate_frames_rejected_total",
                Some("reason=\"truncated\""),
            ) == 1.0
        })
        .await;
    assert_eq!(
        metric(&text, "csgate_connections_rejected_total", None),
        0.0
    );
    let mut b = Node::connect(gw.ingest).await;
    b.send_windows(&ws[5..], None).await;
    drop(b);
    let (report, folder) = gw.stop().await;
    assert_eq!(
        (
            report.ingest.frames_accepted,
            report.ingest.truncated_frames
        ),
        (10, 1)
    );
    let t = tables(&folder, stream(1));
    assert_eq!(
        seqs(&t.windows),
        (0..10).map(|s| (100, s)).collect::<Vec<_>>()
    );
    assert!(t.gaps.is_empty(), "{:?}", t.gaps);
    assert_eq!(t.segments.len(), 1);
    assert!(t.samples.iter().all(|v| v.is_finite()));
}

/// Reconnects. Expected: a new connection with the same capture id continues the capture
/// (docs/wire-format.md section 7): windows in order, one segment, no gap. A new capture id
/// starts a new segment of the stream where the previous capture's samples end (a `segments`
/// row with the new capture id), also with no gap; nothing is counted lost or rejected.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reconnecting_continues_a_capture_and_a_new_capture_starts_a_segment() {
    let dir = test_dir();
    let gw = start(dir.path(), |_| {}).await;
    let plan: [(u32, std::ops::Range<u64>); 3] = [(100, 0..5), (100, 5..8), (200, 0..4)];
    for (capture, range) in plan {
        let ws: Vec<Packet> = range.map(|s| window(2, capture, s, 64)).collect();
        let mut node = Node::connect(gw.ingest).await;
        node.send_windows(&ws, None).await;
    }
    let (report, folder) = gw.stop().await;
    assert_eq!(report.pipeline.lost_windows, 0);
    assert_eq!(report.ingest.connections_rejected, 0);
    let t = tables(&folder, stream(2));
    let want: Vec<(u32, u64)> = (0..8)
        .map(|s| (100, s))
        .chain((0..4).map(|s| (200, s)))
        .collect();
    assert_eq!(seqs(&t.windows), want);
    assert!(t.gaps.is_empty(), "{:?}", t.gaps);
    // Capture 100: 8 windows cover 7 hops + n = 1152 samples; capture 200 then 3 hops + n.
    let first_end = 7 * u64::from(HOP) + u64::from(N);
    let segs: Vec<(u64, u32)> = t
        .segments
        .iter()
        .map(|s| (s.start_sample, s.capture_id))
        .collect();
    assert_eq!(segs, [(0, 100), (first_end, 200)]);
    assert_eq!(
        t.samples.len() as u64,
        first_end + 3 * u64::from(HOP) + u64::from(N)
    );
    assert!(t.samples.iter().all(|v| v.is_finite()));
}

/// Duplicated, reordered and very late windows on one connection, with a reorder horizon of 4
/// windows. Expected: the duplicate is dropped and counted
/// (`csgate_frames_dropped_total{reason="duplicate"}`); windows swapped within the horizon are
/// put back in order; window 7, held back until 4 later windows have arrived, is declared lost
/// ("windows lost" in the log, `csgate_windows_lost_total`), and when it does arrive it is
/// dropped as late ("late window dropped", `{reason="late"}`), as is a window of a capture that
/// has already ended. The record holds every other window once, in order. Window 7 leaves no
/// gap row: with 50% overlap its neighbours cover its span (docs/hdf5-layout.md, "Missing
/// windows that leave no hole").
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn duplicated_reordered_and_late_windows_are_dropped_and_counted() {
    let dir = test_dir();
    let gw = start(dir.path(), |c| c.pipeline.reorder.horizon_windows = 4).await;
    let order: Vec<(u32, u64)> = [0, 1, 2, 1, 4, 3, 5, 6, 8, 9, 10, 11, 7]
        .iter()
        .map(|&s| (100, s))
        .chain([(300, 0), (300, 1), (100, 12)])
        .collect();
    let ws: Vec<Packet> = order.iter().map(|&(c, s)| window(3, c, s, 64)).collect();
    let mut node = Node::connect(gw.ingest).await;
    node.send_windows(&ws, None).await;
    let text = gw.settle().await;
    let dropped = |why: &str| {
        metric(
            &text,
            "csgate_frames_dropped_total",
            Some(&format!("reason=\"{why}\"")),
        )
    };
    assert_eq!(
        (dropped("duplicate"), dropped("late")),
        (1.0, 2.0),
        "{text}"
    );
    assert_eq!(metric(&text, "csgate_windows_lost_total", None), 1.0);
    drop(node);
    let (report, folder) = gw.stop().await;
    assert_eq!(report.ingest.frames_accepted, 16);
    let p = &report.pipeline;
    assert_eq!(
        (p.windows, p.duplicates, p.late, p.lost_windows),
        (13, 1, 2, 1)
    );
    let t = tables(&folder, stream(3));
    let want: Vec<(u32, u64)> = (0..12)
        .filter(|&s| s != 7)
        .map(|s| (100, s))
        .chain([(300, 0), (300, 1)])
        .collect();
    assert_eq!(seqs(&t.windows), want);
    assert!(t.gaps.is_empty(), "{:?}", t.gaps);
    assert!(t.samples.iter().all(|v| v.is_finite()));
}

/// A window absurdly far ahead of its stream (a seq counter jumping by 10^12, or a forged frame
/// on a gateway that does not require authentication), and one so far that its position on the
/// stream's grid cannot be represented (seq 2^63). Expected: the 10^12 skipped windows are
/// counted lost (`csgate_windows_lost_total`) at the cost of one entry, and the record starts a
/// new segment after the jump instead of writing NaN for the hole (docs/hdf5-layout.md, long
/// gaps), so the file stays small; the window beyond range is dropped and counted
/// (`csgate_frames_dropped_total{reason="out_of_range"}`, "too far from the start of its
/// capture" in the log). Regression: the dispatcher used to queue one entry per lost window
/// and the analytics stage walked a gap block by block, so one such frame stalled the gateway.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_window_far_ahead_costs_no_memory_and_one_out_of_range_is_dropped() {
    const JUMP: u64 = 1_000_000_000_000;
    let dir = test_dir();
    let gw = start(dir.path(), |_| {}).await;
    let order: Vec<(u32, u64)> = (0..4)
        .map(|s| (100, s))
        .chain([(100, JUMP), (100, JUMP + 1), (101, 0), (101, 1 << 63)])
        .collect();
    let ws: Vec<Packet> = order.iter().map(|&(c, s)| window(4, c, s, 64)).collect();
    let mut node = Node::connect(gw.ingest).await;
    node.send_windows(&ws, None).await;
    let text = gw.settle().await;
    assert_eq!(
        metric(
            &text,
            "csgate_frames_dropped_total",
            Some("reason=\"out_of_range\"")
        ),
        1.0
    );
    drop(node);
    let (report, folder) = gw.stop().await;
    let p = &report.pipeline;
    assert_eq!((p.windows, p.out_of_range), (7, 1));
    assert_eq!(p.lost_windows, (JUMP - 4) + ((1u64 << 63) - 1));
    let t = tables(&folder, stream(4));
    let want: Vec<(u32, u64)> = order[..7].to_vec();
    assert_eq!(seqs(&t.windows), want);
    let caps: Vec<u32> = t.segments.iter().map(|s| s.capture_id).collect();
    assert_eq!(caps, [100, 100, 101], "a new segment after the jump");
    // Three short stretches of samples, not 10^14 samples of NaN.
    assert!(t.samples.len() < 8 * N as usize, "{}", t.samples.len());
}

/// Frames the gateway must refuse, from an enrolled node in the middle of a good capture and
/// from strangers, with `require_auth` on. Expected for each: the connection is closed at
/// once; the frame is counted by reason in `csgate_frames_rejected_total` (a CRC error: `crc`;
/// a wrong tag or no tag from the enrolled node, and frames of a node that is not enrolled,
/// tagged or not: `unauthenticated`; a length field above the 1 MiB limit, refused from its
/// first 8 bytes without waiting for the rest: `decode`); `csgate_connections_rejected_total`
/// counts the closes; the log says why ("corrupt frame, closing connection", "authentication
/// failed, closing connection"). The record is untouched: node 7's stream holds exactly the
/// windows of its valid frames (the refused copies of window 5 carried other content, m = 32,
/// and the recorded window 5 has m = 64), and no other stream appears.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn refused_frames_are_counted_close_the_connection_and_leave_the_record_untouched() {
    let dir = test_dir();
    let key = NodeKey::new(vec![0x5A; 16]);
    let wrong = NodeKey::new(vec![0xA5; 16]);
    let gw = start(dir.path(), |c| {
        c.ingest.require_auth = true;
        c.nodes = vec![NodeEntry {
            id: 7,
            name: "enrolled".into(),
            key: Some("5a".repeat(16)),
            advise: false,
        }];
    })
    .await;
    let good: Vec<Packet> = (0..10).map(|s| window(7, 100, s, 64)).collect();
    let mut node = Node::connect(gw.ingest).await;
    node.send_windows(&good[..5], Some(&key)).await;

    let other = window(7, 100, 5, 32);
    let mut crc = frame(&other, Some(&key));
    crc[80] ^= 0x10;
    let mut too_long = frame(&window(9, 1, 0, 64), None)[..12].to_vec();
    too_long[4..8].copy_from_slice(&(2u32 << 20).to_le_bytes());
    let bad: [Vec<u8>; 6] = [
        crc,
        frame(&other, Some(&wrong)),
        frame(&other, None),
        frame(&window(9, 1, 0, 64), None),
        frame(&window(9, 1, 0, 64), Some(&wrong)),
        too_long,
    ];
    for bytes in &bad {
        let mut s = Node::connect(gw.ingest).await;
        s.send(bytes).await;
        s.expect_closed().await;
    }
    node.send_windows(&good[5..], Some(&key)).await;
    let text = gw.settle().await;
    let rejected = |why: &str| {
        metric(
            &text,
            "csgate_frames_rejected_total",
            Some(&format!("reason=\"{why}\"")),
        )
    };
    assert_eq!(
        (
            rejected("crc"),
            rejected("unauthenticated"),
            rejected("decode")
        ),
        (1.0, 4.0, 1.0),
        "{text}"
    );
    assert_eq!(
        metric(&text, "csgate_connections_rejected_total", None),
        6.0
    );
    drop(node);
    let (report, folder) = gw.stop().await;
    assert_eq!(report.ingest.frames_accepted, 10);
    assert_eq!(
        all_streams(&folder).into_iter().collect::<Vec<_>>(),
        [stream(7)]
    );
    let t = tables(&folder, stream(7));
    assert_eq!(
        seqs(&t.windows),
        (0..10).map(|s| (100, s)).collect::<Vec<_>>()
    );
    assert!(t.windows.iter().all(|w| w.m == 64), "only the valid frames");
}

/// A peer that opens a connection and sends one byte a minute of an otherwise valid frame.
/// Expected: the idle timeout (default 60 s) bounds the time to complete a frame, not the pause
/// between bytes, so the trickle does not keep the connection: it is closed at the first
/// timeout, counted in `idle_timeouts` (`csgate_idle_timeouts_total`; "idle timeout, closing"
/// in the log), and no frame is accepted. tokio's paused clock runs the minutes instantly.
#[tokio::test(start_paused = true)]
async fn a_peer_trickling_one_byte_a_minute_is_cut_at_the_idle_timeout() {
    use csgate::sources::tcp::{self, IngestStats};
    use csgate::sources::IngestConfig;
    use std::sync::Arc;
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let stats = Arc::new(IngestStats::default());
    let (tx, mut rx) = tokio::sync::mpsc::channel(16);
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let config = IngestConfig::loopback_ephemeral();
    assert_eq!(config.idle_timeout_ms, 60_000);
    let task = tokio::spawn(tcp::run(listener, config, tx, stats.clone(), async {
        let _ = stopped.await;
    }));
    let bytes = frame(&window(5, 1, 0, 64), None);
    let mut s = TcpStream::connect(addr).await.unwrap();
    for &b in &bytes[..3] {
        if s.write_all(&[b]).await.is_err() {
            break;
        }
        tokio::time::sleep(Duration::from_secs(60)).await;
    }
    let mut rest = Vec::new();
    assert_eq!(s.read_to_end(&mut rest).await.unwrap_or(0), 0);
    let snap = stats.snapshot();
    assert_eq!(
        (
            snap.idle_timeouts,
            snap.frames_accepted,
            snap.connections_active
        ),
        (1, 0, 0)
    );
    stop.send(()).unwrap();
    task.await.unwrap().unwrap();
    assert!(rx.recv().await.is_none());
}

/// Ten times more nodes than the connection cap (4), with the cap first filled by 4 silent
/// peers. Expected: the silent peers are cut at the idle timeout (300 ms here), which frees
/// their slots; the 40 nodes wait in the listen backlog and are served at most 4 at a time
/// (`csgate_connections_active` never above 4 at any scrape); every window of every node is
/// recorded (40 streams x 3 windows); `csgate_connections_accepted_total` is 44 and
/// `csgate_idle_timeouts_total` 4.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn ten_times_the_connection_cap_waits_its_turn_and_loses_nothing() {
    const CAP: usize = 4;
    const NODES: u32 = 40;
    let dir = test_dir();
    let gw = start(dir.path(), |c| {
        c.ingest.max_connections = CAP;
        c.ingest.idle_timeout_ms = 300;
    })
    .await;
    let mut silent = Vec::new();
    for _ in 0..CAP {
        silent.push(TcpStream::connect(gw.ingest).await.unwrap());
    }
    gw.wait_for("the silent peers hold every slot", |t| {
        metric(t, "csgate_connections_active", None) == CAP as f64
    })
    .await;
    let mut nodes = tokio::task::JoinSet::new();
    for k in 0..NODES {
        let addr = gw.ingest;
        nodes.spawn(async move {
            let ws: Vec<Packet> = (0..3).map(|s| window(100 + k, 1, s, 64)).collect();
            let mut node = Node::connect(addr).await;
            node.send_windows(&ws, None).await;
        });
    }
    let mut most = 0.0f64;
    while !nodes.is_empty() {
        most = most.max(metric(
            &gw.metrics().await,
            "csgate_connections_active",
            None,
        ));
        while let Some(done) = nodes.try_join_next() {
            done.unwrap();
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert!(most <= CAP as f64, "{most} connections at once");
    let text = gw.settle().await;
    assert_eq!(
        metric(&text, "csgate_connections_accepted_total", None),
        44.0
    );
    assert_eq!(metric(&text, "csgate_idle_timeouts_total", None), 4.0);
    drop(silent);
    let (report, folder) = gw.stop().await;
    assert_eq!(report.ingest.frames_accepted, 3 * u64::from(NODES));
    assert_eq!(report.pipeline.windows, 3 * u64::from(NODES));
    assert_eq!(all_streams(&folder).len(), NODES as usize);
    for k in 0..NODES {
        let t = tables(&folder, stream(100 + k));
        assert_eq!(
            seqs(&t.windows),
            [(1, 0), (1, 1), (1, 2)],
            "node {}",
            100 + k
        );
    }
}

/// Many nodes connecting at once while a record file is open (after a restart of the gateway,
/// or when a site's power comes back). Expected: their new streams wait
/// `record.new_stream_wait_ms` (1 s here) and then share one new file, instead of costing one
/// new file each (HDF5 cannot add a stream to a file in SWMR mode; with a hundred nodes the
/// file-per-stream rotations kept the writer busy for tens of seconds in `csgate loadtest`);
/// every window is recorded.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn nodes_connecting_together_share_one_new_record_file() {
    const NODES: u32 = 30;
    let dir = test_dir();
    let gw = start(dir.path(), |c| c.record.new_stream_wait_ms = 1000).await;
    let files = |folder: &Path| RecordIndex::load(folder).map_or(0, |i| i.files.len());
    let mut first = Node::connect(gw.ingest).await;
    first
        .send_windows(
            &(0..3).map(|s| window(200, 1, s, 64)).collect::<Vec<_>>(),
            None,
        )
        .await;
    for _ in 0..400 {
        if files(&gw.folder) == 1 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(files(&gw.folder), 1, "the first file is open");
    let mut nodes = tokio::task::JoinSet::new();
    for k in 0..NODES {
        let addr = gw.ingest;
        nodes.spawn(async move {
            let ws: Vec<Packet> = (0..3).map(|s| window(300 + k, 1, s, 64)).collect();
            Node::connect(addr).await.send_windows(&ws, None).await;
        });
    }
    while let Some(done) = nodes.join_next().await {
        done.unwrap();
    }
    // The wait ends on its own (not only at shutdown).
    for _ in 0..400 {
        if files(&gw.folder) == 2 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(files(&gw.folder), 2);
    drop(first);
    let (_, folder) = gw.stop().await;
    let index = RecordIndex::load(&folder).unwrap();
    assert_eq!(index.files.len(), 2, "{index:?}");
    assert_eq!(index.files[1].streams.len(), NODES as usize + 1);
    for node in std::iter::once(200).chain(300..300 + NODES) {
        let t = tables(&folder, stream(node));
        assert_eq!(seqs(&t.windows), [(1, 0), (1, 1), (1, 2)], "node {node}");
    }
}

/// How a test makes the record folder unwritable and writable again.
#[derive(Clone)]
enum Breaker {
    /// The record writer's fault switch (a full disk, `ENOSPC`).
    Hook(WriteFault),
    /// Permissions on the folder (read-only); works only when not running as root.
    ReadOnly(PathBuf),
}

impl Breaker {
    fn set(&self, broken: bool) {
        match self {
            Breaker::Hook(f) => f.set(broken),
            Breaker::ReadOnly(folder) => {
                use std::os::unix::fs::PermissionsExt;
                let mode = if broken { 0o500 } else { 0o700 };
                std::fs::set_permissions(folder, std::fs::Permissions::from_mode(mode)).unwrap();
            }
        }
    }
}

/// The record folder fills up (or turns read-only) while nodes send, and later recovers.
/// Expected:
/// - the error is reported: "cannot write the record: ..." in the log,
///   `csgate_record_write_errors_total` 1, `csgate_record_writable` 0, and `/health` says
///   `"record":"failing"`;
/// - ingest goes on and keeps its memory bound: with queues of 8 packets, 4 windows and 8
///   record messages, every window sent during the outage is still accepted and acknowledged,
///   which is only possible because the writer keeps taking and discarding;
/// - what could not be written is counted (`csgate_record_dropped_rows_total`,
///   `csgate_record_dropped_samples_total`): at least every window missing from the record;
/// - the gateway recovers: at the first retry after space returns it opens a new file ("record
///   writing resumed in a new file"), every window sent after that is in it, and the stretch
///   that could not be written is a gap at its start (NaN with a gap row of reason 0);
/// - the file that was open when the error came is left as it was at its last flush: readable,
///   `closed` null in index.json, its windows a run from 0.
async fn outage_and_recovery(dir: &Path, read_only: bool) {
    let gw = start(dir, |c| {
        c.record.flush_interval_ms = 100;
        c.record.write_retry_ms = 200;
        c.ingest.channel_capacity = 8;
        c.pipeline.max_queued_windows = 4;
        c.record.queue_capacity = 8;
    })
    .await;
    let breaker = if read_only {
        Breaker::ReadOnly(gw.folder.clone())
    } else {
        Breaker::Hook(gw.fault.clone())
    };
    let mut seq = 0u64;
    let mut node = Node::connect(gw.ingest).await;
    let batch =
        |from: u64, to: u64| -> Vec<Packet> { (from..to).map(|s| window(6, 1, s, 64)).collect() };
    node.send_windows(&batch(0, 20), None).await;
    seq += 20;
    // Wait for a flush that holds samples.
    let mut flushed = false;
    for _ in 0..400 {
        if let Ok(index) = RecordIndex::load(&gw.folder) {
            if index
                .files
                .first()
                .is_some_and(|f| f.streams.iter().any(|s| s.samples > 0))
            {
                flushed = true;
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    assert!(flushed, "the record was never flushed");

    breaker.set(true);
    // The writer notices at its next write or flush (a read-only folder: at the next index
    // update); keep the node sending until it has.
    let mut noticed = false;
    for _ in 0..400 {
        node.send_windows(&batch(seq, seq + 1), None).await;
        seq += 1;
        if metric(&gw.metrics().await, "csgate_record_writable", None) == 0.0 {
            noticed = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(noticed, "the write error was never noticed");
    node.send_windows(&batch(seq, seq + 40), None).await;
    seq += 40;
    let text = gw
        .wait_for("the outage counted", |t| {
            metric(t, "csgate_record_dropped_rows_total", None) > 0.0
        })
        .await;
    assert_eq!(metric(&text, "csgate_record_writable", None), 0.0);
    assert_eq!(metric(&text, "csgate_record_write_errors_total", None), 1.0);
    assert!(metric(&text, "csgate_record_dropped_samples_total", None) > 0.0);
    let (_, health) = http_get(gw.http, "/health").await;
    assert!(health.contains("\"record\":\"failing\""), "{health}");

    breaker.set(false);
    let mut resumed_at = None;
    for _ in 0..400 {
        node.send_windows(&batch(seq, seq + 1), None).await;
        seq += 1;
        if metric(&gw.metrics().await, "csgate_record_writable", None) == 1.0 {
            resumed_at = Some(seq);
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let resumed_at = resumed_at.expect("writing never resumed");
    node.send_windows(&batch(seq, seq + 10), None).await;
    let last = seq + 10;
    drop(node);
    let (report, folder) = gw.stop().await;
    assert_eq!(report.ingest.frames_accepted, last);
    assert_eq!(report.record_write_errors, 1);

    let index = RecordIndex::load(&folder).unwrap();
    assert!(index.files.len() >= 2, "{index:?}");
    let first = &index.files[0];
    assert_eq!(
        first.closed, None,
        "the abandoned file is not marked closed"
    );
    let r = RecordReader::open(&folder.join(&first.file)).unwrap();
    let early: Vec<u64> = r
        .windows(stream(6))
        .unwrap()
        .iter()
        .map(|w| w.seq)
        .collect();
    assert!(!early.is_empty());
    assert_eq!(early, (0..early.len() as u64).collect::<Vec<_>>());
    let newest = index.files.last().unwrap();
    assert_eq!(newest.close_reason.as_deref(), Some("shutdown"));
    let r = RecordReader::open(&folder.join(&newest.file)).unwrap();
    let late: Vec<u64> = r
        .windows(stream(6))
        .unwrap()
        .iter()
        .map(|w| w.seq)
        .collect();
    for s in resumed_at..last {
        assert!(
            late.contains(&s),
            "window {s} after the recovery is recorded"
        );
    }
    let gaps = r.gaps(stream(6)).unwrap();
    assert!(
        gaps.first()
            .is_some_and(|g| g.start_sample == 0 && g.length > 0 && g.reason == 0),
        "{gaps:?}"
    );
    let recorded = tables(&folder, stream(6)).windows.len() as u64;
    assert!(report.record_dropped_rows >= last - recorded);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_full_record_disk_is_reported_counted_and_recovered_from() {
    let dir = test_dir();
    outage_and_recovery(dir.path(), false).await;
}

/// The same with the folder made read-only by its permissions (skipped when running as root,
/// e.g. in CI, where permissions are not enforced; the write-fault switch above stands in).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_read_only_record_folder_is_reported_counted_and_recovered_from() {
    use std::os::unix::fs::PermissionsExt;
    let dir = test_dir();
    let probe = dir.path().join("probe");
    std::fs::create_dir(&probe).unwrap();
    std::fs::set_permissions(&probe, std::fs::Permissions::from_mode(0o500)).unwrap();
    let enforced = std::fs::write(probe.join("x"), b"").is_err();
    std::fs::set_permissions(&probe, std::fs::Permissions::from_mode(0o700)).unwrap();
    if !enforced {
        eprintln!("skipped: permissions are not enforced for this user (root)");
        return;
    }
    outage_and_recovery(dir.path(), true).await;
}

/// `csgate serve` killed with SIGKILL while nodes send, then started again on the same folder.
/// Expected: every window flushed before the kill is readable from the killed run's file (SWMR:
/// no repair needed), which is left with `closed` null in index.json and no `closed` row; the
/// restart opens a new file with the next sequence number, continues the node's capture there,
/// does not touch the killed file's bytes, and ends with exit 0 on SIGTERM.
#[test]
fn sigkill_then_restart_keeps_every_flushed_window_and_continues_in_a_new_file() {
    let dir = test_dir();
    let port = free_port();
    let config = dir.path().join("gateway.toml");
    std::fs::write(
        &config,
        format!(
            "[ingest]\nlisten = \"127.0.0.1:{port}\"\n[http]\nenabled = false\n\
             [pipeline]\nworkers = 1\n[record]\nfolder = \"records\"\nflush_interval_ms = 100\n\
             [log]\nformat = \"json\"\n"
        ),
    )
    .unwrap();
    let folder = dir.path().join("records");
    let addr: SocketAddr = format!("127.0.0.1:{port}").parse().unwrap();
    let rt = tokio::runtime::Runtime::new().unwrap();
    let spawn = || {
        Command::new(csgate_bin())
            .args(["serve", "--config"])
            .arg(&config)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap()
    };
    let send = |from: u64, to: u64| {
        rt.block_on(async {
            let mut node = None;
            for _ in 0..400 {
                if let Ok(s) = TcpStream::connect(addr).await {
                    node = Some(Node(s));
                    break;
                }
                tokio::time::sleep(Duration::from_millis(25)).await;
            }
            let mut node = node.expect("the gateway never listened");
            let ws: Vec<Packet> = (from..to).map(|s| window(8, 42, s, 64)).collect();
            node.send_windows(&ws, None).await;
        })
    };

    let mut child = spawn();
    send(0, 30);
    // Every window's hop is final once the next window arrives: 30 windows, 30 hops.
    let want_samples = 30 * u64::from(HOP);
    let mut flushed = None;
    for _ in 0..400 {
        if let Ok(index) = RecordIndex::load(&folder) {
            if let Some(f) = index.files.last() {
                if f.streams.iter().any(|s| s.samples >= want_samples) {
                    flushed = Some(f.file.clone());
                    break;
                }
            }
        }
        std::thread::sleep(Duration::from_millis(25));
    }
    let killed_file = flushed.expect("the windows were never flushed");
    child.kill().unwrap(); // SIGKILL
    child.wait().unwrap();

    let index = RecordIndex::load(&folder).unwrap();
    let entry = index.files.iter().find(|f| f.file == killed_file).unwrap();
    assert_eq!(entry.closed, None);
    let path = folder.join(&killed_file);
    let check_killed = || {
        let r = RecordReader::open(&path).unwrap();
        let w: Vec<u64> = r
            .windows(stream(8))
            .unwrap()
            .iter()
            .map(|w| w.seq)
            .collect();
        assert_eq!(w, (0..30).collect::<Vec<_>>(), "every flushed window");
        assert!(r.sample_count(stream(8)).unwrap() >= want_samples);
        assert!(r.closed().unwrap().is_empty(), "no clean close recorded");
    };
    check_killed();
    let bytes = std::fs::read(&path).unwrap();

    let mut child = spawn();
    send(30, 40);
    let status = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    assert_eq!(child.wait().unwrap().code(), Some(0));

    let index = RecordIndex::load(&folder).unwrap();
    let killed_seq = index
        .files
        .iter()
        .find(|f| f.file == killed_file)
        .unwrap()
        .seq;
    let newest = index.files.last().unwrap();
    assert!(newest.seq > killed_seq, "a new file");
    assert_eq!(newest.close_reason.as_deref(), Some("shutdown"));
    let r = RecordReader::open(&folder.join(&newest.file)).unwrap();
    let w: Vec<(u32, u64)> = seqs(&r.windows(stream(8)).unwrap());
    assert_eq!(w, (30..40).map(|s| (42, s)).collect::<Vec<_>>());
    assert_eq!(
        std::fs::read(&path).unwrap(),
        bytes,
        "the killed file is untouched"
    );
    check_killed();
}

/// The load test's short run: a few nodes for two seconds, with some frames corrupted on
/// purpose. Expected: every book balances (frames sent = accepted + rejected by reason; windows
/// accepted = window rows + failed + dropped; window rows in the records = windows
/// reconstructed), the corrupted frames are exactly the CRC rejections, and no queue exceeds its
/// capacity. The full run (100 nodes, 60 s) is `csgate loadtest`; figures in BENCHMARKS.md.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn load_test_short_run_balances_its_books() {
    let dir = test_dir();
    let opts = csgate::loadtest::LoadOptions {
        nodes: 6,
        duration: Duration::from_secs(2),
        sample_rate_hz: 2560.0,
        window_len: 256,
        hop_len: 128,
        m: 64,
        workers: 1,
        in_flight: 4,
        buffer_windows: 16,
        corrupt_p: 0.02,
        seed: 7,
        sample_every: Duration::from_millis(250),
        folder: dir.path().join("records"),
    };
    let r = csgate::loadtest::run(opts).await.unwrap();
    assert!(r.balanced(), "{}", csgate::loadtest::render(&r));
    assert!(r.nodes.frames_sent > 100);
    assert_eq!(r.rejected.crc, r.nodes.frames_corrupted);
    assert_eq!(
        r.nodes.windows_generated,
        r.nodes.frames_sent + r.nodes.dropped_at_nodes + r.nodes.unsent_at_end
    );
    assert!(r.packets_queue.max <= r.packets_queue.capacity);
    assert!(r.solver_queue.max <= r.solver_queue.capacity);
    assert_eq!(r.record.streams, 6);
}
