//! A fault-injecting frame sender: plays one node's side of the link for tests and the
//! simulator, damaging the traffic according to a seeded [`FaultPlan`] and reporting exactly
//! what it did, so a test can check that every window that went out intact arrives once.
//!
//! Faults: drop a frame, send a duplicate a few frames later, swap a frame with a later one,
//! flip one bit (the gateway must close the connection; the sender reconnects), disconnect
//! and reconnect after a frame, and reboot (new capture id, sequence numbers from 0, new
//! connection). Reordering and duplicates stay within one connection segment: across a
//! reconnect the sender waits until the gateway has closed the old connection (so it has
//! handed off every frame) before it opens the next one, as a node would after a link reset.

use crate::packet::indices::Pcg32;
use crate::packet::{wire, KeyRing, Packet, StreamId};
use bytes::{Bytes, BytesMut};
use std::collections::{BTreeSet, HashMap};
use std::net::SocketAddr;
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use tokio::task::JoinHandle;
use tokio_util::codec::Decoder;

/// Which faults to inject, with what probability per frame. All zero by default.
#[derive(Debug, Clone, PartialEq)]
pub struct FaultPlan {
    /// Seed of the fault generator (PCG32, stream 0x5EED); same seed, same faults.
    pub seed: u64,
    /// Probability that a frame is never sent.
    pub drop_p: f64,
    /// Probability that a frame is sent again up to `reorder_distance` frames later.
    pub duplicate_p: f64,
    /// Probability that a frame swaps places with one up to `reorder_distance` frames later.
    pub reorder_p: f64,
    /// How far (in frames) duplicates and swaps reach; at least 1.
    pub reorder_distance: usize,
    /// Probability that one bit of a frame is flipped (the connection is then reset).
    pub corrupt_p: f64,
    /// Probability of disconnecting and reconnecting after a frame.
    pub disconnect_p: f64,
    /// Probability that the node reboots before a frame (only for [`send_packets`]).
    pub reboot_p: f64,
}

impl Default for FaultPlan {
    fn default() -> Self {
        FaultPlan {
            seed: 0,
            drop_p: 0.0,
            duplicate_p: 0.0,
            reorder_p: 0.0,
            reorder_distance: 1,
            corrupt_p: 0.0,
            disconnect_p: 0.0,
            reboot_p: 0.0,
        }
    }
}

/// How fast to send.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Pace {
    /// Back to back.
    AsFastAsPossible,
    /// At the windows' timestamps (`t0_us`) relative to the first, divided by `speed`
    /// (2.0 sends twice as fast as real time). Uses tokio's clock, so it can be paused.
    RealTime {
        /// Speed-up factor, > 0.
        speed: f64,
    },
}

/// Identity of one window on the wire.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct WindowKey {
    /// Stream.
    pub stream: StreamId,
    /// Capture id.
    pub capture_id: u32,
    /// Sequence number.
    pub seq: u64,
}

/// What the sender did.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SendReport {
    /// Frames given.
    pub frames_in: usize,
    /// Frame writes (duplicates and corrupted copies included).
    pub frames_written: usize,
    /// Windows sent intact at least once, in order of first intact send, as numbered on the
    /// wire (after reboots).
    pub delivered: Vec<WindowKey>,
    /// Windows never sent.
    pub dropped: Vec<WindowKey>,
    /// Windows whose only copies were corrupted.
    pub corrupted: Vec<WindowKey>,
    /// Extra copies sent.
    pub duplicated: usize,
    /// Swaps made.
    pub reordered: usize,
    /// Bit flips made.
    pub bit_flips: usize,
    /// Connections opened after the first.
    pub reconnects: usize,
    /// Reboots simulated.
    pub reboots: usize,
    /// Acknowledgement frames received.
    pub acks_received: usize,
}

impl SendReport {
    /// Windows that did not go out intact: dropped or corrupted, sorted.
    pub fn lost(&self) -> Vec<WindowKey> {
        let mut v: Vec<WindowKey> = self
            .dropped
            .iter()
            .chain(&self.corrupted)
            .copied()
            .collect();
        v.sort();
        v
    }
}

#[derive(Debug, Clone)]
struct Outgoing {
    key: Option<WindowKey>,
    t0_us: Option<i64>,
    bytes: Bytes,
}

