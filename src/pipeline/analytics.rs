//! The analytics stage: condition-monitoring features of the stitched record, per stream, on
//! blocks of a fixed length, into the record (`peaks`, `indicators`) and to the event sinks.
//!
//! ```text
//! dispatcher ──(bounded channel: samples, gaps, window trust)──► analytics thread
//!     ──► features::FeatureExtractor per stream ──► RecordMsg::Peak / Indicator ──► writer
//!                                               └─► FeatureEvent ──► EventSink(s)
//! ```
//!
//! # Why a thread of its own
//! Feature extraction is numerical work, so it must not run on an I/O thread, and it must not
//! lengthen the dispatcher's loop (which feeds the solver workers). Measured on the demo log
//! (`csgate replay demo-data/demo-site.cslog ... --workers 1 --json`: `analytics_busy_s` 0.34
//! against `solve_busy_s` 5.0 without trust and 10.8 with it, for 72 stream-seconds), one
//! second of one stream at 25.6 kHz costs 4.7 ms of features against 69 ms of reconstruction
//! (150 ms with the trust figures): 7% (3%). One dedicated thread keeps up with many streams
//! and the solver pool keeps every core it has. The channel
//! is bounded ([`AnalyticsConfig::channel_capacity`]): if the thread falls behind, the
//! dispatcher blocks on it and back-pressure reaches the sources, as for the writer.
//!
//! # Blocks
//! Blocks lie on the capture's grid: block `j` covers grid positions `[j B, (j+1) B)`, with `B`
//! the block length ([`AnalyticsConfig::block_len`]: `block_s` rounded to the nearest whole
//! number of hops). A block is analysed once its last sample has been stitched.
//! - A block touched by a gap is **skipped**: no rows, no event, counted in
//!   [`AnalyticsStats::skipped_gap`]. NaN is never analysed, and features of a block with a
//!   hole in it would be biased without saying so.
//! - The tail of a capture shorter than one block is not analysed.
//! - A block is low trust when any window overlapping it was assessed as low trust; its
//!   indicator row has `low_trust = 1` and its event says why.
//!
//! Ordering with the record: at a capture restart the dispatcher waits until this thread has
//! finished the old capture before it sends the new segment, so rows never land on the wrong
//! segment of `samples`.

use super::events::{EventError, EventSink};
use crate::features::kinematics::Kinematics;
use crate::features::severity::Zone;
use crate::features::{indicators::AccelUnit, BlockTrust, FeatureConfig, FeatureExtractor};
use crate::store::{RecordMsg, StreamKey};
use serde::{Deserialize, Serialize};
use std::collections::{HashMap, VecDeque};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{Receiver, SyncSender};
use std::sync::Arc;
use std::time::Instant;

/// The machine behind one node (or one channel of it).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MachineEntry {
    /// Node id.
    pub node: u32,
    /// Channel; absent: every channel of the node.
    #[serde(default)]
    pub channel: Option<u16>,
    /// Shaft speed, bearings and gears.
    pub machine: Kinematics,
}

/// Settings of the analytics stage (serde; every field has a documented default).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AnalyticsConfig {
    /// Compute features. Default on.
    pub enabled: bool,
    /// Block length, seconds, rounded to the nearest whole number of hops (at least one).
    /// Default 1 s: at 25.6 kHz that averages about a dozen 4096-sample Welch segments
    /// (6.25 Hz bins) for the direct spectrum and three 8192-sample ones (3.1 Hz bins) for the
    /// envelope spectrum, enough to separate BPFO and its harmonics on most machines, while a
    /// change still shows within a second.
    pub block_s: f64,
    /// Block length in hops, overriding `block_s` when set. Default unset.
    pub block_hops: Option<u32>,
    /// Messages the dispatcher may queue for the analytics thread. Default 1024 (a few
    /// seconds of a ten-stream site; about 8 MiB of f32 samples at most).
    pub channel_capacity: usize,
    /// Peaks of each spectrum listed in an event (labelled ones first). Default 5.
    pub top_peaks: usize,
    /// Feature extraction settings (spectrum, peaks, labels, envelope, severity).
    pub features: FeatureConfig,
    /// Machine of streams without an entry in `machines`. Default: shaft speed estimated
    /// from the spectrum, no bearings, no gears (only shaft harmonics get labels).
    pub default_machine: Kinematics,
    /// Machines per node or node channel; a channel entry wins over a node entry.
    pub machines: Vec<MachineEntry>,
}

impl Default for AnalyticsConfig {
    fn default() -> Self {
        Self {
            enabled: true,
            block_s: 1.0,
            block_hops: None,
            channel_capacity: 1024,
            top_peaks: 5,
            features: FeatureConfig::default(),
            default_machine: Kinematics::default(),
            machines: Vec::new(),
        }
    }
}

