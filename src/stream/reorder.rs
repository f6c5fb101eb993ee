//! Jitter buffer per stream: puts windows back in sequence-number order, drops duplicates,
//! declares gaps and follows capture restarts. Pure state machine, no I/O and no clock: time
//! enters only as "later windows have arrived" (the reorder horizon) and as [`flush`].
//!
//! Sits between the packet stage (TCP ingest or log replay) and window assembly.
//!
//! Rules, per stream:
//! - Sequence numbers count windows within a capture from 0. A capture whose first window is
//!   within the horizon of 0 starts expecting seq 0 (earlier windows may still arrive out of
//!   order); one first seen further in was joined in progress and starts at that seq.
//! - A missing seq is declared a gap once a window `horizon` or more seqs past it has
//!   arrived, or at flush; a window arriving after its seq was declared lost is *late*: counted
//!   and dropped.
//! - A window whose seq was already delivered or is buffered is a *duplicate*: counted, dropped.
//! - A different capture id (the node rebooted or started a new acquisition) flushes the old
//!   capture (buffered windows in order, gaps between, `CaptureEnd`) and starts the new one.
//!   Windows of a recently ended capture arriving afterwards are late.
//!
//! [`flush`]: ReorderBuffer::flush

use crate::packet::{Packet, StreamId};
use serde::{Deserialize, Serialize};

/// What the buffer orders: anything that names its stream, capture and sequence number. The
/// gateway orders received [`Packet`]s; a broker recorder orders windows already
/// reconstructed by a worker (`pipeline::run::Arrival`).
pub trait Sequenced {
    /// The stream.
    fn stream(&self) -> StreamId;
    /// The capture.
    fn capture_id(&self) -> u32;
    /// The window's sequence number within its capture.
    fn seq(&self) -> u64;
}

impl Sequenced for Packet {
    fn stream(&self) -> StreamId {
        self.header.stream
    }
    fn capture_id(&self) -> u32 {
        self.header.capture_id
    }
    fn seq(&self) -> u64 {
        self.header.seq
    }
}
use std::collections::{BTreeMap, HashMap, VecDeque};

/// Reorder settings.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct ReorderConfig {
    /// How many windows past a missing one may arrive before it is declared lost. Default 16:
    /// TCP keeps one connection in order, so reordering comes only from reconnects racing
    /// each other, a few windows at most; 16 windows of 4096 at 25.6 kHz with 50% hop hold
    /// 1.3 s of added latency at worst (common practice for jitter buffers: a few times the
    /// expected disorder).
    pub horizon_windows: u64,
}

impl Default for ReorderConfig {
    fn default() -> Self {
        ReorderConfig {
            horizon_windows: 16,
        }
    }
}

/// What the buffer emits, in order.
#[derive(Debug, Clone, PartialEq)]
pub enum ReorderEvent<T = Packet> {
    /// A capture begins; its windows follow.
    CaptureStart {
        /// Stream.
        stream: StreamId,
        /// The new capture.
        capture_id: u32,
        /// The first seq this capture expects.
        first_seq: u64,
    },
    /// The next window in order.
    Window(T),
    /// Windows `from_seq .. from_seq + count` are lost.
    Gap {
        /// Stream.
        stream: StreamId,
        /// Capture.
        capture_id: u32,
        /// First lost seq.
        from_seq: u64,
        /// Number of lost windows.
        count: u64,
    },
    /// A capture ended (new capture id, or flush); `next_seq` is one past its last window.
    CaptureEnd {
        /// Stream.
        stream: StreamId,
        /// The capture that ended.
        capture_id: u32,
        /// One past the last seq emitted or declared lost.
        next_seq: u64,
    },
}

/// Counters of one stream.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct ReorderStats {
    /// Windows emitted.
    pub windows: u64,
    /// Duplicates dropped.
    pub duplicates: u64,
    /// Late windows dropped (seq already declared lost, or capture already ended).
    pub late: u64,
    /// Gap events.
    pub gaps: u64,
    /// Windows declared lost.
    pub lost_windows: u64,
    /// Captures started.
    pub captures: u64,
}

#[derive(Debug)]
struct Capture<T> {
    id: u32,
    next_seq: u64,
    pending: BTreeMap<u64, T>,
}

/// How many recent gaps and ended captures are remembered to tell late windows from
/// duplicates. Past that, an old seq counts as a duplicate; either way it is dropped.
const MEMORY: usize = 64;

/// The jitter buffer of one stream.
#[derive(Debug)]
pub struct ReorderBuffer<T = Packet> {
    stream: StreamId,
    horizon: u64,
    capture: Option<Capture<T>>,
    recent_gaps: VecDeque<(u32, u64, u64)>,
    ended: VecDeque<u32>,
    stats: ReorderStats,
}

impl<T: Sequenced> ReorderBuffer<T> {
    /// An empty buffer for `stream`.
    pub fn new(stream: StreamId, config: &ReorderConfig) -> ReorderBuffer<T> {
        ReorderBuffer {
            stream,
            horizon: config.horizon_windows.max(1),
            capture: None,
            recent_gaps: VecDeque::new(),
            ended: VecDeque::new(),
            stats: ReorderStats::default(),
        }
    }

