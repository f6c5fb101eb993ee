//! Packet-log files (in progress).
