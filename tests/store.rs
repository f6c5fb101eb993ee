//! Integration tests: store (filled in by its work).
