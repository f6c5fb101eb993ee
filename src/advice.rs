//! Sampling advice: how many samples per window a node should send, from what its stream's
//! windows show, and the board through which the ingest sends it back to the node.
//!
//! A fixed `m` is either wasteful (a steady machine with a few shaft lines needs far fewer
//! samples than it gets) or too small the day the machine changes (a developing fault spreads
//! energy over more coefficients, and a window beyond the L1 phase transition cannot be
//! recovered). The gateway sees both: every reconstructed window has an effective support `k`
//! (the fewest coefficients holding 99% of the solution's energy, [`crate::pipeline::trust`])
//! and, with the trust figures on, a hold-out error.
//!
//! # The rule ([`Advisor::observe`])
//! For each window of a stream:
//! 1. **Need from sparsity.** `m_edge = n psi(k/n)`, the 50% success edge of the L1 phase
//!    transition for a `k`-sparse vector (Amelunxen, Lotz, McCoy & Tropp 2014, through
//!    [`crate::plan::psi`]), and `need = ceil(m_edge (1 + margin))`. The margin (default 0.5)
//!    covers what the edge does not: the signals are compressible rather than exactly sparse,
//!    the samples are noisy, and `k` is itself measured from a solution made with the current `m`.
//! 2. **Need from quality.** A window flagged low trust (hold-out error above the trust limit,
//!    or support beyond the phase transition for its `m`) asks for `raise_factor` times the `m`
//!    it had, or the need from its sparsity if that is larger: the support of a failed window
//!    underestimates the signal's (it cannot hold more than its samples resolved), so its need
//!    is only a lower bound, and the raise does not wait for a trustworthy estimate.
//! 3. **Fast attack.** When the need is above the current advice by at least `min_change`, the
//!    advice rises to it at once.
//! 4. **Slow release.** The advice falls only after `release_windows` consecutive trusted
//!    windows (windows without trust figures, e.g. between the sampled ones of
//!    `pipeline.trust.every`, are passed over: they neither count nor break the run)
//!    whose largest need is below the advice by at least `min_change`, and then by at
//!    most `release_step` of itself (default 15%) towards that largest need. A machine that
//!    flickers between states is therefore advised for its worse state.
//! 5. Advice is rounded up to a multiple of `round_to` (fewer distinct values, fewer messages)
//!    and clamped to `[m_min, n]`.
//!
//! The first window of a stream sets the advice to the `m` it arrived with (no message).
//! Attack and release come from control practice (a peak detector with hysteresis, common
//! practice); the constants are our own defaults, measured in `tests/advice.rs`.

use crate::packet::StreamId;
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::RwLock;

/// Settings of the advisor (the `[advice]` table of the gateway configuration).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AdviceConfig {
    /// Fraction added above the phase-transition edge. Default 0.5.
    pub margin: f64,
    /// Fewest samples per window ever advised. Default 64.
    pub m_min: u32,
    /// Factor on `m` asked by a low-trust window. Default 1.25.
    pub raise_factor: f64,
    /// Consecutive trusted windows before the advice may fall. Default 8.
    pub release_windows: usize,
    /// Largest fall of one release, as a fraction of the advice. Default 0.15.
    pub release_step: f64,
    /// Smallest relative change that makes a new advice (and a message). Default 0.05.
    pub min_change: f64,
    /// Advice is a multiple of this. Default 16.
    pub round_to: u32,
}

impl Default for AdviceConfig {
    fn default() -> Self {
        Self {
            margin: 0.5,
            m_min: 64,
            raise_factor: 1.25,
            release_windows: 8,
            release_step: 0.15,
            min_change: 0.05,
            round_to: 16,
        }
    }
}

impl AdviceConfig {
    /// Checks the ranges; the message names the key.
    pub fn check(&self) -> Result<(), String> {
        if !(self.margin.is_finite() && self.margin >= 0.0) {
            return Err(format!(
                "advice.margin must be a finite fraction >= 0, got {}",
                self.margin
            ));
        }
        if self.m_min == 0 {
            return Err("advice.m_min must be at least 1".into());
        }
        if !(self.raise_factor.is_finite() && self.raise_factor > 1.0) {
            return Err(format!(
                "advice.raise_factor must be greater than 1, got {}",
                self.raise_factor
            ));
        }
        if self.release_windows == 0 {
            return Err("advice.release_windows must be at least 1".into());
        }
        if !(self.release_step > 0.0 && self.release_step < 1.0) {
            return Err(format!(
                "advice.release_step must be in (0, 1), got {}",
                self.release_step
            ));
        }
        if !(self.min_change >= 0.0 && self.min_change < 1.0) {
            return Err(format!(
                "advice.min_change must be in [0, 1), got {}",
                self.min_change
            ));
        }
        if self.round_to == 0 {
            return Err("advice.round_to must be at least 1".into());
        }
        Ok(())
    }
}

