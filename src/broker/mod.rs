//! Broker mode: the gateway's work spread over processes and machines through a NATS
//! JetStream server (docs/scale-out.md has the design and its guarantees).
//!
//! ```text
//!  nodes ─TCP/MQTT─► ingest ─► stream <name>_FRAMES   <name>.frames.<partition>.<node>.<channel>
//!        ─► workers (partitions leased in KV <name>_leases) ─► stream <name>_WINDOWS
//!        ─► recorder (reorder, overlap-add, features, HDF5) ─► stream <name>_EVENTS (dashboards)
//! ```
//!
//! A `csgate serve` process takes one or more roles (`broker.roles`): `ingest` publishes every
//! accepted frame, `work` reconstructs the windows of the partitions it holds a lease on, and
//! `record` stitches, analyses and records what the workers publish. Workers keep each
//! stream's windows in order (warm start); stitching happens after the broker, in the
//! recorder, so a window redone by a worker that took over is dropped there by its sequence
//! number, and overlap-add runs across the takeover as if nothing happened.
//!
//! - [`config`]: the `[broker]` section.
//! - [`message`]: the reconstructed-window message (byte layout).
//! - [`publish`]: the frame publisher of the `ingest` role (and of `csgate publish`).
//! - [`lease`]: partition leases in the broker's key-value store.
//! - [`worker`]: the `work` role.
//! - [`record`]: the `record` role's window source, and the dashboard publisher.
//! - [`server`]: a loopback NATS server as a child process (tests, `csgate bench --broker`).

pub mod config;
pub mod lease;
pub mod message;
pub mod publish;
pub mod record;
pub mod server;
pub mod worker;

pub use config::{BrokerConfig, Role};

use async_nats::jetstream::{self, stream};
use std::time::Duration;

/// Errors of the broker mode.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum BrokerError {
    /// The server could not be reached.
    #[error("cannot connect to the broker at {url} (broker.url): {message}")]
    Connect {
        /// The URL.
        url: String,
        /// The client's message.
        message: String,
    },
    /// A JetStream request failed.
    #[error("broker: cannot {what}: {message}")]
    JetStream {
        /// What was being done.
        what: String,
        /// The client's message.
        message: String,
    },
    /// This gateway's partition count differs from the cluster's.
    #[error(
        "broker.partitions = {ours}, but the broker's `{name}` cluster was set up with {theirs}; \
         every gateway of one cluster must use the same count"
    )]
    Partitions {
        /// The cluster name (`broker.name`).
        name: String,
        /// Ours.
        ours: u32,
        /// The cluster's.
        theirs: u32,
    },
}

impl BrokerError {
    pub(crate) fn js(what: impl Into<String>) -> impl FnOnce(String) -> BrokerError {
        let what = what.into();
        move |message| BrokerError::JetStream { what, message }
    }
}

/// Names of every stream, subject, consumer and bucket of one cluster (`broker.name`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Names {
    prefix: String,
}

impl Names {
    /// Names under `prefix` (letters, digits, `-`, `_`; checked with the configuration).
    pub fn new(prefix: &str) -> Self {
        Self {
            prefix: prefix.to_string(),
        }
    }

    fn upper(&self) -> String {
        self.prefix.to_ascii_uppercase().replace('-', "_")
    }

    /// The frames stream.
    pub fn frames_stream(&self) -> String {
        format!("{}_FRAMES", self.upper())
    }

    /// Subject of one frame.
    pub fn frame_subject(&self, partition: u32, node: u32, channel: u16) -> String {
        format!("{}.frames.{partition}.{node}.{channel}", self.prefix)
    }

    /// Filter of one partition's frames.
    pub fn partition_filter(&self, partition: u32) -> String {
        format!("{}.frames.{partition}.>", self.prefix)
    }

    /// Durable consumer of one partition.
    pub fn partition_consumer(&self, partition: u32) -> String {
        format!("part-{partition}")
    }

    /// The reconstructed-windows stream.
    pub fn windows_stream(&self) -> String {
        format!("{}_WINDOWS", self.upper())
    }

    /// Subject of one stream's reconstructed windows.
    pub fn window_subject(&self, node: u32, channel: u16) -> String {
        format!("{}.windows.{node}.{channel}", self.prefix)
    }

    /// Durable consumer of the recorder.
    pub fn recorder_consumer(&self) -> String {
        "recorder".to_string()
    }

    /// The dashboard events stream.
    pub fn events_stream(&self) -> String {
        format!("{}_EVENTS", self.upper())
    }

