//! Wiring of the stages: sources -> reorder -> reconstruct (worker pool) -> stitch -> sinks.

pub mod pool;
