//! A simulated node that follows the gateway's sampling advice: it sends its windows over one
//! TCP connection at real-time pace (or a multiple of it), reads what the gateway sends back,
//! and from the next window on sends the number of samples the latest advice asks for.
//!
//! Advice is per stream (wire format 5.2); a node samples all its channels at the same instants
//! (one index set per window, see [`super::run::NodeSim`]), so it takes the largest advice over
//! its channels. Control frames are checked like the gateway checks windows: CRC by the codec,
//! the tag with the node's key when it has one (an advice that fails is ignored and counted).

use super::run::{key_ring, NodeSim, SimError, Simulation};
use super::scenario::Scenario;
use crate::packet::wire::{self, CONTROL_SAMPLING_ADVICE, TLV_REQUESTED_M};
use crate::packet::{Frame, FrameCodec, Limits, StreamId};
use bytes::BytesMut;
use serde::Serialize;
use std::collections::HashMap;
use std::net::SocketAddr;
use std::time::{Duration, Instant};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;
use tokio::sync::mpsc;
use tokio_util::codec::Decoder;

/// What one node did.
#[derive(Debug, Clone, Default, Serialize)]
pub struct AdvisedNode {
    /// Node id.
    pub node: u32,
    /// Samples per window of every window sent, in order.
    pub m_per_window: Vec<u32>,
    /// Advice messages received and followed.
    pub advice_received: usize,
    /// Control frames ignored (bad tag, unknown type or field).
    pub advice_ignored: usize,
    /// Acknowledgements received.
    pub acks: usize,
    /// Window frames sent.
    pub frames: usize,
}

/// Runs every node of `sim` to `target` on its own connection, following advice; `speed` is
/// the pace as a multiple of real time (`f64::INFINITY`: as fast as possible, which leaves the
/// advice no time to arrive).
pub async fn send_following_advice(
    sim: Simulation,
    scenario: &Scenario,
    target: SocketAddr,
    speed: f64,
) -> Result<Vec<AdvisedNode>, SimError> {
    if speed.is_nan() || speed <= 0.0 {
        return Err(SimError::Option(format!(
            "speed must be positive, got {speed}"
        )));
    }
    let keys = key_ring(scenario);
    let mut tasks = tokio::task::JoinSet::new();
    for node in sim.into_nodes() {
        let keys = keys.clone();
        tasks.spawn(async move { run_node(node, keys, target, speed).await });
    }
    let mut out = Vec::new();
    while let Some(j) = tasks.join_next().await {
        out.push(j.map_err(|e| SimError::Option(format!("node task failed: {e}")))??);
    }
    out.sort_by_key(|n| n.node);
    Ok(out)
}

/// Messages from the reader half.
enum Back {
    Advice(StreamId, u32),
    Ignored,
    Ack,
}

async fn run_node(
    mut node: NodeSim,
    keys: crate::packet::KeyRing,
    target: SocketAddr,
    speed: f64,
) -> Result<AdvisedNode, SimError> {
    let send_err = |source: std::io::Error| SimError::Send { target, source };
    let stream = TcpStream::connect(target).await.map_err(send_err)?;
    stream.set_nodelay(true).ok();
    let (mut read, mut write) = stream.into_split();
    let (back_tx, mut back_rx) = mpsc::unbounded_channel::<Back>();
    let reader_keys = keys.clone();
    let reader = tokio::spawn(async move {
        let mut codec = FrameCodec::default();
        let mut buf = BytesMut::with_capacity(4096);
        let limits = Limits::default();
        loop {
            match read.read_buf(&mut buf).await {
                Ok(0) | Err(_) => return,
                Ok(_) => {}
            }
            while let Ok(Some(raw)) = codec.decode(&mut buf) {
                let bytes = raw.as_bytes();
                if reader_keys.check(bytes).is_err() {
                    let _ = back_tx.send(Back::Ignored);
                    continue;
                }
                let msg = match wire::parse(bytes, &limits) {
                    Ok(Frame::Ack(_)) => Back::Ack,
                    Ok(Frame::Control(c)) if c.msg_type == CONTROL_SAMPLING_ADVICE => c
                        .fields
                        .iter()
                        .find(|f| f.tag == TLV_REQUESTED_M && f.value.len() == 4)
                        .map(|f| {
                            let m = u32::from_le_bytes(f.value[..4].try_into().expect("4 bytes"));
                            Back::Advice(c.stream, m)
                        })
                        .unwrap_or(Back::Ignored),
                    _ => Back::Ignored,
                };
                let _ = back_tx.send(msg);
            }
        }
    });

    let key = node.spec().key();
    let mut report = AdvisedNode {
        node: node.spec().id,
        ..AdvisedNode::default()
    };
    let mut advice: HashMap<StreamId, u32> = HashMap::new();
    let started = Instant::now();
    let t_first = node.next_ready_us();
    let mut frame = Vec::new();
    while let Some(ready) = node.next_ready_us() {
        // Real-time pace: window k leaves when its last sample would have been taken.
        if speed.is_finite() {
            let due = Duration::from_secs_f64(
                (ready - t_first.unwrap_or(ready)).max(0) as f64 * 1e-6 / speed,
            );
            if let Some(wait) = due.checked_sub(started.elapsed()) {
                tokio::time::sleep(wait).await;
            }
        }
        let mut changed = false;
        while let Ok(msg) = back_rx.try_recv() {
            match msg {
                Back::Advice(s, m) => {
                    report.advice_received += 1;
                    advice.insert(s, m);
                    changed = true;
                }
                Back::Ignored => report.advice_ignored += 1,
                Back::Ack => report.acks += 1,
            }
        }
        if changed {
            if let Some(&m) = advice.values().max() {
                node.set_sample_count(m);
            }
        }
        report.m_per_window.push(node.sample_count());
        let Some(w) = node.next_window()? else {
            break;
        };
        for p in &w.packets {
            frame.clear();
            frame.extend_from_slice(
                &wire::encode_window_to_vec(p, key.as_ref())
                    .map_err(|e| SimError::Frame(e.to_string()))?,
            );
            write.write_all(&frame).await.map_err(send_err)?;
            report.frames += 1;
        }
    }
    // Half-close and wait for the gateway to close its side (it has read everything).
    write.shutdown().await.map_err(send_err)?;
    let _ = tokio::time::timeout(Duration::from_secs(30), reader).await;
    while let Ok(msg) = back_rx.try_recv() {
        match msg {
            Back::Advice(..) => report.advice_received += 1,
            Back::Ignored => report.advice_ignored += 1,
            Back::Ack => report.acks += 1,
        }
    }
    Ok(report)
}