    /// Subject of one event line: `<name>.events.<kind>[.<node>.<channel>]`.
    pub fn event_subject(&self, kind: &str, stream: Option<(u32, u16)>) -> String {
        match stream {
            Some((node, channel)) => format!("{}.events.{kind}.{node}.{channel}", self.prefix),
            None => format!("{}.events.{kind}", self.prefix),
        }
    }

    /// Partition leases (key `p<partition>`, value the holder's worker id).
    pub fn leases_bucket(&self) -> String {
        format!("{}_leases", self.prefix.replace('-', "_"))
    }

    /// Live workers (key the worker id).
    pub fn workers_bucket(&self) -> String {
        format!("{}_workers", self.prefix.replace('-', "_"))
    }

    /// Cluster settings (key `partitions`).
    pub fn cluster_bucket(&self) -> String {
        format!("{}_cluster", self.prefix.replace('-', "_"))
    }
}

/// Message id of a frame or a reconstructed window, for the broker's duplicate detection:
/// `<node>.<channel>.<capture_id>.<seq>`.
pub fn window_msg_id(node: u32, channel: u16, capture_id: u32, seq: u64) -> String {
    format!("{node}.{channel}.{capture_id}.{seq}")
}

/// The partition of a stream: FNV-1a (32-bit; Fowler, Noll and Vo) over the node id (u32
/// little-endian) followed by the channel (u16 little-endian), modulo `partitions`. Every
/// ingest and worker of a cluster computes the same value.
pub fn partition_of(node: u32, channel: u16, partitions: u32) -> u32 {
    // FNV-1a 32-bit offset basis and prime, as published by its authors.
    let mut h: u32 = 0x811c_9dc5;
    for b in node.to_le_bytes().into_iter().chain(channel.to_le_bytes()) {
        h ^= u32::from(b);
        h = h.wrapping_mul(0x0100_0193);
    }
    h % partitions.max(1)
}

/// A connection to the broker with the cluster's names.
#[derive(Debug, Clone)]
pub struct Broker {
    /// The core client (plain publishes, subscriptions).
    pub client: async_nats::Client,
    /// JetStream on that client.
    pub js: jetstream::Context,
    /// The cluster's names.
    pub names: Names,
    /// The configuration.
    pub config: BrokerConfig,
}

impl Broker {
    /// Connects to `config.url` and checks (or sets up) the cluster's partition count.
    pub async fn connect(config: &BrokerConfig, client_name: &str) -> Result<Broker, BrokerError> {
        let client = async_nats::ConnectOptions::new()
            .name(client_name)
            .connection_timeout(Duration::from_secs(5))
            .connect(config.url.as_str())
            .await
            .map_err(|e| BrokerError::Connect {
                url: config.url.clone(),
                message: e.to_string(),
            })?;
        let js = jetstream::new(client.clone());
        let broker = Broker {
            client,
            js,
            names: Names::new(&config.name),
            config: config.clone(),
        };
        // A server just started answers JetStream requests a moment after it accepts clients.
        let mut tries = 0;
        loop {
            match broker.check_partitions().await {
                Ok(()) => return Ok(broker),
                Err(e @ BrokerError::Partitions { .. }) => return Err(e),
                Err(e) if tries >= 20 => return Err(e),
                Err(_) => {
                    tries += 1;
                    tokio::time::sleep(Duration::from_millis(250)).await;
                }
            }
        }
    }

    fn storage(&self) -> stream::StorageType {
        match self.config.storage {
            config::Storage::File => stream::StorageType::File,
            config::Storage::Memory => stream::StorageType::Memory,
        }
    }

    /// Creates a stream unless it exists (an existing stream is used as it is).
    async fn ensure_stream(&self, cfg: stream::Config) -> Result<stream::Stream, BrokerError> {
        let name = cfg.name.clone();
        if let Ok(s) = self.js.get_stream(&name).await {
            return Ok(s);
        }
        match self.js.create_stream(cfg).await {
            Ok(s) => Ok(s),
            // Another gateway created it meanwhile.
            Err(_) => self
                .js
                .get_stream(&name)
                .await
                .map_err(|e| e.to_string())
                .map_err(BrokerError::js(format!("create the stream {name}"))),
        }
    }

    /// The frames stream: a work queue (a frame leaves the stream once a worker has
    /// acknowledged it), with duplicate detection on the frame's identity.
    pub async fn frames_stream(&self) -> Result<stream::Stream, BrokerError> {
        let c = &self.config;
        self.ensure_stream(stream::Config {
            name: self.names.frames_stream(),
            subjects: vec![format!("{}.frames.>", self.config.name)],
            retention: stream::RetentionPolicy::WorkQueue,
            max_age: Duration::from_secs(c.frames_max_age_s),
            duplicate_window: Duration::from_secs(c.duplicate_window_s),
            storage: self.storage(),
            num_replicas: 1,
            ..Default::default()
        })
        .await
    }