/// Encodes `packets` (authenticating nodes that have a key in `keys`), applies the plan
/// (reboots renumber captures and seqs before encoding) and sends them to `target`.
pub async fn send_packets(
    target: SocketAddr,
    packets: Vec<Packet>,
    keys: &KeyRing,
    plan: &FaultPlan,
    pace: Pace,
) -> std::io::Result<SendReport> {
    let mut rng = Pcg32::new(plan.seed, 0x5EED);
    let mut report = SendReport::default();
    let mut segments: Vec<Vec<Outgoing>> = vec![Vec::new()];
    // Per node: capture-id offset; per stream: seq base, or None until its next packet after a
    // reboot sets it.
    let mut capture_shift: HashMap<u32, u32> = HashMap::new();
    let mut seq_base: HashMap<StreamId, Option<u64>> = HashMap::new();
    for (k, mut p) in packets.into_iter().enumerate() {
        let node = p.header.stream.node;
        if k > 0 && chance(&mut rng, plan.reboot_p) {
            report.reboots += 1;
            *capture_shift.entry(node).or_insert(0) += 1 + rng.bounded(1000);
            for (s, base) in seq_base.iter_mut() {
                if s.node == node {
                    *base = None;
                }
            }
            segments.push(Vec::new());
        }
        let shift = capture_shift.get(&node).copied().unwrap_or(0);
        let base = seq_base.entry(p.header.stream).or_insert(Some(0));
        let base = *base.get_or_insert(p.header.seq);
        p.header.capture_id = p.header.capture_id.wrapping_add(shift);
        p.header.seq -= base.min(p.header.seq);
        let mut buf = BytesMut::new();
        wire::encode_window(&p, keys.get(node), &mut buf)
            .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidInput, e))?;
        segments.last_mut().expect("one segment").push(Outgoing {
            key: Some(window_key(&p)),
            t0_us: Some(p.header.t0_us),
            bytes: buf.freeze(),
        });
    }
    report.frames_in = segments.iter().map(Vec::len).sum();
    run_plan(target, segments, plan, pace, rng, report).await
}

/// Sends already-encoded frames (one frame per item) with the plan's faults except reboots.
/// Window frames are identified in the report by the header fields at their fixed offsets.
pub async fn send_encoded(
    target: SocketAddr,
    frames: Vec<Bytes>,
    plan: &FaultPlan,
    pace: Pace,
) -> std::io::Result<SendReport> {
    let rng = Pcg32::new(plan.seed, 0x5EED);
    let report = SendReport {
        frames_in: frames.len(),
        ..SendReport::default()
    };
    let items = frames
        .into_iter()
        .map(|bytes| {
            let is_window = bytes.len() >= wire::WINDOW_FIXED_LEN && bytes[9] == wire::KIND_WINDOW;
            let le32 = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().expect("4"));
            let (key, t0_us) = if is_window {
                (
                    Some(WindowKey {
                        stream: StreamId {
                            node: le32(12),
                            channel: u16::from_le_bytes([bytes[16], bytes[17]]),
                        },
                        capture_id: le32(20),
                        seq: u64::from_le_bytes(bytes[24..32].try_into().expect("8")),
                    }),
                    Some(i64::from_le_bytes(bytes[48..56].try_into().expect("8"))),
                )
            } else {
                (None, None)
            };
            Outgoing { key, t0_us, bytes }
        })
        .collect();
    run_plan(target, vec![items], plan, pace, rng, report).await
}

fn window_key(p: &Packet) -> WindowKey {
    WindowKey {
        stream: p.header.stream,
        capture_id: p.header.capture_id,
        seq: p.header.seq,
    }
}

fn chance(rng: &mut Pcg32, p: f64) -> bool {
    p > 0.0 && rng.unit_f64() < p
}

enum Step {
    Send { item: Outgoing, flip: Option<usize> },
    Reconnect,
}

