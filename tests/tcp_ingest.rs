//! Integration tests: tcp_ingest (filled in by its work).