impl AnalyticsConfig {
    /// The machine of stream `(node, channel)`.
    pub fn kinematics_for(&self, node: u32, channel: u16) -> &Kinematics {
        self.machines
            .iter()
            .find(|e| e.node == node && e.channel == Some(channel))
            .or_else(|| {
                self.machines
                    .iter()
                    .find(|e| e.node == node && e.channel.is_none())
            })
            .map_or(&self.default_machine, |e| &e.machine)
    }

    /// Block length in samples for a stream at `sample_rate_hz` with hop `hop_len`.
    pub fn block_len(&self, sample_rate_hz: f64, hop_len: u32) -> usize {
        let hop = hop_len.max(1) as usize;
        let hops = match self.block_hops {
            Some(h) => h.max(1) as usize,
            None => ((self.block_s * sample_rate_hz / hop as f64).round() as usize).max(1),
        };
        hops * hop
    }

    /// Checks the settings; the message names the field.
    pub fn check(&self) -> Result<(), String> {
        if !(self.block_s.is_finite() && self.block_s > 0.0) {
            return Err(format!(
                "analytics.block_s must be positive, got {}",
                self.block_s
            ));
        }
        if self.channel_capacity == 0 {
            return Err("analytics.channel_capacity must be at least 1".into());
        }
        FeatureExtractor::new(self.features)
            .map(|_| ())
            .map_err(|e| format!("analytics.features: {e}"))
    }
}

/// Counters of the analytics stage.
#[derive(Debug, Default)]
pub struct AnalyticsStats {
    /// Blocks analysed.
    pub blocks: AtomicU64,
    /// Blocks analysed whose windows included a low-trust one.
    pub low_trust_blocks: AtomicU64,
    /// Blocks skipped because a gap touched them.
    pub skipped_gap: AtomicU64,
    /// Blocks whose analysis failed (logged).
    pub failed: AtomicU64,
    /// Peak rows sent to the record.
    pub peak_rows: AtomicU64,
    /// Events sent to the sinks.
    pub events: AtomicU64,
    /// Nanoseconds spent in feature extraction.
    pub busy_ns: AtomicU64,
}

/// What the dispatcher tells the analytics thread, per stream slot, in stream order.
#[derive(Debug)]
pub(crate) enum AnalyticsMsg {
    /// A capture starts: grid position 0 is at `t0_unix_ns`.
    Capture {
        slot: usize,
        key: StreamKey,
        sample_rate_hz: f64,
        t0_unix_ns: i64,
        hop_len: u32,
        units: String,
    },
    /// A reconstructed window's trust (sent before any of its samples).
    Window {
        slot: usize,
        start: u64,
        len: u64,
        /// `None`: not assessed; else (cv_error, low).
        trust: Option<(f64, bool)>,
    },
    /// Stitched samples from grid position `start`.
    Samples {
        slot: usize,
        start: u64,
        samples: Vec<f32>,
    },
    /// Samples no window covers.
    Gap { slot: usize, start: u64, len: u64 },
    /// The capture ended (its tail is dropped).
    End { slot: usize },
    /// Answer on the channel once everything before has been handled.
    Barrier(SyncSender<()>),
}

struct WindowMark {
    start: u64,
    end: u64,
    trust: Option<(f64, bool)>,
}

struct StreamState {
    key: StreamKey,
    sample_rate_hz: f64,
    t0_unix_ns: i64,
    block_len: usize,
    units: String,
    velocity_valid: bool,
    extractor: FeatureExtractor,
    kinematics: Kinematics,
    block_start: u64,
    filled: usize,
    block_gap: bool,
    buf: Vec<f32>,
    windows: VecDeque<WindowMark>,
}

