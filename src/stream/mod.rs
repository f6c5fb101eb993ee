//! Per-stream state machines, no I/O: ordering windows by sequence number (reorder buffer,
//! duplicates, gaps, capture restarts) and stitching reconstructed windows by overlap-add.

pub mod overlap_add;
pub mod reorder;