/// What the advisor needs of one reconstructed window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WindowObservation {
    /// Window length.
    pub n: u32,
    /// Samples the window arrived with.
    pub m: u32,
    /// Effective support of the solution, when the trust figures were computed.
    pub effective_support: Option<u32>,
    /// Whether the window was flagged low trust (`None`: not assessed).
    pub low_trust: Option<bool>,
}

/// Why the advice changed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum AdviceReason {
    /// The sparsity asks for more samples.
    Sparsity,
    /// A window was low trust.
    LowTrust,
    /// A run of trusted windows needs fewer samples.
    Release,
}

/// A new advice for a stream.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Advice {
    /// Samples per window advised.
    pub m: u32,
    /// The advice before.
    pub previous: u32,
    /// Why.
    pub reason: AdviceReason,
    /// The need of the window that caused it (samples).
    pub need: u32,
}

/// The advisor of one stream (see the module docs for the rule).
#[derive(Debug, Clone)]
pub struct Advisor {
    config: AdviceConfig,
    current: Option<u32>,
    /// Trusted windows in a row since the last change, and their largest need.
    calm: usize,
    calm_need: u32,
}

impl Advisor {
    /// An advisor with no window seen yet.
    pub fn new(config: AdviceConfig) -> Self {
        Self {
            config,
            current: None,
            calm: 0,
            calm_need: 0,
        }
    }

    /// The advice now (`None` before the first window).
    pub fn current(&self) -> Option<u32> {
        self.current
    }

    /// The samples window `w` asks for, and whether the ask comes from low trust.
    pub fn need(&self, w: &WindowObservation) -> Option<(u32, bool)> {
        if w.low_trust == Some(true) {
            let raised = (f64::from(w.m) * self.config.raise_factor).ceil() as u32;
            // The support of a failed window is an underestimate (its solution could not hold
            // more than its samples resolved), so the need it implies is a lower bound: taking
            // the larger of the two reaches a much less sparse signal in one step instead of
            // one raise per round trip to the node.
            let from_support = self.sparsity_need(w).unwrap_or(0);
            return Some((self.clamp(raised.max(from_support), w.n), true));
        }
        self.sparsity_need(w).map(|m| (self.clamp(m, w.n), false))
    }

    /// `ceil(n psi(k/n) (1 + margin))` for the window's effective support `k`, unclamped.
    fn sparsity_need(&self, w: &WindowObservation) -> Option<u32> {
        let k = w.effective_support?;
        if w.n == 0 {
            return None;
        }
        let n = f64::from(w.n);
        let edge = match crate::plan::psi(f64::from(k) / n) {
            Some(p) => n * p,
            // k = 0 (a silent window) needs nothing; k >= n needs everything.
            None if k == 0 => 0.0,
            None => n,
        };
        Some((edge * (1.0 + self.config.margin)).ceil() as u32)
    }

    fn clamp(&self, m: u32, n: u32) -> u32 {
        let r = self.config.round_to.max(1);
        let up = m.div_ceil(r).saturating_mul(r);
        up.clamp(self.config.m_min.min(n), n.max(1))
    }

    /// Takes one window; returns the new advice when it changed.
    pub fn observe(&mut self, w: &WindowObservation) -> Option<Advice> {
        let Some(current) = self.current else {
            self.current = Some(w.m);
            return None;
        };
        let (need, low) = self.need(w)?;
        let step = (f64::from(current) * self.config.min_change).max(1.0);
        if f64::from(need) >= f64::from(current) + step {
            self.set(need);
            return Some(Advice {
                m: need,
                previous: current,
                reason: if low {
                    AdviceReason::LowTrust
                } else {
                    AdviceReason::Sparsity
                },
                need,
            });
        }
        // Not assessed: passed over (only assessed, trusted windows count towards a release,
        // and only a low-trust one breaks the run).
        w.low_trust?;
        if low {
            self.calm = 0;
            self.calm_need = 0;
            return None;
        }
        self.calm += 1;
        self.calm_need = self.calm_need.max(need);
        if self.calm < self.config.release_windows {
            return None;
        }
        let target = self.calm_need;
        self.calm = 0;
        self.calm_need = 0;
        if f64::from(target) > f64::from(current) - step {
            return None;
        }
        let floor = (f64::from(current) * (1.0 - self.config.release_step)).ceil() as u32;
        let next = self.clamp(target.max(floor), w.n);
        if next >= current {
            return None;
        }
        self.current = Some(next);
        Some(Advice {
            m: next,
            previous: current,
            reason: AdviceReason::Release,
            need: target,
        })
    }