    /// The stream.
    pub fn stream(&self) -> StreamId {
        self.stream
    }

    /// Counters so far.
    pub fn stats(&self) -> ReorderStats {
        self.stats
    }

    /// Windows currently held back.
    pub fn pending(&self) -> usize {
        self.capture.as_ref().map_or(0, |c| c.pending.len())
    }

    /// Takes one window and returns what can be emitted now.
    ///
    /// # Panics
    /// If the packet belongs to another stream (a routing bug; use [`Reorderer`]).
    pub fn push(&mut self, packet: T) -> impl Iterator<Item = ReorderEvent<T>> {
        assert_eq!(
            packet.stream(),
            self.stream,
            "packet routed to the wrong stream"
        );
        let mut out = Vec::new();
        let (capture_id, seq) = (packet.capture_id(), packet.seq());
        if self.capture.as_ref().is_some_and(|c| c.id != capture_id) {
            if self.ended.contains(&capture_id) {
                self.late(capture_id, seq, "capture already ended");
                return out.into_iter();
            }
            self.end_capture(&mut out);
        }
        if self.capture.is_none() {
            if self.ended.contains(&capture_id) {
                self.late(capture_id, seq, "capture already ended");
                return out.into_iter();
            }
            let first_seq = if seq < self.horizon { 0 } else { seq };
            self.capture = Some(Capture {
                id: capture_id,
                next_seq: first_seq,
                pending: BTreeMap::new(),
            });
            self.stats.captures += 1;
            out.push(ReorderEvent::CaptureStart {
                stream: self.stream,
                capture_id,
                first_seq,
            });
        }
        let cap = self.capture.as_mut().expect("capture set above");
        if seq < cap.next_seq {
            let in_gap = self
                .recent_gaps
                .iter()
                .any(|&(c, from, count)| c == capture_id && seq >= from && seq - from < count);
            if in_gap {
                self.late(capture_id, seq, "seq already declared lost");
            } else {
                self.stats.duplicates += 1;
                tracing::debug!(stream = %self.stream, capture_id, seq, "duplicate window dropped");
            }
            return out.into_iter();
        }
        if cap.pending.contains_key(&seq) {
            self.stats.duplicates += 1;
            tracing::debug!(stream = %self.stream, capture_id, seq, "duplicate window dropped");
            return out.into_iter();
        }
        cap.pending.insert(seq, packet);
        self.drain(&mut out, false);
        out.into_iter()
    }

    /// Emits everything held (with gaps between) and ends the current capture. Call at
    /// shutdown or when the stream's source is gone.
    pub fn flush(&mut self) -> impl Iterator<Item = ReorderEvent<T>> {
        let mut out = Vec::new();
        if self.capture.is_some() {
            self.end_capture(&mut out);
        }
        out.into_iter()
    }

    fn late(&mut self, capture_id: u32, seq: u64, why: &str) {
        self.stats.late += 1;
        tracing::warn!(stream = %self.stream, capture_id, seq, why, "late window dropped");
    }

    fn end_capture(&mut self, out: &mut Vec<ReorderEvent<T>>) {
        self.drain(out, true);
        let cap = self.capture.take().expect("a capture to end");
        out.push(ReorderEvent::CaptureEnd {
            stream: self.stream,
            capture_id: cap.id,
            next_seq: cap.next_seq,
        });
        if self.ended.len() == MEMORY {
            self.ended.pop_front();
        }
        self.ended.push_back(cap.id);
    }

    /// Emits in-order windows; declares gaps that the horizon (or `all`) has passed.
    fn drain(&mut self, out: &mut Vec<ReorderEvent<T>>, all: bool) {
        let Some(cap) = self.capture.as_mut() else {
            return;
        };
        loop {
            if let Some(p) = cap.pending.remove(&cap.next_seq) {
                out.push(ReorderEvent::Window(p));
                self.stats.windows += 1;
                cap.next_seq += 1;
                continue;
            }
            let (Some(&first), Some(&last)) =
                (cap.pending.keys().next(), cap.pending.keys().next_back())
            else {
                break;
            };
            if !all && last - cap.next_seq < self.horizon {
                break;
            }
            let count = first - cap.next_seq;
            out.push(ReorderEvent::Gap {
                stream: self.stream,
                capture_id: cap.id,
                from_seq: cap.next_seq,
                count,
            });
            tracing::info!(stream = %self.stream, capture_id = cap.id, from_seq = cap.next_seq, count, "windows lost");
            self.stats.gaps += 1;
            self.stats.lost_windows += count;
            if self.recent_gaps.len() == MEMORY {
                self.recent_gaps.pop_front();
            }
            self.recent_gaps.push_back((cap.id, cap.next_seq, count));
            cap.next_seq = first;
        }
    }
}

