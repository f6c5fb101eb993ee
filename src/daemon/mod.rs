//! The gateway daemon behind `csgate serve`: one configuration file, TCP ingest, the
//! reconstruction pipeline and the record writer running together, metrics and an event feed
//! over HTTP, and an orderly shutdown.
//!
//! - [`config`]: the TOML configuration ([`GatewayConfig`]), its defaults and checks.
//! - [`serve`]: [`Gateway`] (bind, then run until [`Shutdown`]), the record tap, the drain.
//! - [`metrics`]: every exported metric ([`GatewayMetrics`]), OpenMetrics text.
//! - [`feed`]: the JSON-lines event hook ([`EventFeed`]) any stage can publish into.
//! - [`http`]: `/metrics`, `/health`, `/events`.

pub mod config;
pub mod feed;
pub mod http;
pub mod metrics;
pub mod serve;

pub use config::{ConfigError, GatewayConfig, LogFormat};
pub use feed::{EventFeed, GatewayEvent};
pub use metrics::GatewayMetrics;
pub use serve::{DaemonError, Gateway, ServeReport, Shutdown};
