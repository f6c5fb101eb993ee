//! Integration tests: features (filled in by its work).
