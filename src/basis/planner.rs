//! `BasisPlanner`: plans each (kind, length) once and hands out shared copies.

/// Plans bases and caches them per (kind, length). (Filled in by the engine work.)
#[derive(Debug, Default)]
pub struct BasisPlanner;
