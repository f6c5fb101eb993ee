//! The `[broker]` section of the gateway configuration: roles, the NATS server, the cluster's
//! names and partition count, the lease and the streams' limits. Every default with its reason
//! here; `configs/gateway.toml` documents every key.

use serde::{Deserialize, Serialize};

/// What a `csgate serve` process does in broker mode.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Role {
    /// Accept frames (TCP, MQTT) and publish them to the frames stream.
    Ingest,
    /// Reconstruct the windows of the leased partitions and publish them.
    Work,
    /// Stitch, analyse and record the published windows; publish the dashboard events.
    Record,
}

/// Where JetStream keeps the streams.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Storage {
    /// On the server's disk: frames survive a broker restart (default).
    #[default]
    File,
    /// In the server's memory.
    Memory,
}

/// Defaults of [`BrokerConfig`].
pub mod defaults {
    /// The NATS default port on loopback: a broker on another host is an explicit choice.
    pub const URL: &str = "nats://127.0.0.1:4222";
    /// Prefix of every subject, stream and bucket.
    pub const NAME: &str = "csgate";
    /// 16 partitions spread evenly over up to 16 workers and stay few enough that each
    /// worker's share of leases is cheap to renew; more workers than partitions would idle.
    pub const PARTITIONS: u32 = 16;
    /// A dead worker's partitions move after at most this long plus one renewal period
    /// (a quarter of it): short enough that a few seconds of windows wait, long enough that a
    /// garbage-collection or disk stall of a second does not move partitions.
    pub const LEASE_TTL_MS: u64 = 6000;
    /// A frame handed to a live worker and not acknowledged within this is delivered again.
    /// Long: a takeover does not wait for it (the new holder restarts the partition's
    /// consumer), it only covers an acknowledgement lost on the way.
    pub const ACK_WAIT_MS: u64 = 30_000;
    /// Frames of one partition handed out and not yet acknowledged: enough to keep a worker's
    /// solver pool busy across the round trips, and the redo after a takeover small.
    pub const MAX_IN_FLIGHT: usize = 64;
    /// Frames wait a day for a worker (a cluster down overnight loses nothing).
    pub const FRAMES_MAX_AGE_S: u64 = 86_400;
    /// Reconstructed windows wait a day for the recorder.
    pub const WINDOWS_MAX_AGE_S: u64 = 86_400;
    /// Dashboards can catch up on the last hour of events.
    pub const EVENTS_MAX_AGE_S: u64 = 3600;
    /// The server's duplicate detection window: well beyond a takeover (seconds), so a
    /// window redone by a new holder is stored once.
    pub const DUPLICATE_WINDOW_S: u64 = 120;
}

/// `[broker]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct BrokerConfig {
    /// Roles of this process: any of `ingest`, `work`, `record`. Default none: a standalone
    /// gateway (TCP ingest, reconstruction and records in one process, no broker).
    pub roles: Vec<Role>,
    /// The NATS server. Default `nats://127.0.0.1:4222`.
    pub url: String,
    /// Prefix of every subject, stream, consumer and bucket of the cluster. Default `csgate`.
    pub name: String,
    /// Partitions of the frames; the same in every process of a cluster. Default 16.
    pub partitions: u32,
    /// This worker's id in the leases; empty: `<host>-<pid>`. Default empty.
    pub worker_id: String,
    /// Lease time to live, milliseconds. Default 6000.
    pub lease_ttl_ms: u64,
    /// Redelivery of an unacknowledged frame to a live holder, milliseconds. Default 30000.
    pub ack_wait_ms: u64,
    /// Unacknowledged frames per partition. Default 64.
    pub max_in_flight: usize,
    /// Age limit of frames waiting in the broker, seconds. Default 86400.
    pub frames_max_age_s: u64,
    /// Age limit of reconstructed windows waiting for the recorder, seconds. Default 86400.
    pub windows_max_age_s: u64,
    /// Age limit of dashboard events, seconds. Default 3600.
    pub events_max_age_s: u64,
    /// Duplicate detection window of the streams, seconds. Default 120.
    pub duplicate_window_s: u64,
    /// Stream storage: `file` or `memory`. Default `file`.
    pub storage: Storage,
    /// The recorder publishes every event line (features, gaps, advice) on the broker.
    /// Default true.
    pub publish_events: bool,
}

