//! Running a scenario: windowing, compressive sampling, quantization and encoding, node by
//! node, window by window.
//!
//! A [`NodeSim`] keeps one window of measured samples per channel; each step generates `hop`
//! new grid instants (the first step a whole window), picks `m` instants, quantizes them and
//! builds one [`Packet`] per channel with `Packet::new`, so the frames pass the same validation
//! as the gateway's. A [`Simulation`] merges the nodes' windows in order of the time their last
//! instant was taken, as they would reach a gateway. Memory stays at one window per channel
//! whatever the duration.
//!
//! Outputs: [`write_log`] appends the encoded frames to a packet log; [`send_to_target`] sends
//! each node's frames over its own TCP connection through the fault-injecting sender
//! (`sources::inject`). The noise-free truth comes with each [`SimWindow`] when asked for.
//!
//! ## Randomness
//! Every random choice derives from the scenario seed and the node id ([`node_seed`]) through
//! ChaCha8 (reproducible across platforms and releases), except seeded index sets, which must
//! come from the wire format's generator (`packet::indices`) so the gateway can regenerate
//! them. Same scenario, seed and duration: byte-identical output.

use super::machine::MachineSynth;
use super::scenario::{IndexEncoding, NodeSpec, Scenario, ValueEncoding};
use crate::packet::log::{LogError, LogWriter};
use crate::packet::{
    indices, wire, KeyRing, NodeKey, Packet, RawValues, Sampling, StreamId, WindowHeader,
};
use crate::sources::inject::{send_packets, FaultPlan, Pace, SendReport};
use rand::{Rng, RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use std::net::SocketAddr;
use std::path::Path;

/// Errors of a simulation run.
#[derive(Debug, thiserror::Error)]
pub enum SimError {
    /// The packet log could not be written.
    #[error(transparent)]
    Log(#[from] LogError),
    /// A frame could not be built (a scenario the checks let through; a bug).
    #[error("building a frame: {0}")]
    Frame(String),
    /// Sending to the target failed.
    #[error("sending to {target}: {source}")]
    Send {
        /// The target.
        target: SocketAddr,
        /// The cause.
        source: std::io::Error,
    },
    /// A bad option value.
    #[error("{0}")]
    Option(String),
}

/// Derives a node's seed from the run seed (SplitMix64 finalizer, Steele et al. 2014: a
/// bijective mix, so distinct nodes get unrelated streams).
pub fn node_seed(run_seed: u64, node: u32) -> u64 {
    let mut z = run_seed ^ (u64::from(node).wrapping_add(1)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Number of whole windows a node produces in `duration_s`: windows start every `hop`
/// instants and must end within the duration.
pub fn window_count(node: &NodeSpec, duration_s: f64) -> u64 {
    let total = (duration_s * node.sample_rate_hz).floor().max(0.0) as u64;
    let n = u64::from(node.window_len);
    if total < n {
        0
    } else {
        (total - n) / u64::from(node.hop()) + 1
    }
}

/// Grid instants covered by `windows` windows: `(windows - 1) hop + n`, the truth length.
pub fn covered_len(node: &NodeSpec, windows: u64) -> u64 {
    if windows == 0 {
        0
    } else {
        (windows - 1) * u64::from(node.hop()) + u64::from(node.window_len)
    }
}

/// New noise-free truth samples of one window, per channel in scenario order.
#[derive(Debug, Clone, PartialEq)]
pub struct TruthChunk {
    /// Grid index of the first sample.
    pub start: u64,
    /// One vector per channel, all of the same length (`n` for the first window, then `hop`).
    pub channels: Vec<Vec<f32>>,
}

/// One window of one node: a packet per channel.
#[derive(Debug, Clone, PartialEq)]
pub struct SimWindow {
    /// Node id.
    pub node: u32,
    /// Index of the window in the run.
    pub seq: u64,
    /// Grid index of the window's first instant.
    pub start: u64,
    /// Node-clock time just after the window's last instant (when a node could send it),
    /// microseconds since the Unix epoch.
    pub ready_us: i64,
    /// One packet per channel, in scenario order.
    pub packets: Vec<Packet>,
    /// The truth samples this window adds, when the run keeps truth.
    pub truth: Option<TruthChunk>,
    /// Values clipped at ADC full scale in this window, all channels.
    pub clipped: u64,
}

/// Per-channel state of a node.
#[derive(Debug, Clone)]
struct ChannelState {
    stream: StreamId,
    /// Measured values (truth plus noise) of the current window.
    measured: Vec<f64>,
    truth_new: Vec<f32>,
}

/// One simulated node: machine, channels, sampler.
#[derive(Debug, Clone)]
pub struct NodeSim {
    spec: NodeSpec,
    machine: MachineSynth,
    channels: Vec<ChannelState>,
    start_us: i64,
    capture_id: u32,
    seq: u64,
    windows: u64,
    keep_truth: bool,
    index_rng: ChaCha8Rng,
    noise_rng: ChaCha8Rng,
    /// Samples per window when set (sampling advice); else the scenario's ratio.
    m_override: Option<u32>,
}

impl NodeSim {
    /// A node producing `windows` windows from `start_us`, with randomness from `run_seed`.
    pub fn new(
        spec: &NodeSpec,
        run_seed: u64,
        start_us: i64,
        windows: u64,
        keep_truth: bool,
    ) -> NodeSim {
        let seed = node_seed(run_seed, spec.id);
        let stream_rng = |stream: u64| {
            let mut r = ChaCha8Rng::seed_from_u64(seed);
            r.set_stream(stream);
            r
        };
        let mut id_rng = stream_rng(3);
        let n = spec.window_len as usize;
        NodeSim {
            machine: MachineSynth::new(&spec.machine, spec.sample_rate_hz, seed),
            channels: spec
                .channels
                .iter()
                .map(|c| ChannelState {
                    stream: StreamId {
                        node: spec.id,
                        channel: c.channel,
                    },
                    measured: Vec::with_capacity(n),
                    truth_new: Vec::with_capacity(n),
                })
                .collect(),
            spec: spec.clone(),
            start_us,
            // Non-zero so a first capture never looks like an unset field (common practice).
            capture_id: id_rng.next_u32() | 1,
            seq: 0,
            windows,
            keep_truth,
            index_rng: stream_rng(1),
            noise_rng: stream_rng(2),
            m_override: None,
        }
    }

    /// The node's scenario entry.
    pub fn spec(&self) -> &NodeSpec {
        &self.spec
    }

    /// Samples per window of the next window.
    pub fn sample_count(&self) -> u32 {
        self.m_override.unwrap_or_else(|| self.spec.sample_count())
    }

    /// Sends `m` samples per window from the next window on (clamped to `1..=n`), as a node
    /// does when it follows the gateway's sampling advice.
    pub fn set_sample_count(&mut self, m: u32) {
        self.m_override = Some(m.clamp(1, self.spec.window_len));
    }

    /// The capture id every frame of this run carries.
    pub fn capture_id(&self) -> u32 {
        self.capture_id
    }

    /// Windows still to come.
    pub fn remaining(&self) -> u64 {
        self.windows - self.seq
    }

    /// Time the next window will be ready, microseconds; `None` when done.
    pub fn next_ready_us(&self) -> Option<i64> {
        (self.remaining() > 0).then(|| {
            let end = self.seq * u64::from(self.spec.hop()) + u64::from(self.spec.window_len);
            self.instant_us(end)
        })
    }

    fn instant_us(&self, k: u64) -> i64 {
        self.start_us + (k as f64 * 1e6 / self.spec.sample_rate_hz).round() as i64
    }

    /// Generates the next window, or `None` when the node is done.
    pub fn next_window(&mut self) -> Result<Option<SimWindow>, SimError> {
        if self.remaining() == 0 {
            return Ok(None);
        }
        let n = self.spec.window_len as usize;
        let hop = self.spec.hop() as usize;
        let fresh = if self.seq == 0 { n } else { hop };
        for ch in &mut self.channels {
            if self.seq > 0 {
                ch.measured.drain(..hop);
            }
            ch.truth_new.clear();
        }
        let truth_start = self.machine.position();
        for _ in 0..fresh {
            let s = self.machine.next_sample();
            for (ch, cs) in self.channels.iter_mut().zip(&self.spec.channels) {
                let truth = cs.mix.truth(&s);
                let mut noise = cs.mix.broadband * s.broadband;
                if cs.noise_rms > 0.0 {
                    let g: f64 = self.noise_rng.sample(StandardNormal);
                    noise += cs.noise_rms * g;
                }
                ch.measured.push(truth + noise);
                if self.keep_truth {
                    ch.truth_new.push(truth as f32);
                }
            }
        }
        let start = self.seq * hop as u64;
        let t0_us = self.instant_us(start);
        let m = self.sample_count();
        let mut packets = Vec::with_capacity(self.channels.len());
        let mut clipped = 0;
        // One index set per window, shared by the node's channels: one ADC scan samples every
        // channel at the same instants (common practice for multiplexed sensor nodes).
        let (sampling, idx) = match self.spec.index_encoding {
            IndexEncoding::Seed => {
                let seed = self.index_rng.next_u64();
                (
                    Sampling::Seeded { seed, m },
                    indices::sample_indices(seed, n as u32, m),
                )
            }
            IndexEncoding::List => {
                let mut idx: Vec<u32> =
                    rand::seq::index::sample(&mut self.index_rng, n, m as usize)
                        .into_iter()
                        .map(|i| i as u32)
                        .collect();
                idx.sort_unstable();
                (Sampling::Explicit(idx.clone()), idx)
            }
        };
        for (ch, cs) in self.channels.iter().zip(&self.spec.channels) {
            let count_scale = self.spec.count_scale(cs);
            let hi = (1i64 << (self.spec.adc_bits - 1)) - 1;
            let lo = -(1i64 << (self.spec.adc_bits - 1));
            let counts: Vec<i64> = idx
                .iter()
                .map(|&i| {
                    let c = (ch.measured[i as usize] / count_scale).round() as i64;
                    if c > hi || c < lo {
                        clipped += 1;
                    }
                    c.clamp(lo, hi)
                })
                .collect();
            let (raw, scale) = match self.spec.value_encoding {
                ValueEncoding::I16 => (
                    RawValues::I16(counts.iter().map(|&c| c as i16).collect()),
                    count_scale,
                ),
                ValueEncoding::F32 => (
                    RawValues::F32(
                        counts
                            .iter()
                            .map(|&c| (c as f64 * count_scale) as f32)
                            .collect(),
                    ),
                    1.0,
                ),
            };
            let header = WindowHeader {
                stream: ch.stream,
                capture_id: self.capture_id,
                seq: self.seq,
                sample_rate_hz: self.spec.sample_rate_hz,
                window_len: n as u32,
                hop_len: hop as u32,
                t0_us,
                units: self.spec.units(cs),
                scale,
                adc_bits: self.spec.adc_bits,
            };
            let packet = Packet::new(header, sampling.clone(), raw)
                .map_err(|e| SimError::Frame(e.to_string()))?;
            packets.push(packet);
        }
        let truth = self.keep_truth.then(|| TruthChunk {
            start: truth_start,
            channels: self
                .channels
                .iter_mut()
                .map(|c| std::mem::take(&mut c.truth_new))
                .collect(),
        });
        let window = SimWindow {
            node: self.spec.id,
            seq: self.seq,
            start,
            ready_us: self.instant_us(start + n as u64),
            packets,
            truth,
            clipped,
        };
        self.seq += 1;
        Ok(Some(window))
    }
}

/// All nodes of a scenario, windows merged in order of readiness.
#[derive(Debug, Clone)]
pub struct Simulation {
    nodes: Vec<NodeSim>,
}

impl Simulation {
    /// Sets up every node of `scenario` for `duration_s` seconds with the scenario's seed.
    pub fn new(scenario: &Scenario, duration_s: f64, keep_truth: bool) -> Simulation {
        let start_us = scenario.start_time_us();
        Simulation {
            nodes: scenario
                .nodes
                .iter()
                .map(|n| {
                    NodeSim::new(
                        n,
                        scenario.site.seed,
                        start_us,
                        window_count(n, duration_s),
                        keep_truth,
                    )
                })
                .collect(),
        }
    }

    /// The nodes.
    pub fn nodes(&self) -> &[NodeSim] {
        &self.nodes
    }

    /// Windows still to come, all nodes.
    pub fn remaining(&self) -> u64 {
        self.nodes.iter().map(NodeSim::remaining).sum()
    }

    /// The window that is ready first (ties: scenario order), or `None` when all are done.
    pub fn next_window(&mut self) -> Result<Option<SimWindow>, SimError> {
        let next = self
            .nodes
            .iter_mut()
            .filter_map(|n| n.next_ready_us().map(|t| (t, n)))
            .min_by_key(|(t, _)| *t);
        match next {
            Some((_, node)) => node.next_window(),
            None => Ok(None),
        }
    }

    /// Splits into the nodes, for per-node output (one TCP connection each).
    pub fn into_nodes(self) -> Vec<NodeSim> {
        self.nodes
    }
}

/// Counts of a run, for the closing summary.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RunSummary {
    /// Nodes simulated.
    pub nodes: usize,
    /// Streams (node channels).
    pub streams: usize,
    /// Windows, all nodes.
    pub windows: u64,
    /// Frames built (one per window and channel).
    pub frames: u64,
    /// Encoded frame bytes.
    pub bytes: u64,
    /// Values clipped at ADC full scale.
    pub clipped: u64,
    /// What the fault-injecting sender did, summed over nodes (TCP output only).
    pub faults: Option<SendReport>,
}

impl RunSummary {
    fn for_scenario(scenario: &Scenario) -> RunSummary {
        RunSummary {
            nodes: scenario.nodes.len(),
            streams: scenario.nodes.iter().map(|n| n.channels.len()).sum(),
            ..RunSummary::default()
        }
    }
}

/// Keys of the nodes that have one.
pub fn key_ring(scenario: &Scenario) -> KeyRing {
    let mut ring = KeyRing::new(false);
    for n in &scenario.nodes {
        if let Some(k) = n.key() {
            ring.insert(n.id, k);
        }
    }
    ring
}

/// How to pace file output.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum FilePace {
    /// As fast as the machine generates.
    Fast,
    /// Each window written when it would be ready, divided by the speed-up.
    RealTime {
        /// Speed-up factor, > 0.
        speed: f64,
    },
}

/// Runs `sim` into a new packet log at `path` (replacing any file there), calling `on_window`
/// after each window is written (truth output, progress). Each record's receive time is the
/// window's ready time, so a replay sees the node's timing.
pub fn write_log(
    mut sim: Simulation,
    scenario: &Scenario,
    path: &Path,
    pace: FilePace,
    mut on_window: impl FnMut(&SimWindow) -> Result<(), SimError>,
) -> Result<RunSummary, SimError> {
    match std::fs::remove_file(path) {
        Err(e) if e.kind() != std::io::ErrorKind::NotFound => {
            return Err(LogError::Io {
                path: path.to_owned(),
                source: e,
            }
            .into())
        }
        _ => {}
    }
    let note = format!(
        "csgate simulate: site {:?}, seed {}",
        scenario.site.name, scenario.site.seed
    );
    let mut log = LogWriter::open_append(path, scenario.start_time_us(), &note)?;
    let keys: Vec<Option<NodeKey>> = sim.nodes.iter().map(|n| n.spec.key()).collect();
    let ids: Vec<u32> = sim.nodes.iter().map(|n| n.spec.id).collect();
    let mut summary = RunSummary::for_scenario(scenario);
    let wall_start = std::time::Instant::now();
    let first_us = sim.nodes.iter().filter_map(NodeSim::next_ready_us).min();
    while let Some(w) = sim.next_window()? {
        if let (FilePace::RealTime { speed }, Some(first)) = (pace, first_us) {
            let due = std::time::Duration::from_micros(
                ((w.ready_us - first).max(0) as f64 / speed) as u64,
            );
            if let Some(wait) = due.checked_sub(wall_start.elapsed()) {
                std::thread::sleep(wait);
            }
        }
        let key = ids
            .iter()
            .position(|&id| id == w.node)
            .and_then(|i| keys[i].as_ref());
        for p in &w.packets {
            let bytes =
                wire::encode_window_to_vec(p, key).map_err(|e| SimError::Frame(e.to_string()))?;
            log.append(w.ready_us, &bytes)?;
            summary.frames += 1;
            summary.bytes += bytes.len() as u64;
        }
        summary.windows += 1;
        summary.clipped += w.clipped;
        on_window(&w)?;
    }
    log.sync()?;
    Ok(summary)
}

/// Windows per call of the sender: bounds memory on long runs. Each call is one connection
/// (and its own fault draw), so a long run reconnects once per batch, as a node whose link is
/// reset now and then would.
pub const SEND_BATCH_WINDOWS: u64 = 512;

/// Runs `sim` to `target`, each node on its own connection and tokio task, through the
/// fault-injecting sender with `plan` (its seed mixed per node and batch). `on_window` sees
/// every window before it is sent (truth output, progress).
pub async fn send_to_target(
    sim: Simulation,
    scenario: &Scenario,
    target: SocketAddr,
    plan: &FaultPlan,
    pace: Pace,
    on_window: impl FnMut(&SimWindow) -> Result<(), SimError> + Send + 'static,
) -> Result<RunSummary, SimError> {
    let keys = key_ring(scenario);
    let on_window = std::sync::Arc::new(std::sync::Mutex::new(on_window));
    let mut tasks = tokio::task::JoinSet::new();
    for node in sim.into_nodes() {
        let keys = keys.clone();
        let plan = plan.clone();
        let on_window = on_window.clone();
        tasks.spawn(async move {
            let mut node = node;
            let mut part = RunSummary::default();
            let mut report = SendReport::default();
            let mut batch_no = 0u64;
            let node_key = node.spec.key();
            while node.remaining() > 0 {
                // Generation is CPU work: keep it off the runtime's workers so that the other
                // nodes' paced sends stay on time.
                let cb = on_window.clone();
                let (back, batch) = tokio::task::spawn_blocking(move || {
                    let mut batch = Vec::new();
                    let mut windows = Vec::new();
                    for _ in 0..SEND_BATCH_WINDOWS {
                        match node.next_window() {
                            Ok(Some(w)) => {
                                let mut f = cb.lock().expect("window callback poisoned");
                                if let Err(e) = (*f)(&w) {
                                    return (node, Err(e));
                                }
                                windows.push((w.clipped, w.packets.len()));
                                batch.extend(w.packets);
                            }
                            Ok(None) => break,
                            Err(e) => return (node, Err(e)),
                        }
                    }
                    (node, Ok((batch, windows)))
                })
                .await
                .map_err(|e| SimError::Option(format!("node generator failed: {e}")))?;
                node = back;
                let (packets, windows) = batch?;
                for (clipped, _) in &windows {
                    part.windows += 1;
                    part.clipped += clipped;
                }
                for p in &packets {
                    part.frames += 1;
                    part.bytes += wire::encoded_window_len(p, node_key.is_some()) as u64;
                }
                let mut batch_plan = plan.clone();
                batch_plan.seed = node_seed(plan.seed ^ batch_no, node.spec.id);
                let r = send_packets(target, packets, &keys, &batch_plan, pace)
                    .await
                    .map_err(|source| SimError::Send { target, source })?;
                merge_report(&mut report, r);
                batch_no += 1;
            }
            part.faults = Some(report);
            Ok::<RunSummary, SimError>(part)
        });
    }
    let mut summary = RunSummary::for_scenario(scenario);
    let mut faults = SendReport::default();
    while let Some(joined) = tasks.join_next().await {
        let part = joined.map_err(|e| SimError::Option(format!("node task failed: {e}")))??;
        summary.windows += part.windows;
        summary.frames += part.frames;
        summary.bytes += part.bytes;
        summary.clipped += part.clipped;
        if let Some(r) = part.faults {
            merge_report(&mut faults, r);
        }
    }
    summary.faults = Some(faults);
    Ok(summary)
}

fn merge_report(into: &mut SendReport, r: SendReport) {
    into.frames_in += r.frames_in;
    into.frames_written += r.frames_written;
    into.delivered.extend(r.delivered);
    into.dropped.extend(r.dropped);
    into.corrupted.extend(r.corrupted);
    into.duplicated += r.duplicated;
    into.reordered += r.reordered;
    into.bit_flips += r.bit_flips;
    into.reconnects += r.reconnects;
    into.reboots += r.reboots;
    into.acks_received += r.acks_received;
}

/// Parses a fault list such as `drop=0.01,dup=0.01,reorder=0.01,corrupt=0.001,
/// disconnect=0.001,reboot=0.0005,distance=3,seed=9`: probabilities per frame, `distance` the
/// reach of duplicates and swaps in frames, `seed` the fault generator's seed (default: the
/// run seed). `none` or an empty string is no faults.
pub fn parse_faults(spec: &str, run_seed: u64) -> Result<FaultPlan, String> {
    let mut plan = FaultPlan {
        seed: run_seed,
        ..FaultPlan::default()
    };
    let spec = spec.trim();
    if spec.is_empty() || spec == "none" {
        return Ok(plan);
    }
    for item in spec.split(',') {
        let (name, value) = item
            .split_once('=')
            .ok_or_else(|| format!("fault {item:?}: expected name=value"))?;
        let name = name.trim();
        let value = value.trim();
        let prob = || -> Result<f64, String> {
            let p: f64 = value
                .parse()
                .map_err(|_| format!("fault {name}: {value:?} is not a number"))?;
            if (0.0..=1.0).contains(&p) {
                Ok(p)
            } else {
                Err(format!("fault {name}: {p} is not a probability in 0..=1"))
            }
        };
        match name {
            "drop" => plan.drop_p = prob()?,
            "dup" | "duplicate" => plan.duplicate_p = prob()?,
            "reorder" => plan.reorder_p = prob()?,
            "corrupt" => plan.corrupt_p = prob()?,
            "disconnect" => plan.disconnect_p = prob()?,
            "reboot" => plan.reboot_p = prob()?,
            "distance" => {
                plan.reorder_distance =
                    value
                        .parse()
                        .ok()
                        .filter(|&d: &usize| d >= 1)
                        .ok_or_else(|| {
                            format!("fault distance: {value:?} is not a whole number >= 1")
                        })?
            }
            "seed" => {
                plan.seed = value
                    .parse()
                    .map_err(|_| format!("fault seed: {value:?} is not a whole number"))?
            }
            other => {
                return Err(format!(
                    "unknown fault {other:?} (known: drop, dup, reorder, corrupt, disconnect, \
                     reboot, distance, seed)"
                ))
            }
        }
    }
    Ok(plan)
}

/// Parses `--pace`: `fast`, `realtime`, or a speed-up such as `10x` (ten times real time).
pub fn parse_pace(s: &str) -> Result<Option<f64>, String> {
    match s {
        "fast" => Ok(None),
        "realtime" => Ok(Some(1.0)),
        _ => s
            .strip_suffix('x')
            .and_then(|v| v.parse::<f64>().ok())
            .filter(|v| v.is_finite() && *v > 0.0)
            .map(Some)
            .ok_or_else(|| format!("pace {s:?}: expected fast, realtime or a speed-up like 10x")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fault_lists_parse() {
        let p = parse_faults(
            "drop=0.01, dup=0.02,reorder=0.03,corrupt=0.001,distance=4",
            5,
        )
        .unwrap();
        assert_eq!(p.drop_p, 0.01);
        assert_eq!(p.duplicate_p, 0.02);
        assert_eq!(p.reorder_p, 0.03);
        assert_eq!(p.corrupt_p, 0.001);
        assert_eq!(p.reorder_distance, 4);
        assert_eq!(p.seed, 5);
        assert_eq!(
            parse_faults("none", 1).unwrap(),
            FaultPlan {
                seed: 1,
                ..FaultPlan::default()
            }
        );
        assert!(parse_faults("drop=2", 1)
            .unwrap_err()
            .contains("probability"));
        assert!(parse_faults("melt=0.1", 1)
            .unwrap_err()
            .contains("unknown fault"));
        assert!(parse_faults("drop", 1).unwrap_err().contains("name=value"));
    }

    #[test]
    fn pace_parses() {
        assert_eq!(parse_pace("fast").unwrap(), None);
        assert_eq!(parse_pace("realtime").unwrap(), Some(1.0));
        assert_eq!(parse_pace("20x").unwrap(), Some(20.0));
        assert!(parse_pace("slow").is_err());
    }

    #[test]
    fn node_seeds_differ() {
        assert_ne!(node_seed(1, 1), node_seed(1, 2));
        assert_ne!(node_seed(1, 1), node_seed(2, 1));
    }
}