/// Jitter buffers for every stream, created on first sight.
#[derive(Debug)]
pub struct Reorderer<T = Packet> {
    config: ReorderConfig,
    streams: HashMap<StreamId, ReorderBuffer<T>>,
}

impl<T> Default for Reorderer<T> {
    fn default() -> Self {
        Reorderer {
            config: ReorderConfig::default(),
            streams: HashMap::new(),
        }
    }
}

impl<T: Sequenced> Reorderer<T> {
    /// No streams yet.
    pub fn new(config: ReorderConfig) -> Reorderer<T> {
        Reorderer {
            config,
            streams: HashMap::new(),
        }
    }

    /// Routes a window to its stream's buffer.
    pub fn push(&mut self, packet: T) -> impl Iterator<Item = ReorderEvent<T>> {
        let stream = packet.stream();
        self.streams
            .entry(stream)
            .or_insert_with(|| ReorderBuffer::new(stream, &self.config))
            .push(packet)
    }

    /// Flushes every stream (in stream order, so the output is deterministic).
    pub fn flush_all(&mut self) -> impl Iterator<Item = ReorderEvent<T>> {
        let mut ids: Vec<StreamId> = self.streams.keys().copied().collect();
        ids.sort();
        let mut out = Vec::new();
        for id in ids {
            out.extend(self.streams.get_mut(&id).expect("listed").flush());
        }
        out.into_iter()
    }

    /// Counters of one stream.
    pub fn stats(&self, stream: StreamId) -> Option<ReorderStats> {
        self.streams.get(&stream).map(ReorderBuffer::<T>::stats)
    }

    /// Every stream seen.
    pub fn streams(&self) -> impl Iterator<Item = StreamId> + '_ {
        self.streams.keys().copied()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::packet::{RawValues, Sampling, Units, WindowHeader};

    fn pkt(capture_id: u32, seq: u64) -> Packet {
        let header = WindowHeader {
            stream: StreamId {
                node: 1,
                channel: 0,
            },
            capture_id,
            seq,
            sample_rate_hz: 1000.0,
            window_len: 16,
            hop_len: 8,
            t0_us: seq as i64 * 8000,
            units: Units::Counts,
            scale: 1.0,
            adc_bits: 12,
        };
        Packet::new(
            header,
            Sampling::Explicit(vec![1, 5]),
            RawValues::I16(vec![0, 0]),
        )
        .unwrap()
    }

    fn summary(events: impl Iterator<Item = ReorderEvent>) -> Vec<String> {
        events
            .map(|e| match e {
                ReorderEvent::CaptureStart {
                    capture_id,
                    first_seq,
                    ..
                } => {
                    format!("start {capture_id}@{first_seq}")
                }
                ReorderEvent::Window(p) => format!("w{}", p.header.seq),
                ReorderEvent::Gap {
                    from_seq, count, ..
                } => format!("gap {from_seq}+{count}"),
                ReorderEvent::CaptureEnd {
                    capture_id,
                    next_seq,
                    ..
                } => {
                    format!("end {capture_id}@{next_seq}")
                }
            })
            .collect()
    }

    #[test]
    fn reorders_dedups_and_declares_gaps() {
        let mut r = ReorderBuffer::new(
            StreamId {
                node: 1,
                channel: 0,
            },
            &ReorderConfig { horizon_windows: 3 },
        );
        let mut ev = Vec::new();
        for seq in [1, 0, 0, 2, 5, 6, 7, 3, 8, 9] {
            ev.extend(summary(r.push(pkt(9, seq))));
        }
        ev.extend(summary(r.flush()));
        assert_eq!(
            ev,
            [
                "start 9@0",
                "w0",
                "w1",
                "w2",
                "gap 3+2",
                "w5",
                "w6",
                "w7",
                "w8",
                "w9",
                "end 9@10"
            ]
        );
        let s = r.stats();
        assert_eq!(
            (s.duplicates, s.late, s.lost_windows, s.windows),
            (1, 1, 2, 8)
        );
    }

    #[test]
    fn new_capture_flushes_old_and_stale_capture_is_late() {
        let mut r = ReorderBuffer::new(
            StreamId {
                node: 1,
                channel: 0,
            },
            &ReorderConfig { horizon_windows: 4 },
        );
        let mut ev = Vec::new();
        for (c, seq) in [(1, 0), (1, 2), (2, 0), (1, 3), (2, 1)] {
            ev.extend(summary(r.push(pkt(c, seq))));
        }
        assert_eq!(
            ev,
            [
                "start 1@0",
                "w0",
                "gap 1+1",
                "w2",
                "end 1@3",
                "start 2@0",
                "w0",
                "w1"
            ]
        );
        assert_eq!(r.stats().late, 1);
    }

    #[test]
    fn joining_a_capture_in_progress_is_not_a_gap() {
        let mut r = ReorderBuffer::new(
            StreamId {
                node: 1,
                channel: 0,
            },
            &ReorderConfig::default(),
        );
        let ev = summary(r.push(pkt(3, 1000)));
        assert_eq!(ev, ["start 3@1000", "w1000"]);
    }
}