    /// The reconstructed-windows stream: a work queue for the recorder, with duplicate
    /// detection on the window's identity (a window redone after a takeover is stored once).
    pub async fn windows_stream(&self) -> Result<stream::Stream, BrokerError> {
        let c = &self.config;
        self.ensure_stream(stream::Config {
            name: self.names.windows_stream(),
            subjects: vec![format!("{}.windows.>", self.config.name)],
            retention: stream::RetentionPolicy::WorkQueue,
            max_age: Duration::from_secs(c.windows_max_age_s),
            duplicate_window: Duration::from_secs(c.duplicate_window_s),
            storage: self.storage(),
            num_replicas: 1,
            ..Default::default()
        })
        .await
    }

    /// The dashboard events stream: kept for `events_max_age_s` for any number of readers.
    pub async fn events_stream(&self) -> Result<stream::Stream, BrokerError> {
        self.ensure_stream(stream::Config {
            name: self.names.events_stream(),
            subjects: vec![format!("{}.events.>", self.config.name)],
            retention: stream::RetentionPolicy::Limits,
            max_age: Duration::from_secs(self.config.events_max_age_s),
            storage: self.storage(),
            num_replicas: 1,
            ..Default::default()
        })
        .await
    }

    /// A key-value bucket with history 1 whose entries expire `max_age` after their last
    /// write (zero: never).
    ///
    /// The bucket's stream is created here, with the settings the client library's own bucket
    /// creation uses: that call first asks for the account's limits in a form the 2.9 servers
    /// (Debian's) do not answer with, and fails.
    pub async fn bucket(
        &self,
        bucket: &str,
        max_age: Duration,
    ) -> Result<jetstream::kv::Store, BrokerError> {
        self.ensure_stream(stream::Config {
            name: format!("KV_{bucket}"),
            subjects: vec![format!("$KV.{bucket}.>")],
            max_messages_per_subject: 1,
            max_age,
            allow_rollup: true,
            deny_delete: true,
            allow_direct: true,
            discard: stream::DiscardPolicy::New,
            storage: self.storage(),
            num_replicas: 1,
            ..Default::default()
        })
        .await?;
        self.js
            .get_key_value(bucket)
            .await
            .map_err(|e| e.to_string())
            .map_err(BrokerError::js(format!("open the bucket {bucket}")))
    }

    /// The first gateway of a cluster records its partition count; every later one must
    /// match it (a different count would send a stream's frames to two partitions).
    async fn check_partitions(&self) -> Result<(), BrokerError> {
        let kv = self
            .bucket(&self.names.cluster_bucket(), Duration::ZERO)
            .await?;
        let ours = self.config.partitions;
        let _ = kv.create("partitions", ours.to_string().into()).await;
        let theirs = kv
            .get("partitions")
            .await
            .map_err(|e| e.to_string())
            .map_err(BrokerError::js("read the cluster's partition count"))?
            .and_then(|b| std::str::from_utf8(&b).ok()?.trim().parse::<u32>().ok());
        match theirs {
            Some(t) if t != ours => Err(BrokerError::Partitions {
                name: self.config.name.clone(),
                ours,
                theirs: t,
            }),
            _ => Ok(()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn partition_hash_matches_fnv1a() {
        // FNV-1a 32 of the six bytes 07 00 00 00 01 00, computed independently in Python:
        // h=0x811c9dc5; for b in bytes([7,0,0,0,1,0]): h=((h^b)*0x01000193)&0xffffffff
        // (0xB0781A1B < u32::MAX, so the modulo leaves it as it is.)
        assert_eq!(partition_of(7, 1, u32::MAX), 0xB078_1A1B);
        assert!(partition_of(101, 0, 16) < 16);
        assert_eq!(partition_of(5, 0, 1), 0);
    }

    #[test]
    fn names_follow_the_prefix() {
        let n = Names::new("plant-a");
        assert_eq!(n.frames_stream(), "PLANT_A_FRAMES");
        assert_eq!(n.frame_subject(3, 101, 1), "plant-a.frames.3.101.1");
        assert_eq!(n.leases_bucket(), "plant_a_leases");
        assert_eq!(
            n.event_subject("features", Some((101, 0))),
            "plant-a.events.features.101.0"
        );
    }
}
