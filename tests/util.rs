//! Shared helpers for the integration tests.
#![allow(dead_code)]

use std::path::PathBuf;

/// A fresh temporary directory for one test, removed when dropped.
pub fn test_dir() -> tempfile::TempDir {
    tempfile::Builder::new()
        .prefix("csgate-test-")
        .tempdir()
        .expect("create temp dir")
}

/// Path of the built `csgate` binary (integration tests only).
pub fn csgate_bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_csgate"))
}