    fn set(&mut self, m: u32) {
        self.current = Some(m);
        self.calm = 0;
        self.calm_need = 0;
    }
}

/// The advice of every stream, shared between the stage that computes it and the ingest
/// connections that send it. Reads are cheap: a connection compares [`AdviceBoard::version`]
/// with the one it saw before it takes the lock.
#[derive(Debug, Default)]
pub struct AdviceBoard {
    advice: RwLock<HashMap<StreamId, u32>>,
    version: AtomicU64,
    /// Nodes that asked for advice (opt-in, from the configuration).
    nodes: Vec<u32>,
}

impl AdviceBoard {
    /// A board for the opted-in `nodes`.
    pub fn new(mut nodes: Vec<u32>) -> Self {
        nodes.sort_unstable();
        nodes.dedup();
        Self {
            nodes,
            ..Self::default()
        }
    }

    /// Whether `node` gets advice.
    pub fn advises(&self, node: u32) -> bool {
        self.nodes.binary_search(&node).is_ok()
    }

    /// Posts the advice of a stream.
    pub fn post(&self, stream: StreamId, m: u32) {
        let mut map = self.advice.write().unwrap_or_else(|e| e.into_inner());
        map.insert(stream, m);
        self.version.fetch_add(1, Ordering::Release);
    }

    /// Changes so far (any stream).
    pub fn version(&self) -> u64 {
        self.version.load(Ordering::Acquire)
    }

    /// The advice of a stream, if any.
    pub fn get(&self, stream: StreamId) -> Option<u32> {
        let map = self.advice.read().unwrap_or_else(|e| e.into_inner());
        map.get(&stream).copied()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn obs(m: u32, k: u32, low: bool) -> WindowObservation {
        WindowObservation {
            n: 4096,
            m,
            effective_support: Some(k),
            low_trust: Some(low),
        }
    }

    #[test]
    fn need_follows_the_phase_transition_with_margin() {
        // CHECK-VALUES 6.1: n = 4096, k = 205 (rho 0.05) -> m_edge 835.8; with margin 0.5,
        // ceil(1253.7) = 1254, rounded up to a multiple of 16 -> 1264.
        let a = Advisor::new(AdviceConfig::default());
        assert_eq!(a.need(&obs(1024, 205, false)), Some((1264, false)));
        // A low-trust window asks for 1.25 m whatever its support.
        assert_eq!(a.need(&obs(1024, 5, true)), Some((1280, true)));
        // Clamped to [m_min, n].
        assert_eq!(a.need(&obs(1024, 0, false)), Some((64, false)));
        assert_eq!(a.need(&obs(4096, 4000, false)), Some((4096, false)));
    }

    #[test]
    fn rises_at_once_and_falls_slowly() {
        let mut a = Advisor::new(AdviceConfig::default());
        assert_eq!(a.observe(&obs(1024, 20, false)), None);
        assert_eq!(a.current(), Some(1024));
        // Seven calm windows: nothing yet; the eighth releases by at most 15%.
        for _ in 0..7 {
            assert_eq!(a.observe(&obs(1024, 20, false)), None);
        }
        let r = a.observe(&obs(1024, 20, false)).expect("a release");
        assert_eq!(r.reason, AdviceReason::Release);
        assert_eq!(r.m, 880); // ceil(1024 * 0.85) = 871 -> 880
                              // A denser window lifts it at once.
        let up = a.observe(&obs(880, 205, false)).expect("an attack");
        assert_eq!((up.m, up.reason), (1264, AdviceReason::Sparsity));
        // A low-trust window too.
        let up = a.observe(&obs(1264, 205, true)).expect("an attack");
        assert_eq!((up.m, up.reason), (1584, AdviceReason::LowTrust));
    }

    #[test]
    fn settles_at_the_need() {
        let mut a = Advisor::new(AdviceConfig::default());
        a.observe(&obs(2048, 20, false));
        let need = a.need(&obs(2048, 20, false)).unwrap().0;
        let mut m = 2048;
        for _ in 0..400 {
            if let Some(adv) = a.observe(&obs(m, 20, false)) {
                m = adv.m;
            }
        }
        assert_eq!(m, need);
        // An unassessed window neither raises nor releases.
        let w = WindowObservation {
            low_trust: None,
            effective_support: None,
            ..obs(m, 20, false)
        };
        assert_eq!(a.observe(&w), None);
    }

    #[test]
    fn board_posts_and_reads() {
        let b = AdviceBoard::new(vec![7, 3, 7]);
        assert!(b.advises(3) && b.advises(7) && !b.advises(4));
        let s = StreamId {
            node: 7,
            channel: 1,
        };
        assert_eq!(b.get(s), None);
        b.post(s, 512);
        assert_eq!((b.get(s), b.version()), (Some(512), 1));
    }
}
