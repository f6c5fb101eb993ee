//! Integration tests: TCP ingest over loopback (127.0.0.1, port 0) with the fault-injecting
//! sender, feeding the reorder stage; connection cap, authentication, idle timeout.

use csgate::packet::indices::sample_indices;
use csgate::packet::{
    KeyRing, NodeKey, Packet, RawValues, Sampling, StreamId, Units, WindowHeader,
};
use csgate::sources::tcp::{self, IngestStats};
use csgate::sources::{inject, FaultPlan, IngestConfig, Pace, WindowKey};
use csgate::stream::reorder::{ReorderConfig, ReorderEvent, Reorderer};
use std::collections::{BTreeMap, BTreeSet};
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{mpsc, oneshot};

fn packets(node: u32, channel: u16, count: u64, seeded: bool) -> Vec<Packet> {
    (0..count)
        .map(|seq| {
            let header = WindowHeader {
                stream: StreamId { node, channel },
                capture_id: 100 + node,
                seq,
                sample_rate_hz: 25_600.0,
                window_len: 256,
                hop_len: 128,
                t0_us: 1_700_000_000_000_000 + seq as i64 * 5_000,
                units: Units::MetersPerSecond2,
                scale: 1e-3,
                adc_bits: 16,
            };
            let m = 64;
            let sampling = if seeded {
                Sampling::Seeded {
                    seed: seq * 31 + u64::from(node),
                    m,
                }
            } else {
                Sampling::Explicit(sample_indices(seq + 7, 256, m))
            };
            let raw = RawValues::I16((0..m as i16).map(|k| k * 3 - (seq as i16)).collect());
            Packet::new(header, sampling, raw).unwrap()
        })
        .collect()
}

struct Gateway {
    addr: SocketAddr,
    stats: Arc<IngestStats>,
    rx: mpsc::Receiver<csgate::packet::Packet>,
    stop: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), tcp::IngestError>>,
}

async fn start(config: IngestConfig, capacity: usize) -> Gateway {
    let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let stats = Arc::new(IngestStats::default());
    let (tx, rx) = mpsc::channel(capacity);
    let (stop, stopped) = oneshot::channel::<()>();
    let task = tokio::spawn(tcp::run(listener, config, tx, stats.clone(), async {
        let _ = stopped.await;
    }));
    Gateway {
        addr,
        stats,
        rx,
        stop: Some(stop),
        task,
    }
}

impl Gateway {
    async fn shutdown(mut self) -> Vec<Packet> {
        self.stop.take().unwrap().send(()).unwrap();
        self.task.await.unwrap().unwrap();
        let mut rest = Vec::new();
        while let Some(p) = self.rx.recv().await {
            rest.push(p);
        }
        rest
    }
}

