//! Integration tests: one binary, one module per area.

mod basis;
mod bench;
mod features;
mod pipeline;
mod sim;
mod solver;
mod store;
mod tcp_ingest;
mod util;
mod wire;
