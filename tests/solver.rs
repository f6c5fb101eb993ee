//! Integration tests: solver (filled in by its work).
