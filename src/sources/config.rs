//! Configuration of the TCP ingest, with every default and the reason for it in one place.

use crate::packet::{AuthError, KeyRing, Limits, NodeKey};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::net::{Ipv4Addr, SocketAddr};
use std::time::Duration;

/// Defaults of [`IngestConfig`].
pub mod defaults {
    use std::net::{Ipv4Addr, SocketAddr};

    /// Loopback: listening on other interfaces is an explicit choice. Port 7700 is unassigned
    /// in the IANA registry's common range as far as we know (common practice: pick a free one).
    pub const LISTEN: SocketAddr = SocketAddr::new(std::net::IpAddr::V4(Ipv4Addr::LOCALHOST), 7700);
    /// One connection per node; 256 covers a large plant and keeps file descriptors well
    /// under the usual 1024 soft limit.
    pub const MAX_CONNECTIONS: usize = 256;
    /// Nodes send a window every hop (tens of milliseconds to seconds); a minute of silence
    /// means the node or the link is gone, and its slot is better freed.
    pub const IDLE_TIMEOUT_MS: u64 = 60_000;
    /// Windows handed to the pipeline before readers stop reading: about 4 s of 100 nodes
    /// at 25.6 kHz with 4096-sample windows and 50% hop, small enough to keep memory bounded
    /// (each window is at most one frame, 1 MiB, usually a few kB).
    pub const CHANNEL_CAPACITY: usize = 1024;
}

/// Settings of the TCP ingest. Its `Debug` form shows the enrolled node ids, never their keys.
#[derive(Clone, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct IngestConfig {
    /// Address to listen on; default `127.0.0.1:7700`.
    pub listen: SocketAddr,
    /// Most concurrent node connections; more wait in the listen backlog.
    pub max_connections: usize,
    /// A connection silent for this long is closed, in milliseconds.
    pub idle_timeout_ms: u64,
    /// Frame and window limits.
    pub limits: Limits,
    /// Capacity of the hand-off channel, in windows.
    pub channel_capacity: usize,
    /// Reject frames from nodes that are not enrolled.
    pub require_auth: bool,
    /// Enrolled nodes: node id (decimal, as text because TOML keys are strings) to key (hex).
    pub enrolled: BTreeMap<String, String>,
    /// Send an acknowledgement frame for every window accepted.
    pub send_acks: bool,
    /// Record every accepted window frame, exactly as received, to this packet log (appended
    /// if it exists), for later `csgate replay`. Default: none.
    pub record_log: Option<std::path::PathBuf>,
}

impl std::fmt::Debug for IngestConfig {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let enrolled: Vec<(&str, &str)> = self
            .enrolled
            .keys()
            .map(|id| (id.as_str(), "<redacted>"))
            .collect();
        f.debug_struct("IngestConfig")
            .field("listen", &self.listen)
            .field("max_connections", &self.max_connections)
            .field("idle_timeout_ms", &self.idle_timeout_ms)
            .field("limits", &self.limits)
            .field("channel_capacity", &self.channel_capacity)
            .field("require_auth", &self.require_auth)
            .field("enrolled", &enrolled)
            .field("send_acks", &self.send_acks)
            .field("record_log", &self.record_log)
            .finish()
    }
}

impl Default for IngestConfig {
    fn default() -> Self {
        IngestConfig {
            listen: defaults::LISTEN,
            max_connections: defaults::MAX_CONNECTIONS,
            idle_timeout_ms: defaults::IDLE_TIMEOUT_MS,
            limits: Limits::default(),
            channel_capacity: defaults::CHANNEL_CAPACITY,
            require_auth: false,
            enrolled: BTreeMap::new(),
            send_acks: true,
            record_log: None,
        }
    }
}

impl IngestConfig {
    /// A default configuration listening on `127.0.0.1:0` (tests).
    pub fn loopback_ephemeral() -> IngestConfig {
        IngestConfig {
            listen: SocketAddr::new(Ipv4Addr::LOCALHOST.into(), 0),
            ..IngestConfig::default()
        }
    }

    /// The idle timeout as a duration.
    pub fn idle_timeout(&self) -> Duration {
        Duration::from_millis(self.idle_timeout_ms)
    }

    /// Parses the enrolled keys.
    pub fn key_ring(&self) -> Result<KeyRing, AuthError> {
        let mut ring = KeyRing::new(self.require_auth);
        for (node, hex) in &self.enrolled {
            let id: u32 = node
                .trim()
                .parse()
                .map_err(|_| AuthError::BadKey(format!("node id {node:?} is not a u32")))?;
            let key =
                NodeKey::from_hex(hex).map_err(|e| AuthError::BadKey(format!("node {id}: {e}")))?;
            ring.insert(id, key);
        }
        Ok(ring)
    }
}