async fn run_plan(
    target: SocketAddr,
    segments: Vec<Vec<Outgoing>>,
    plan: &FaultPlan,
    pace: Pace,
    mut rng: Pcg32,
    mut report: SendReport,
) -> std::io::Result<SendReport> {
    let reach = plan.reorder_distance.max(1);
    let mut steps = Vec::new();
    for (s, segment) in segments.into_iter().enumerate() {
        if s > 0 {
            steps.push(Step::Reconnect);
        }
        let mut kept = Vec::with_capacity(segment.len());
        for item in segment {
            if chance(&mut rng, plan.drop_p) {
                report.dropped.extend(item.key);
            } else {
                kept.push(item);
            }
        }
        for i in 0..kept.len() {
            if chance(&mut rng, plan.reorder_p) {
                let j = i + 1 + rng.bounded(reach as u32) as usize;
                if j < kept.len() {
                    kept.swap(i, j);
                    report.reordered += 1;
                }
            }
        }
        let mut order: Vec<Outgoing> = Vec::with_capacity(kept.len());
        let mut later: Vec<(usize, Outgoing)> = Vec::new();
        for (i, item) in kept.into_iter().enumerate() {
            if chance(&mut rng, plan.duplicate_p) {
                later.push((i + 1 + rng.bounded(reach as u32) as usize, item.clone()));
                report.duplicated += 1;
            }
            order.push(item);
            let (due, rest): (Vec<_>, Vec<_>) = later.into_iter().partition(|(at, _)| *at <= i);
            later = rest;
            order.extend(due.into_iter().map(|(_, it)| it));
        }
        order.extend(later.into_iter().map(|(_, it)| it));
        for item in order {
            let flip = chance(&mut rng, plan.corrupt_p)
                .then(|| rng.bounded((item.bytes.len() * 8) as u32) as usize);
            let reset = flip.is_some();
            steps.push(Step::Send { item, flip });
            if reset || chance(&mut rng, plan.disconnect_p) {
                steps.push(Step::Reconnect);
            }
        }
    }
    while matches!(steps.last(), Some(Step::Reconnect)) {
        steps.pop();
    }

    let mut intact: BTreeSet<WindowKey> = BTreeSet::new();
    let mut damaged: Vec<WindowKey> = Vec::new();
    let mut conn = Link::open(target).await?;
    let clock_start = tokio::time::Instant::now();
    let mut first_t0: Option<i64> = None;
    for step in steps {
        match step {
            Step::Reconnect => {
                report.acks_received += conn.close().await?;
                conn = Link::open(target).await?;
                report.reconnects += 1;
            }
            Step::Send { item, flip } => {
                if let (Pace::RealTime { speed }, Some(t0)) = (pace, item.t0_us) {
                    let base = *first_t0.get_or_insert(t0);
                    let offset_us = ((t0 - base).max(0) as f64 / speed.max(1e-9)) as u64;
                    tokio::time::sleep_until(clock_start + Duration::from_micros(offset_us)).await;
                }
                report.frames_written += 1;
                match flip {
                    Some(bit) => {
                        let mut bytes = item.bytes.to_vec();
                        bytes[bit / 8] ^= 1 << (bit % 8);
                        report.bit_flips += 1;
                        damaged.extend(item.key);
                        conn.write(&bytes).await?;
                    }
                    None => {
                        if let Some(key) = item.key {
                            if intact.insert(key) {
                                report.delivered.push(key);
                            }
                        }
                        conn.write(&item.bytes).await?;
                    }
                }
            }
        }
    }
    report.acks_received += conn.close().await?;
    damaged.sort();
    damaged.dedup();
    report.corrupted = damaged
        .into_iter()
        .filter(|k| !intact.contains(k))
        .collect();
    report.dropped.sort();
    Ok(report)
}

/// One connection: a write half and a task draining acks from the read half.
struct Link {
    write: tokio::net::tcp::OwnedWriteHalf,
    reader: JoinHandle<usize>,
    broken: bool,
}

impl Link {
    async fn open(target: SocketAddr) -> std::io::Result<Link> {
        let stream = TcpStream::connect(target).await?;
        stream.set_nodelay(true)?;
        let (mut read, write) = stream.into_split();
        let reader = tokio::spawn(async move {
            let mut codec = crate::packet::FrameCodec::default();
            let mut buf = BytesMut::new();
            let mut acks = 0;
            loop {
                match read.read_buf(&mut buf).await {
                    Ok(0) | Err(_) => return acks,
                    Ok(_) => {}
                }
                while let Ok(Some(frame)) = codec.decode(&mut buf) {
                    if frame.kind() == wire::KIND_ACK {
                        acks += 1;
                    }
                }
            }
        });
        Ok(Link {
            write,
            reader,
            broken: false,
        })
    }

    async fn write(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        if self.broken {
            return Ok(());
        }
        // A gateway that closed on a corrupt frame makes later writes fail; the report still
        // describes what was attempted.
        if self.write.write_all(bytes).await.is_err() {
            self.broken = true;
        }
        Ok(())
    }

    /// Half-closes and waits until the gateway closes its side, i.e. has read everything.
    async fn close(mut self) -> std::io::Result<usize> {
        let _ = self.write.shutdown().await;
        self.reader
            .await
            .map_err(|e| std::io::Error::other(format!("ack reader failed: {e}")))
    }
}