impl Default for BrokerConfig {
    fn default() -> Self {
        Self {
            roles: Vec::new(),
            url: defaults::URL.into(),
            name: defaults::NAME.into(),
            partitions: defaults::PARTITIONS,
            worker_id: String::new(),
            lease_ttl_ms: defaults::LEASE_TTL_MS,
            ack_wait_ms: defaults::ACK_WAIT_MS,
            max_in_flight: defaults::MAX_IN_FLIGHT,
            frames_max_age_s: defaults::FRAMES_MAX_AGE_S,
            windows_max_age_s: defaults::WINDOWS_MAX_AGE_S,
            events_max_age_s: defaults::EVENTS_MAX_AGE_S,
            duplicate_window_s: defaults::DUPLICATE_WINDOW_S,
            storage: Storage::File,
            publish_events: true,
        }
    }
}

impl BrokerConfig {
    /// True when the process takes `role`.
    pub fn has(&self, role: Role) -> bool {
        self.roles.contains(&role)
    }

    /// True in broker mode (any role).
    pub fn enabled(&self) -> bool {
        !self.roles.is_empty()
    }

    /// The worker id: the configured one, or `<host>-<pid>`.
    pub fn worker_id(&self) -> String {
        if !self.worker_id.is_empty() {
            return self.worker_id.clone();
        }
        let host = std::fs::read_to_string("/etc/hostname")
            .ok()
            .map(|h| h.trim().to_string())
            .filter(|h| !h.is_empty())
            .unwrap_or_else(|| "csgate".into());
        let id: String = format!("{host}-{}", std::process::id())
            .chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                    c
                } else {
                    '_'
                }
            })
            .collect();
        id
    }

    /// Checks what serde cannot; `Err((key, expected))` names the key.
    pub fn check(&self) -> Result<(), (&'static str, String)> {
        let mut seen = std::collections::BTreeSet::new();
        for r in &self.roles {
            if !seen.insert(r) {
                return Err(("broker.roles", format!("role {r:?} given twice")));
            }
        }
        let name_ok = |s: &str| {
            !s.is_empty()
                && s.chars()
                    .all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-' || c == '_')
        };
        if !name_ok(&self.name) {
            return Err((
                "broker.name",
                format!(
                    "expected lowercase letters, digits, '-' or '_', found {:?}",
                    self.name
                ),
            ));
        }
        if !self.worker_id.is_empty()
            && !self
                .worker_id
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
        {
            return Err((
                "broker.worker_id",
                format!(
                    "expected letters, digits, '-' or '_', found {:?}",
                    self.worker_id
                ),
            ));
        }
        if !(self.url.starts_with("nats://") || self.url.starts_with("tls://")) {
            return Err((
                "broker.url",
                format!(
                    "expected a NATS URL such as \"nats://127.0.0.1:4222\", found {:?}",
                    self.url
                ),
            ));
        }
        if self.partitions == 0 || self.partitions > 1024 {
            return Err((
                "broker.partitions",
                format!("expected 1..=1024, found {}", self.partitions),
            ));
        }
        if self.lease_ttl_ms < 500 {
            return Err((
                "broker.lease_ttl_ms",
                format!(
                    "expected at least 500 milliseconds, found {}",
                    self.lease_ttl_ms
                ),
            ));
        }
        if self.ack_wait_ms < 1000 {
            return Err((
                "broker.ack_wait_ms",
                format!(
                    "expected at least 1000 milliseconds, found {}",
                    self.ack_wait_ms
                ),
            ));
        }
        if self.max_in_flight == 0 {
            return Err(("broker.max_in_flight", "expected at least 1".into()));
        }
        for (key, v) in [
            ("broker.frames_max_age_s", self.frames_max_age_s),
            ("broker.windows_max_age_s", self.windows_max_age_s),
            ("broker.events_max_age_s", self.events_max_age_s),
            ("broker.duplicate_window_s", self.duplicate_window_s),
        ] {
            if v == 0 {
                return Err((key, "expected a positive number of seconds".into()));
            }
        }
        if self.duplicate_window_s > self.windows_max_age_s.min(self.frames_max_age_s) {
            return Err((
                "broker.duplicate_window_s",
                "expected at most the streams' age limits".into(),
            ));
        }
        Ok(())
    }
}
