//! # csgate
//!
//! A gateway for compressively sampled sensor streams. Battery-powered vibration and acoustic
//! nodes send, for every window of `n` instants on their ADC grid, only `m << n` randomly chosen
//! samples. csgate recovers each window by sparse recovery (`y = C Psi s`, solved by FISTA),
//! stitches the windows by overlap-add into one continuous record per node and channel, and
//! writes HDF5 records, spectral features and dashboard feeds.
//!
//! ```text
//!  TCP / packet log ──► packet (decode, validate) ──► stream (reorder, gaps)
//!        ──► solver (worker pool, FISTA over a basis) ──► stream::overlap_add (stitch)
//!        ──► store (HDF5 record)  ──► features (spectra, peaks, fault frequencies)
//! ```
//!
//! ## Module map
//! - [`real`]: the floating-point scalar trait (`f32`, `f64`) the numerics are generic over.
//! - [`basis`]: orthonormal DCT, real Fourier and Daubechies wavelet bases, planned per length.
//! - [`solver`]: the sampling operator `A = C Psi` and the LASSO / constrained / exact solvers.
//! - [`packet`]: the wire format, its codec, validation and packet-log files.
//! - [`sim`]: the node simulator (machine models, scenarios).
//! - [`sources`]: TCP ingest and packet-log replay sources.
//! - [`stream`]: per-stream state: reorder buffer, gaps, overlap-add stitching.
//! - [`store`]: HDF5 record files (behind the default-on `hdf5-store` feature).
//! - [`pipeline`]: wiring of the stages, worker pool, shutdown.
//! - [`features`]: spectra, peaks, machine fault frequencies, severity, trust.
//! - [`broker`] (feature `hdf5-store`): broker mode on NATS JetStream (ingest, workers on
//!   leased partitions, recorder; docs/scale-out.md).
//! - [`daemon`]: the gateway daemon (`csgate serve`): configuration, metrics, event feed,
//!   HTTP endpoint, shutdown (behind `hdf5-store`).
//! - [`bench`] (feature `hdf5-store`): the measurements of `csgate bench` (real-time capacity,
//!   FISTA iteration against its transform floor, long replay memory, side-by-side window sets).
//! - [`inspect`] (feature `hdf5-store`): summary and PNG plots of a record (`csgate inspect`).
//! - [`advice`]: sampling advice to nodes (samples per window from each stream's sparsity and
//!   trust) and the board the ingest sends it from.
//! - [`loadtest`] (feature `hdf5-store`): the bounded load test of `csgate loadtest` (simulated
//!   nodes at real-time pace into an in-process gateway on loopback, with the books balanced).
//! - [`fuzz`] (feature `hdf5-store`): seeded mutation fuzzing of every input decoder (frames,
//!   codec, packet logs, configuration, records) for `csgate bench --fuzz` and the tests.
//! - [`plan`]: sampling planner (samples per window from the L1 phase transition, payload).
//!
//! ## Cargo features
//! - `hdf5-store` (default): HDF5 records through the system libhdf5. Without it the rest of
//!   the crate builds and tests on a machine with no libhdf5.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod advice;
pub mod basis;
#[cfg(feature = "hdf5-store")]
pub mod bench;
#[cfg(feature = "hdf5-store")]
pub mod broker;
#[cfg(feature = "hdf5-store")]
pub mod daemon;
pub mod features;
#[cfg(feature = "hdf5-store")]
pub mod fuzz;
#[cfg(feature = "hdf5-store")]
pub mod inspect;
#[cfg(feature = "hdf5-store")]
pub mod loadtest;
pub mod packet;
pub mod pipeline;
pub mod plan;
pub mod real;
pub mod sim;
pub mod solver;
pub mod sources;
#[cfg(feature = "hdf5-store")]
pub mod store;
pub mod stream;

/// The crate version, written into every record file.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