/// Runs the analytics stage until `rx` closes; returns the first event-sink error, if any.
pub(crate) fn run(
    config: &AnalyticsConfig,
    rx: Receiver<AnalyticsMsg>,
    record: SyncSender<RecordMsg>,
    mut sinks: Vec<Box<dyn EventSink>>,
    stats: Arc<AnalyticsStats>,
) -> Result<(), EventError> {
    let mut streams: HashMap<usize, StreamState> = HashMap::new();
    let mut first_error: Option<EventError> = None;
    let mut live: Vec<bool> = vec![true; sinks.len()];
    let mut out = Output {
        config,
        record: &record,
        sinks: &mut sinks,
        live: &mut live,
        first_error: &mut first_error,
        stats: &stats,
    };
    for msg in rx {
        match msg {
            AnalyticsMsg::Capture {
                slot,
                key,
                sample_rate_hz,
                t0_unix_ns,
                hop_len,
                units,
            } => {
                let mut fc = config.features;
                let velocity_valid = match units.as_str() {
                    "m/s^2" => {
                        fc.accel_unit = AccelUnit::MetresPerSecondSquared;
                        true
                    }
                    "g" => {
                        fc.accel_unit = AccelUnit::G;
                        true
                    }
                    _ => false,
                };
                let extractor = match streams.remove(&slot) {
                    Some(old) if old.velocity_valid == velocity_valid => old.extractor,
                    _ => match FeatureExtractor::new(fc) {
                        Ok(x) => x,
                        Err(e) => {
                            tracing::warn!(error = %e, "analytics disabled for a stream");
                            continue;
                        }
                    },
                };
                streams.insert(
                    slot,
                    StreamState {
                        key,
                        sample_rate_hz,
                        t0_unix_ns,
                        block_len: config.block_len(sample_rate_hz, hop_len),
                        units,
                        velocity_valid,
                        extractor,
                        kinematics: config.kinematics_for(key.node, key.channel).clone(),
                        block_start: 0,
                        filled: 0,
                        block_gap: false,
                        buf: Vec::new(),
                        windows: VecDeque::new(),
                    },
                );
            }
            AnalyticsMsg::Window {
                slot,
                start,
                len,
                trust,
            } => {
                if let Some(st) = streams.get_mut(&slot) {
                    st.windows.push_back(WindowMark {
                        start,
                        end: start + len,
                        trust,
                    });
                }
            }
            AnalyticsMsg::Samples {
                slot,
                start,
                samples,
            } => {
                if let Some(st) = streams.get_mut(&slot) {
                    st.push(start, Some(&samples), samples.len() as u64, &mut out);
                }
            }
            AnalyticsMsg::Gap { slot, start, len } => {
                if let Some(st) = streams.get_mut(&slot) {
                    st.push(start, None, len, &mut out);
                }
            }
            AnalyticsMsg::End { slot } => {
                if let Some(st) = streams.get_mut(&slot) {
                    // The tail shorter than a block is not analysed; the next capture starts
                    // its own grid.
                    st.filled = 0;
                    st.block_gap = false;
                    st.buf.clear();
                    st.windows.clear();
                }
            }
            AnalyticsMsg::Barrier(ack) => {
                let _ = ack.send(());
            }
        }
    }
    for (i, sink) in out.sinks.iter_mut().enumerate() {
        if out.live[i] {
            if let Err(e) = sink.finish() {
                tracing::error!(error = %e, "event sink failed at the end");
                out.first_error.get_or_insert(e);
            }
        }
    }
    match first_error {
        Some(e) => Err(e),
        None => Ok(()),
    }
}

struct Output<'a> {
    config: &'a AnalyticsConfig,
    record: &'a SyncSender<RecordMsg>,
    sinks: &'a mut Vec<Box<dyn EventSink>>,
    live: &'a mut Vec<bool>,
    first_error: &'a mut Option<EventError>,
    stats: &'a AnalyticsStats,
}

impl StreamState {
    /// Takes `len` grid positions from `start`: samples, or a gap when `data` is `None`.
    fn push(&mut self, start: u64, data: Option<&[f32]>, len: u64, out: &mut Output<'_>) {
        let expected = self.block_start + self.filled as u64;
        if start > expected {
            // A hole no message explained: treat it as a gap.
            self.push(expected, None, start - expected, out);
        } else if start < expected {
            // Overlap with what was taken already cannot happen (the stitcher emits each
            // position once); ignore the repeated part defensively.
            let skip = expected - start;
            if skip >= len {
                return;
            }
            let rest = data.map(|d| &d[skip as usize..]);
            return self.push(expected, rest, len - skip, out);
        }
        let b = self.block_len as u64;
        let mut off = 0u64;
        while off < len {
            if data.is_none() && self.filled == 0 && len - off >= b {
                // Whole blocks inside a gap are skipped at once: a gap of any length (a node
                // that was away for days, or a seq far ahead) costs no more than one block.
                let whole = (len - off) / b;
                out.stats.skipped_gap.fetch_add(whole, Ordering::Relaxed);
                self.block_start += whole * b;
                off += whole * b;
                self.block_gap = false;
                self.buf.clear();
                let bs = self.block_start;
                while self.windows.front().is_some_and(|w| w.end <= bs) {
                    self.windows.pop_front();
                }
                continue;
            }
            let take = (len - off).min(b - self.filled as u64);
            match data {
                Some(d) if !self.block_gap => {
                    self.buf
                        .extend_from_slice(&d[off as usize..(off + take) as usize]);
                }
                Some(_) => {}
                None => {
                    self.block_gap = true;
                    self.buf.clear();
                }
            }
            self.filled += take as usize;
            off += take;
            if self.filled == self.block_len {
                self.finish_block(out);
            }
        }
    }

