//! Sparse recovery of one window: the sampling operator and the solvers.
