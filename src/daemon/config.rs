//! The gateway's configuration file (`csgate serve --config FILE.toml`): typed sections, their
//! defaults with the reason for each, and a loader whose every error names the file, the key
//! and what was expected. `configs/gateway.toml` documents every key.
//!
//! Two levels, as the binary needs them: [`GatewayConfig`] is what the file says (serde, every
//! key optional); [`GatewayConfig::load`] also checks what serde cannot (key hex, worker count,
//! record folder writable) so nothing downstream re-checks. Relative paths are taken relative
//! to the folder of the configuration file, so a unit file can start the daemon from anywhere.

use crate::packet::{KeyRing, Limits, NodeKey};
use crate::pipeline::run::PipelineConfig;
use crate::sources::IngestConfig;
use crate::store::SinkConfig;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::net::{IpAddr, Ipv4Addr, SocketAddr};
use std::path::{Path, PathBuf};
use std::time::Duration;

/// Defaults of the sections owned by the daemon (ingest and pipeline keep their own).
pub mod defaults {
    use std::net::{IpAddr, Ipv4Addr, SocketAddr};

    /// Loopback, one above the ingest port: dashboards on other hosts are an explicit choice.
    pub const HTTP_LISTEN: SocketAddr = SocketAddr::new(IpAddr::V4(Ipv4Addr::LOCALHOST), 7701);
    /// Events kept for a slow feed reader before it skips ahead (it is told how many it
    /// missed): a few seconds of window events of a large plant.
    pub const FEED_CAPACITY: usize = 1024;
    /// A reader or a crash loses at most about a second of record.
    pub const FLUSH_INTERVAL_MS: u64 = 1000;
    /// One file per hour keeps files a convenient size to copy and open.
    pub const ROTATE_AFTER_S: u64 = 3600;
    /// 2 GiB: well inside what every file system and copy tool handles.
    pub const ROTATE_MIB: u64 = 2048;
    /// Record messages waiting for the writer thread: a few seconds of blocks and rows, so a
    /// slow disk pushes back on the pipeline instead of growing memory.
    pub const RECORD_QUEUE: usize = 1024;
    /// Long enough to reconstruct a full solver queue (256 windows) on a small gateway; a
    /// second signal or this deadline discards the packets still waiting instead.
    pub const DRAIN_TIMEOUT_S: u64 = 30;
    /// After a write error (disk full, folder read-only), a new record file is tried this
    /// often: soon enough that little more is lost once space returns, seldom enough that a
    /// failing disk is not hammered and the log gets one line per try.
    pub const WRITE_RETRY_MS: u64 = 10_000;
    /// A new stream waits this long for others before the next record file is started for
    /// it: nodes that connect together (after a restart of the gateway, or of a site's power)
    /// then share one new file instead of costing one each; the delay is of the order of the
    /// flush interval, so readers and a crash see little difference.
    pub const NEW_STREAM_WAIT_MS: u64 = 2_000;
}

/// Errors of loading a configuration. Every message names the file and, where there is one,
/// the key.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ConfigError {
    /// The file cannot be read.
    #[error("{file}: cannot read the configuration: {source}")]
    Read {
        /// The file.
        file: PathBuf,
        /// The OS error.
        source: std::io::Error,
    },
    /// Not valid TOML.
    #[error("{file}: line {line}: not valid TOML: {message}")]
    Syntax {
        /// The file.
        file: PathBuf,
        /// Line (1-based) of the fault.
        line: usize,
        /// The parser's message.
        message: String,
    },
    /// A key that is not part of the configuration.
    #[error("{file}: unknown key `{key}` (every key is listed in configs/gateway.toml)")]
    UnknownKey {
        /// The file.
        file: PathBuf,
        /// Dotted key path.
        key: String,
    },
    /// A key with a value of the wrong kind or out of range.
    #[error("{file}: line {line}: key `{key}`: {expected}")]
    Value {
        /// The file.
        file: PathBuf,
        /// Line (1-based), 0 when not known.
        line: usize,
        /// Dotted key path.
        key: String,
        /// What was found and what was expected.
        expected: String,
    },
}