    fn finish_block(&mut self, out: &mut Output<'_>) {
        let bs = self.block_start;
        let be = bs + self.block_len as u64;
        let finite = self.buf.iter().all(|v| v.is_finite());
        if self.block_gap || !finite || self.buf.len() != self.block_len {
            out.stats.skipped_gap.fetch_add(1, Ordering::Relaxed);
        } else {
            self.analyze(bs, be, out);
        }
        self.block_start = be;
        self.filled = 0;
        self.block_gap = false;
        self.buf.clear();
        while self.windows.front().is_some_and(|w| w.end <= be) {
            self.windows.pop_front();
        }
    }

    fn block_trust(&self, bs: u64, be: u64) -> BlockTrust {
        let mut t = BlockTrust {
            low_trust: false,
            windows: 0,
            low_trust_windows: 0,
            unassessed_windows: 0,
            max_cv_error: None,
        };
        for w in self.windows.iter().filter(|w| w.start < be && w.end > bs) {
            t.windows += 1;
            match w.trust {
                Some((cv, low)) => {
                    if low {
                        t.low_trust_windows += 1;
                    }
                    if cv.is_finite() {
                        t.max_cv_error = Some(t.max_cv_error.map_or(cv, |m: f64| m.max(cv)));
                    }
                }
                None => t.unassessed_windows += 1,
            }
        }
        t.low_trust = t.low_trust_windows > 0;
        t
    }

    fn analyze(&mut self, bs: u64, be: u64, out: &mut Output<'_>) {
        let started = Instant::now();
        let result = self
            .extractor
            .analyze(&self.buf, self.sample_rate_hz, &self.kinematics);
        out.stats
            .busy_ns
            .fetch_add(started.elapsed().as_nanos() as u64, Ordering::Relaxed);
        let mut f = match result {
            Ok(f) => f,
            Err(e) => {
                out.stats.failed.fetch_add(1, Ordering::Relaxed);
                tracing::warn!(node = self.key.node, channel = self.key.channel, error = %e, "block not analysed");
                return;
            }
        };
        if !self.velocity_valid {
            // Velocity and its zone only mean something for acceleration streams.
            f.indicators.velocity_rms_mm_s = None;
            f.zone = Zone::Unknown;
        }
        let trust = self.block_trust(bs, be);
        let t = self.t0_unix_ns + ((bs as f64) * 1e9 / self.sample_rate_hz).round() as i64;
        out.stats.blocks.fetch_add(1, Ordering::Relaxed);
        if trust.low_trust {
            out.stats.low_trust_blocks.fetch_add(1, Ordering::Relaxed);
        }
        for row in f.peak_rows(t) {
            out.stats.peak_rows.fetch_add(1, Ordering::Relaxed);
            // A stopped writer is reported by the dispatcher; nothing more to do here.
            let _ = out.record.send(RecordMsg::Peak {
                stream: self.key,
                row,
            });
        }
        let _ = out.record.send(RecordMsg::Indicator {
            stream: self.key,
            row: f.indicator_row(t, bs, trust.low_trust),
        });
        if out.sinks.is_empty() {
            return;
        }
        let mut ev = f.event(self.key.node, self.key.channel, t, bs, out.config.top_peaks);
        ev.units = self.units.clone();
        ev.trust = Some(trust);
        let ev = Arc::new(ev);
        out.stats.events.fetch_add(1, Ordering::Relaxed);
        for (i, sink) in out.sinks.iter_mut().enumerate() {
            if !out.live[i] {
                continue;
            }
            if let Err(e) = sink.send(&ev) {
                tracing::error!(error = %e, "event sink failed; it gets no more events");
                out.live[i] = false;
                out.first_error.get_or_insert(e);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn block_len_rounds_to_whole_hops() {
        let c = AnalyticsConfig::default();
        // 25600 / 2048 = 12.5 hops, rounded half away from zero to 13.
        assert_eq!(c.block_len(25600.0, 2048), 13 * 2048);
        assert_eq!(c.block_len(25600.0, 512), 25600);
        let c = AnalyticsConfig {
            block_hops: Some(4),
            ..c
        };
        assert_eq!(c.block_len(25600.0, 2048), 8192);
    }

    #[test]
    fn channel_entry_wins_over_node_entry() {
        let k = |hz| Kinematics {
            shaft: crate::features::kinematics::ShaftSpeed::Hz(hz),
            ..Kinematics::default()
        };
        let c = AnalyticsConfig {
            machines: vec![
                MachineEntry {
                    node: 3,
                    channel: None,
                    machine: k(10.0),
                },
                MachineEntry {
                    node: 3,
                    channel: Some(1),
                    machine: k(20.0),
                },
            ],
            ..AnalyticsConfig::default()
        };
        assert_eq!(c.kinematics_for(3, 0), &k(10.0));
        assert_eq!(c.kinematics_for(3, 1), &k(20.0));
        assert_eq!(c.kinematics_for(4, 0), &Kinematics::default());
    }
}