#[tokio::test]
async fn faulty_links_deliver_every_intact_window_once_in_order() {
    let key = NodeKey::new(vec![0x11; 16]);
    let mut config = IngestConfig::loopback_ephemeral();
    config.enrolled.insert("2".into(), "11".repeat(16));
    let gw = start(config, 8).await;
    let mut keys = KeyRing::new(false);
    keys.insert(2, key);
    let keys = Arc::new(keys);

    let (done_tx, mut done_rx) = mpsc::channel(8);
    let streams = [
        (1u32, 0u16, false),
        (2, 0, true),
        (3, 1, false),
        (3, 2, true),
    ];
    for (k, &(node, channel, seeded)) in streams.iter().enumerate() {
        let plan = FaultPlan {
            seed: 1000 + k as u64,
            drop_p: 0.1,
            duplicate_p: 0.1,
            reorder_p: 0.15,
            reorder_distance: 3,
            corrupt_p: 0.03,
            disconnect_p: 0.03,
            reboot_p: if k == 0 { 0.02 } else { 0.0 },
        };
        let (addr, keys, done_tx) = (gw.addr, keys.clone(), done_tx.clone());
        tokio::spawn(async move {
            let r = inject::send_packets(
                addr,
                packets(node, channel, 150, seeded),
                &keys,
                &plan,
                Pace::AsFastAsPossible,
            )
            .await
            .unwrap();
            done_tx.send(r).await.unwrap();
        });
    }
    drop(done_tx);

    let mut gw = gw;
    let mut reorder = Reorderer::new(ReorderConfig {
        horizon_windows: 32,
    });
    let mut events = Vec::new();
    let mut reports = Vec::new();
    loop {
        tokio::select! {
            Some(p) = gw.rx.recv() => events.extend(reorder.push(p)),
            r = done_rx.recv() => match r {
                Some(r) => reports.push(r),
                None => break,
            },
        }
    }
    for p in gw.shutdown().await {
        events.extend(reorder.push(p));
    }
    events.extend(reorder.flush_all());

    // Per (stream, capture): the windows in arrival order and the seqs declared lost.
    let mut windows: BTreeMap<(StreamId, u32), Vec<u64>> = BTreeMap::new();
    let mut gaps: BTreeMap<(StreamId, u32), BTreeSet<u64>> = BTreeMap::new();
    for e in &events {
        match e {
            ReorderEvent::Window(p) => windows
                .entry((p.stream(), p.header.capture_id))
                .or_default()
                .push(p.header.seq),
            ReorderEvent::Gap {
                stream,
                capture_id,
                from_seq,
                count,
            } => gaps
                .entry((*stream, *capture_id))
                .or_default()
                .extend(*from_seq..from_seq + count),
            _ => {}
        }
    }
    let mut expected: BTreeMap<(StreamId, u32), BTreeSet<u64>> = BTreeMap::new();
    let mut lost: BTreeMap<(StreamId, u32), BTreeSet<u64>> = BTreeMap::new();
    let (mut dropped, mut corrupted, mut dups, mut swaps, mut reboots) = (0, 0, 0, 0, 0);
    for r in &reports {
        for WindowKey {
            stream,
            capture_id,
            seq,
        } in &r.delivered
        {
            expected
                .entry((*stream, *capture_id))
                .or_default()
                .insert(*seq);
        }
        for WindowKey {
            stream,
            capture_id,
            seq,
        } in r.lost()
        {
            lost.entry((stream, capture_id)).or_default().insert(seq);
        }
        dropped += r.dropped.len();
        corrupted += r.corrupted.len();
        dups += r.duplicated;
        swaps += r.reordered;
        reboots += r.reboots;
    }
    assert!(
        dropped > 0 && dups > 0 && swaps > 0 && corrupted > 0 && reboots > 0,
        "plan too mild"
    );
    assert_eq!(
        windows.keys().collect::<Vec<_>>(),
        expected.keys().collect::<Vec<_>>()
    );
    for (key, seqs) in &windows {
        let want: Vec<u64> = expected[key].iter().copied().collect();
        assert_eq!(seqs, &want, "{key:?}: every intact window once, in order");
        // Lost windows before the last delivered one are gaps; after it nobody can know.
        let last = *want.last().unwrap();
        let want_gaps: BTreeSet<u64> = lost
            .get(key)
            .map(|l| l.iter().copied().filter(|&s| s < last).collect())
            .unwrap_or_default();
        assert_eq!(
            gaps.get(key).cloned().unwrap_or_default(),
            want_gaps,
            "{key:?}"
        );
    }
    for s in reorder.streams() {
        assert_eq!(
            reorder.stats(s).unwrap().late,
            0,
            "{s}: horizon covers the reordering"
        );
    }
}

#[tokio::test]
async fn connection_cap_holds_extra_connections_in_the_backlog() {
    let mut config = IngestConfig::loopback_ephemeral();
    config.max_connections = 2;
    config.send_acks = false;
    let mut gw = start(config, 16).await;
    let frames: Vec<Vec<u8>> = packets(1, 0, 3, false)
        .iter()
        .map(|p| csgate::packet::wire::encode_window_to_vec(p, None).unwrap())
        .collect();
    let mut a = TcpStream::connect(gw.addr).await.unwrap();
    let mut b = TcpStream::connect(gw.addr).await.unwrap();
    a.write_all(&frames[0]).await.unwrap();
    b.write_all(&frames[1]).await.unwrap();
    gw.rx.recv().await.unwrap();
    gw.rx.recv().await.unwrap();
    let mut c = TcpStream::connect(gw.addr).await.unwrap();
    c.write_all(&frames[2]).await.unwrap();
    assert!(
        tokio::time::timeout(Duration::from_millis(200), gw.rx.recv())
            .await
            .is_err(),
        "a third connection must wait for a permit"
    );
    assert_eq!(gw.stats.snapshot().connections_active, 2);
    drop(a);
    let p = gw.rx.recv().await.unwrap();
    assert_eq!(p.header.seq, 2);
    assert_eq!(gw.stats.snapshot().connections_accepted, 3);
    drop((b, c));
    gw.shutdown().await;
}

