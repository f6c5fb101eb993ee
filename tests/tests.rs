//! Integration tests: one binary, one module per area.

mod analytics;
mod basis;
mod bench;
mod features;
mod pipeline;
mod plan;
/// The gateway daemon: end to end over loopback, SIGTERM, restart, configuration errors.
#[cfg(feature = "hdf5-store")]
mod serve;
mod sim;
mod solver;
mod store;
mod tcp_ingest;
mod trust;
mod util;
mod wire;
