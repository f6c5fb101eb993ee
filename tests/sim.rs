//! Integration tests: sim (filled in by its work).
