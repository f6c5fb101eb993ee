//! Integration tests: one binary, one module per area.

mod basis;
mod features;
mod pipeline;
mod plan;
mod sim;
mod solver;
mod store;
mod tcp_ingest;
mod util;
mod wire;