impl ConfigError {
    /// The dotted key the error is about, if any.
    pub fn key(&self) -> Option<&str> {
        match self {
            ConfigError::UnknownKey { key, .. } | ConfigError::Value { key, .. } => Some(key),
            _ => None,
        }
    }
}

/// The whole file.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct GatewayConfig {
    /// `[site]`: names for logs and metrics.
    pub site: SiteSection,
    /// `[ingest]`: the TCP listener for nodes.
    pub ingest: IngestSection,
    /// `[[node]]`: enrolled nodes.
    #[serde(rename = "node", skip_serializing_if = "Vec::is_empty")]
    pub nodes: Vec<NodeEntry>,
    /// `[pipeline]`: reconstruction settings of every stream (the pipeline's own
    /// configuration, embedded whole so that what it gains is configurable here).
    pub pipeline: PipelineConfig,
    /// `[record]`: the record folder and its files.
    pub record: RecordSection,
    /// `[http]`: metrics, health and event feed.
    pub http: HttpSection,
    /// `[log]`: log format and filter.
    pub log: LogSection,
    /// `[shutdown]`: drain on SIGINT/SIGTERM.
    pub shutdown: ShutdownSection,
    /// `[advice]`: the sampling-advice rule for nodes with `advise = true`.
    pub advice: crate::advice::AdviceConfig,
    /// `[mqtt]`: the MQTT source for nodes that publish.
    pub mqtt: crate::sources::mqtt::MqttConfig,
    /// `[broker]`: broker mode (roles, NATS server, partitions, leases; docs/scale-out.md).
    pub broker: crate::broker::BrokerConfig,
}

/// `[site]`.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SiteSection {
    /// Name of the site, in the health answer and the first log line. Default empty.
    pub name: String,
}

/// `[ingest]`: what [`IngestConfig`] holds except the keys, which come from `[[node]]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct IngestSection {
    /// Address for node connections. Default `127.0.0.1:7700`.
    pub listen: SocketAddr,
    /// Most concurrent node connections. Default 256.
    pub max_connections: usize,
    /// Close a connection silent this long, milliseconds. Default 60000.
    pub idle_timeout_ms: u64,
    /// Windows between the sockets and the pipeline. Default 1024.
    pub channel_capacity: usize,
    /// Reject frames of nodes without a key. Default false.
    pub require_auth: bool,
    /// Acknowledge every accepted window. Default true.
    pub send_acks: bool,
    /// Also record every accepted frame to this packet log. Default none.
    pub record_log: Option<PathBuf>,
    /// Frame and window limits.
    pub limits: LimitsSection,
}

/// `[ingest.limits]` (mirrors [`Limits`], with unknown keys rejected).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LimitsSection {
    /// Largest frame, bytes.
    pub max_frame_len: usize,
    /// Smallest window length `n`.
    pub min_window_len: u32,
    /// Largest window length `n`.
    pub max_window_len: u32,
}

impl Default for LimitsSection {
    fn default() -> Self {
        let l = Limits::default();
        Self {
            max_frame_len: l.max_frame_len,
            min_window_len: l.min_window_len,
            max_window_len: l.max_window_len,
        }
    }
}

impl Default for IngestSection {
    fn default() -> Self {
        let d = IngestConfig::default();
        Self {
            listen: d.listen,
            max_connections: d.max_connections,
            idle_timeout_ms: d.idle_timeout_ms,
            channel_capacity: d.channel_capacity,
            require_auth: d.require_auth,
            send_acks: d.send_acks,
            record_log: None,
            limits: LimitsSection::default(),
        }
    }
}

/// `[[node]]`: one enrolled node. Its `Debug` form redacts the key (configs are logged and
/// printed in error paths; keys never are).
#[derive(Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NodeEntry {
    /// Node id on the wire.
    pub id: u32,
    /// Label for people (machine tag). Default empty.
    #[serde(default)]
    pub name: String,
    /// Pre-shared key, hex (at least 16 bytes). Without it the node's frames must be untagged
    /// (and are refused when `ingest.require_auth` is set).
    #[serde(default)]
    pub key: Option<String>,
    /// Send this node sampling advice (samples per window, wire format 5.2 message type 1)
    /// computed from its streams' sparsity and trust. Default false.
    #[serde(default)]
    pub advise: bool,
}

