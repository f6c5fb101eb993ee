//! Wiring of the stages: sources -> reorder -> reconstruct (worker pool) -> stitch -> record.
//!
//! - [`pool`]: the fixed CPU worker pool.
//! - [`reconstruct`]: the per-window job run on a worker (solver, warm start).
//! - [`run`]: the dispatcher thread (reorder, per-stream queues, stitching, record messages).

pub mod pool;
pub mod reconstruct;
#[cfg(feature = "hdf5-store")]
pub mod replay;
#[cfg(feature = "hdf5-store")]
pub mod run;
