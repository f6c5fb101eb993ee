//! Integration tests: basis (filled in by its work).