impl std::fmt::Debug for NodeEntry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("NodeEntry")
            .field("id", &self.id)
            .field("name", &self.name)
            .field("key", &self.key.as_ref().map(|_| "<redacted>"))
            .field("advise", &self.advise)
            .finish()
    }
}

/// `[record]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct RecordSection {
    /// Record folder (created if missing). Default `records`.
    pub folder: PathBuf,
    /// File name prefix. Default `rec`.
    pub prefix: String,
    /// Start a new file after this many seconds; 0 never. Default 3600.
    pub rotate_after_s: u64,
    /// Start a new file at this size, MiB; 0 never. Default 2048.
    pub rotate_mib: u64,
    /// Flush interval, milliseconds. Default 1000.
    pub flush_interval_ms: u64,
    /// Deflate level 1-9 of the samples, 0 none. Default 0 (noisy float data shrinks little
    /// and the CPU belongs to the solver).
    pub deflate: u8,
    /// Record messages waiting for the writer. Default 1024.
    pub queue_capacity: usize,
    /// After a write error, try a new record file this often, milliseconds; meanwhile what
    /// arrives is counted and discarded. Default 10000.
    pub write_retry_ms: u64,
    /// A stream that appears while a file is open waits this long, milliseconds, for other
    /// new streams before the next file is started for them all; 0 starts it at once.
    /// Default 2000.
    pub new_stream_wait_ms: u64,
}

impl Default for RecordSection {
    fn default() -> Self {
        Self {
            folder: PathBuf::from("records"),
            prefix: "rec".into(),
            rotate_after_s: defaults::ROTATE_AFTER_S,
            rotate_mib: defaults::ROTATE_MIB,
            flush_interval_ms: defaults::FLUSH_INTERVAL_MS,
            deflate: 0,
            queue_capacity: defaults::RECORD_QUEUE,
            write_retry_ms: defaults::WRITE_RETRY_MS,
            new_stream_wait_ms: defaults::NEW_STREAM_WAIT_MS,
        }
    }
}

/// `[http]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct HttpSection {
    /// Serve `/metrics`, `/health` and `/events`. Default true.
    pub enabled: bool,
    /// Address. Default `127.0.0.1:7701`.
    pub listen: SocketAddr,
    /// Events buffered per feed reader. Default 1024.
    pub feed_capacity: usize,
}

impl Default for HttpSection {
    fn default() -> Self {
        Self {
            enabled: true,
            listen: defaults::HTTP_LISTEN,
            feed_capacity: defaults::FEED_CAPACITY,
        }
    }
}

/// Log line format.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum LogFormat {
    /// One readable line per event (default).
    #[default]
    Human,
    /// One JSON object per line, for a log collector.
    Json,
}

/// `[log]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LogSection {
    /// Format. Default `human`.
    pub format: LogFormat,
    /// tracing env-filter directives; the `CSGATE_LOG` variable overrides. Default `info`.
    pub filter: String,
}

impl Default for LogSection {
    fn default() -> Self {
        Self {
            format: LogFormat::Human,
            filter: "info".into(),
        }
    }
}

/// `[shutdown]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ShutdownSection {
    /// Seconds of graceful drain before the packets still waiting are discarded. Default 30.
    pub drain_timeout_s: u64,
}

impl Default for ShutdownSection {
    fn default() -> Self {
        Self {
            drain_timeout_s: defaults::DRAIN_TIMEOUT_S,
        }
    }
}

