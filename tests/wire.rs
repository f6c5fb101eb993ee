//! Integration tests: wire (filled in by its work).