#[tokio::test]
async fn failed_authentication_is_counted_and_closes_the_connection() {
    let mut config = IngestConfig::loopback_ephemeral();
    config.enrolled.insert("1".into(), "22".repeat(16));
    let mut gw = start(config, 16).await;
    let p = &packets(1, 0, 1, false)[0];
    let wrong = NodeKey::new(vec![0x33; 16]);
    let right = NodeKey::new(vec![0x22; 16]);
    for (key, accepted) in [(None, false), (Some(&wrong), false), (Some(&right), true)] {
        let mut s = TcpStream::connect(gw.addr).await.unwrap();
        s.write_all(&csgate::packet::wire::encode_window_to_vec(p, key).unwrap())
            .await
            .unwrap();
        let mut buf = Vec::new();
        if accepted {
            assert!(gw.rx.recv().await.unwrap().is_authenticated());
            let mut ack = [0u8; 52];
            s.read_exact(&mut ack).await.unwrap();
            right
                .verify(&ack)
                .expect("acks to enrolled nodes are signed");
        } else {
            // The gateway closes: EOF (or reset) without any ack.
            let n = s.read_to_end(&mut buf).await.unwrap_or(0);
            assert_eq!(n, 0);
        }
    }
    let snap = gw.stats.snapshot();
    assert_eq!(
        (
            snap.auth_failures,
            snap.connections_rejected,
            snap.frames_accepted
        ),
        (2, 2, 1)
    );
    gw.shutdown().await;
}

#[tokio::test]
async fn corrupt_frame_closes_and_invalid_window_is_skipped() {
    let mut config = IngestConfig::loopback_ephemeral();
    config.send_acks = false;
    config.limits.max_window_len = 128;
    let mut gw = start(config, 16).await;
    let ps = packets(4, 0, 2, true);
    let too_long = csgate::packet::wire::encode_window_to_vec(&ps[0], None).unwrap();
    let mut s = TcpStream::connect(gw.addr).await.unwrap();
    s.write_all(&too_long).await.unwrap();
    let mut bad = too_long.clone();
    bad[40] ^= 1;
    s.write_all(&bad).await.unwrap();
    let mut rest = Vec::new();
    assert_eq!(s.read_to_end(&mut rest).await.unwrap_or(0), 0);
    let snap = gw.stats.snapshot();
    assert_eq!(
        (
            snap.validation_errors,
            snap.crc_errors,
            snap.connections_rejected
        ),
        (1, 1, 1)
    );
    assert!(gw.rx.try_recv().is_err());
    gw.shutdown().await;
}

#[tokio::test(start_paused = true)]
async fn idle_connections_time_out() {
    let mut config = IngestConfig::loopback_ephemeral();
    config.idle_timeout_ms = 5_000;
    let gw = start(config, 16).await;
    let mut s = TcpStream::connect(gw.addr).await.unwrap();
    let mut buf = [0u8; 1];
    // With the clock paused, tokio advances time to the idle deadline once all tasks wait.
    let n = s.read(&mut buf).await.unwrap_or(0);
    assert_eq!(n, 0);
    let snap = gw.stats.snapshot();
    assert_eq!((snap.idle_timeouts, snap.connections_active), (1, 0));
    gw.shutdown().await;
}

#[tokio::test]
async fn recording_option_writes_every_accepted_frame_to_a_packet_log() {
    let dir = crate::util::test_dir();
    let log_path = dir.path().join("recorded.cslog");
    let mut config = IngestConfig::loopback_ephemeral();
    config.send_acks = false;
    config.record_log = Some(log_path.clone());
    let mut gw = start(config, 64).await;
    let sent = packets(4, 1, 10, true);
    let frames: Vec<Vec<u8>> = sent
        .iter()
        .map(|p| csgate::packet::wire::encode_window_to_vec(p, None).unwrap())
        .collect();
    let mut s = TcpStream::connect(gw.addr).await.unwrap();
    for f in &frames {
        s.write_all(f).await.unwrap();
    }
    for _ in 0..frames.len() {
        gw.rx.recv().await.unwrap();
    }
    drop(s);
    gw.shutdown().await;
    // The log holds exactly the frames as received, in order (docs/wire-format.md section 8).
    let mut reader = csgate::packet::log::LogReader::open(&log_path).unwrap();
    let mut got = Vec::new();
    while let Some(r) = reader.next_record().unwrap() {
        got.push(r.frame.as_bytes().to_vec());
    }
    assert_eq!(got, frames);
    assert!(reader.stats().truncated.is_none());
}
