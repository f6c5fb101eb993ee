//! Integration tests: one binary, one module per area.

/// Sampling advice to nodes, end to end over loopback.
#[cfg(feature = "hdf5-store")]
mod advice;
mod analytics;
mod basis;
mod bench;
/// Broker mode: NATS JetStream workers with one killed, the MQTT source (real servers on
/// loopback).
#[cfg(feature = "hdf5-store")]
mod broker;
/// Fault injection against the running gateway: cut frames, reconnects, duplicates and late
/// windows, refused frames, idle peers, the connection cap, a failing record folder, SIGKILL;
/// and the load test's short run.
#[cfg(feature = "hdf5-store")]
mod faults;
mod features;
/// Seeded mutation fuzzing of every input decoder, and the regressions it found.
#[cfg(feature = "hdf5-store")]
mod fuzz;
/// `csgate inspect`: JSON summary, PNG plots, bad input.
#[cfg(feature = "hdf5-store")]
mod inspect;
mod pipeline;
mod plan;
/// Security posture: loopback defaults, keys never printed, enrolment.
#[cfg(feature = "hdf5-store")]
mod security;
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