/// Byte offset to 1-based line.
fn line_of(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// Finds the line of `key = ` under its table in `text` (best effort, for errors found after
/// deserialization). 0 when not found.
fn line_of_key(text: &str, dotted: &str) -> usize {
    let leaf = dotted.rsplit('.').next().unwrap_or(dotted);
    let leaf = leaf.split('[').next().unwrap_or(leaf);
    for (i, line) in text.lines().enumerate() {
        let t = line.trim_start();
        if let Some(rest) = t.strip_prefix(leaf) {
            if rest.trim_start().starts_with('=') {
                return i + 1;
            }
        }
    }
    0
}

impl GatewayConfig {
    /// Reads, parses and checks a configuration file.
    pub fn load(path: &Path) -> Result<GatewayConfig, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            file: path.to_path_buf(),
            source,
        })?;
        let mut config = Self::from_toml_str(&text, path)?;
        config.resolve_paths(path.parent().unwrap_or(Path::new(".")));
        config.check_record_folder(path, &text)?;
        Ok(config)
    }

    /// Parses and checks a configuration given as text (`path` names it in errors). Paths
    /// stay as written; the record folder is not touched.
    pub fn from_toml_str(text: &str, path: &Path) -> Result<GatewayConfig, ConfigError> {
        let file = path.to_path_buf();
        let de = toml::de::Deserializer::parse(text).map_err(|e| ConfigError::Syntax {
            file: file.clone(),
            line: e.span().map(|s| line_of(text, s.start)).unwrap_or(0),
            message: e.message().trim().to_string(),
        })?;
        let mut ignored = Vec::new();
        let mut note_ignored = |p: serde_ignored::Path| ignored.push(p.to_string());
        let ignoring = serde_ignored::Deserializer::new(de, &mut note_ignored);
        let parsed: Result<GatewayConfig, _> = serde_path_to_error::deserialize(ignoring);
        let config = match parsed {
            Ok(c) => c,
            Err(e) => {
                let path = e.path().to_string();
                let inner = e.into_inner();
                let line = inner.span().map(|s| line_of(text, s.start)).unwrap_or(0);
                let message = inner.message().trim().to_string();
                if let Some(field) = unknown_field(&message) {
                    let key = if path == "." || path.is_empty() || path == field {
                        field
                    } else if path.ends_with(&format!(".{field}")) {
                        path
                    } else {
                        format!("{path}.{field}")
                    };
                    return Err(ConfigError::UnknownKey { file, key });
                }
                let expected = if path.ends_with("listen") {
                    format!("{message}; expected \"address:port\", e.g. \"127.0.0.1:7700\"")
                } else {
                    message
                };
                return Err(ConfigError::Value {
                    file,
                    line,
                    key: path,
                    expected,
                });
            }
        };
        if let Some(key) = ignored.into_iter().next() {
            return Err(ConfigError::UnknownKey { file, key });
        }
        config.check(text, path)?;
        Ok(config)
    }

    fn check(&self, text: &str, path: &Path) -> Result<(), ConfigError> {
        let bad = |key: &str, expected: String| ConfigError::Value {
            file: path.to_path_buf(),
            line: line_of_key(text, key),
            key: key.to_string(),
            expected,
        };
        let mut seen = BTreeMap::new();
        for (i, node) in self.nodes.iter().enumerate() {
            if let Some(prev) = seen.insert(node.id, i) {
                return Err(bad(
                    &format!("node[{i}].id"),
                    format!("node id {} is enrolled twice (also node[{prev}])", node.id),
                ));
            }
            if let Some(hex) = &node.key {
                NodeKey::from_hex(hex).map_err(|e| {
                    bad(
                        &format!("node[{i}].key"),
                        format!("{e}; expected a hex string of at least 32 digits"),
                    )
                })?;
            }
        }
        if let Err(msg) = self.advice.check() {
            let key = msg
                .split_whitespace()
                .next()
                .unwrap_or("advice")
                .to_string();
            return Err(bad(&key, msg));
        }
        if self.nodes.iter().any(|n| n.advise) && !self.pipeline.trust.enabled {
            let i = self.nodes.iter().position(|n| n.advise).unwrap_or(0);
            return Err(bad(
                &format!("node[{i}].advise"),
                "sampling advice needs the trust figures: set pipeline.trust.enabled = true".into(),
            ));
        }
        if let Err((key, expected)) = self.broker.check() {
            return Err(bad(key, expected));
        }
        if let Err((key, expected)) = self.mqtt.check() {
            return Err(bad(key, expected));
        }
        if self.mqtt.enabled
            && self.broker.enabled()
            && !self.broker.has(crate::broker::Role::Ingest)
        {
            return Err(bad(
                "mqtt.enabled",
                "the MQTT source feeds the ingest: add \"ingest\" to broker.roles or set mqtt.enabled = false".into(),
            ));
        }
        if self.ingest.max_connections == 0 {
            return Err(bad("ingest.max_connections", "expected at least 1".into()));
        }
        if self.ingest.channel_capacity == 0 {
            return Err(bad("ingest.channel_capacity", "expected at least 1".into()));
        }
        if self.ingest.idle_timeout_ms == 0 {
            return Err(bad(
                "ingest.idle_timeout_ms",
                "expected a positive number of milliseconds".into(),
            ));
        }
        let l = &self.ingest.limits;
        if l.min_window_len == 0 || l.min_window_len > l.max_window_len {
            return Err(bad(
                "ingest.limits.min_window_len",
                format!(
                    "expected 1 <= min_window_len <= max_window_len ({}), found {}",
                    l.max_window_len, l.min_window_len
                ),
            ));
        }
        if l.max_frame_len == 0 || l.max_frame_len > crate::packet::wire::MAX_FRAME_LEN {
            return Err(bad(
                "ingest.limits.max_frame_len",
                format!(
                    "expected 1..={} bytes, found {}",
                    crate::packet::wire::MAX_FRAME_LEN,
                    l.max_frame_len
                ),
            ));
        }
        if self.pipeline.workers == 0 {
            return Err(bad(
                "pipeline.workers",
                "expected at least 1 solver worker".into(),
            ));
        }
        if self.record.folder.as_os_str().is_empty() {
            return Err(bad("record.folder", "expected a folder path".into()));
        }
        if self.record.prefix.is_empty()
            || !self
                .record
                .prefix
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-')
        {
            return Err(bad(
                "record.prefix",
                format!(
                    "expected letters, digits, '-' or '_', found {:?}",
                    self.record.prefix
                ),
            ));
        }
        if self.record.flush_interval_ms == 0 {
            return Err(bad(
                "record.flush_interval_ms",
                "expected a positive number of milliseconds".into(),
            ));
        }
        if self.record.deflate > 9 {
            return Err(bad(
                "record.deflate",
                format!("expected 0 (none) to 9, found {}", self.record.deflate),
            ));
        }
        if self.record.queue_capacity == 0 {
            return Err(bad("record.queue_capacity", "expected at least 1".into()));
        }
        if self.record.write_retry_ms == 0 {
            return Err(bad(
                "record.write_retry_ms",
                "expected a positive number of milliseconds".into(),
            ));
        }
        if self.http.feed_capacity == 0 {
            return Err(bad("http.feed_capacity", "expected at least 1".into()));
        }
        if self.http.enabled
            && self.http.listen == self.ingest.listen
            && self.http.listen.port() != 0
        {
            return Err(bad(
                "http.listen",
                format!(
                    "expected an address other than ingest.listen ({})",
                    self.ingest.listen
                ),
            ));
        }
        tracing_subscriber::EnvFilter::try_new(&self.log.filter).map_err(|e| {
            bad(
                "log.filter",
                format!("expected tracing filter directives such as \"info,csgate=debug\": {e}"),
            )
        })?;
        Ok(())
    }

    /// Makes relative paths relative to `base` (the configuration file's folder).
    pub fn resolve_paths(&mut self, base: &Path) {
        let fix = |p: &mut PathBuf| {
            if p.is_relative() {
                *p = base.join(&*p);
            }
        };
        fix(&mut self.record.folder);
        if let Some(p) = &mut self.ingest.record_log {
            fix(p);
        }
    }

    /// Creates the record folder if missing and checks that files can be created in it.
    pub fn check_record_folder(&self, path: &Path, text: &str) -> Result<(), ConfigError> {
        let folder = &self.record.folder;
        let bad = |what: String| ConfigError::Value {
            file: path.to_path_buf(),
            line: line_of_key(text, "folder"),
            key: "record.folder".into(),
            expected: what,
        };
        if folder.exists() && !folder.is_dir() {
            return Err(bad(format!(
                "{} exists and is not a folder; expected a folder for the record files",
                folder.display()
            )));
        }
        std::fs::create_dir_all(folder).map_err(|e| {
            bad(format!(
                "cannot create {}: {e}; expected a folder the gateway may create",
                folder.display()
            ))
        })?;
        let probe = folder.join(format!(".csgate-write-check-{}", std::process::id()));
        std::fs::write(&probe, b"").map_err(|e| {
            bad(format!(
                "cannot create files in {}: {e}; expected a folder the gateway may write",
                folder.display()
            ))
        })?;
        let _ = std::fs::remove_file(&probe);
        Ok(())
    }

    /// The ingest configuration, with the keys of `[[node]]`.
    pub fn ingest_config(&self) -> IngestConfig {
        let s = &self.ingest;
        IngestConfig {
            listen: s.listen,
            max_connections: s.max_connections,
            idle_timeout_ms: s.idle_timeout_ms,
            limits: Limits {
                max_frame_len: s.limits.max_frame_len,
                min_window_len: s.limits.min_window_len,
                max_window_len: s.limits.max_window_len,
            },
            channel_capacity: s.channel_capacity,
            require_auth: s.require_auth,
            enrolled: self
                .nodes
                .iter()
                .filter_map(|n| n.key.as_ref().map(|k| (n.id.to_string(), k.clone())))
                .collect(),
            send_acks: s.send_acks,
            record_log: s.record_log.clone(),
        }
    }

    /// The advice board for the nodes with `advise = true`, if any.
    pub fn advice_board(&self) -> Option<std::sync::Arc<crate::advice::AdviceBoard>> {
        let nodes: Vec<u32> = self
            .nodes
            .iter()
            .filter(|n| n.advise)
            .map(|n| n.id)
            .collect();
        (!nodes.is_empty()).then(|| std::sync::Arc::new(crate::advice::AdviceBoard::new(nodes)))
    }

    /// The key ring (checked in [`GatewayConfig::from_toml_str`]).
    pub fn key_ring(&self) -> KeyRing {
        self.ingest_config()
            .key_ring()
            .unwrap_or_else(|_| KeyRing::new(self.ingest.require_auth))
    }

    /// The record writer's configuration.
    pub fn sink_config(&self, config_digest: String) -> SinkConfig {
        let r = &self.record;
        let mut c = SinkConfig::new(&r.folder);
        c.prefix = r.prefix.clone();
        c.writer.deflate = (r.deflate > 0).then_some(r.deflate);
        c.config_digest = config_digest;
        c.channel_capacity = r.queue_capacity;
        c.flush_interval = Duration::from_millis(r.flush_interval_ms);
        c.rotate_after = (r.rotate_after_s > 0).then(|| Duration::from_secs(r.rotate_after_s));
        c.rotate_bytes = (r.rotate_mib > 0).then_some(r.rotate_mib << 20);
        c.retry_after = Some(Duration::from_millis(r.write_retry_ms));
        c.new_stream_wait = Duration::from_millis(r.new_stream_wait_ms);
        c
    }

    /// Node names by id, for labels.
    pub fn node_names(&self) -> BTreeMap<u32, String> {
        self.nodes
            .iter()
            .filter(|n| !n.name.is_empty())
            .map(|n| (n.id, n.name.clone()))
            .collect()
    }

    /// A configuration for tests: everything on loopback port 0, records in `folder`.
    pub fn loopback_ephemeral(folder: &Path) -> GatewayConfig {
        let any = SocketAddr::new(IpAddr::V4(Ipv4Addr::LOCALHOST), 0);
        let mut c = GatewayConfig::default();
        c.ingest.listen = any;
        c.http.listen = any;
        c.record.folder = folder.to_path_buf();
        c
    }
}

/// The field name of serde's "unknown field `x`, expected ..." message.
fn unknown_field(message: &str) -> Option<String> {
    let rest = message.split("unknown field `").nth(1)?;
    Some(rest.split('`').next()?.to_string())
}
