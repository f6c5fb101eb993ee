//! Wiring of the stages: sources -> reorder -> reconstruct (worker pool) -> stitch -> record.
//!
//! - [`pool`]: the fixed CPU worker pool.
//! - [`reconstruct`]: the per-window job run on a worker (solver, warm start).
//! - [`run`]: the dispatcher thread (reorder, per-stream queues, stitching, record messages).
//! - [`trust`]: per-window trust (cross-validation error, phase-transition check).
//! - [`analytics`]: the analytics thread (features per block into the record and events).
//! - [`events`]: feature events and their sinks (JSON-lines file, broadcast feed).

#[cfg(feature = "hdf5-store")]
pub mod analytics;
pub mod events;
pub mod pool;
pub mod reconstruct;
#[cfg(feature = "hdf5-store")]
pub mod replay;
#[cfg(feature = "hdf5-store")]
pub mod run;
pub mod trust;
