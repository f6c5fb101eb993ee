//! Integration tests: one binary, one module per area.

mod analytics;
mod basis;
mod features;
mod pipeline;
mod sim;
mod solver;
mod store;
mod tcp_ingest;
mod trust;
mod util;
mod wire;
