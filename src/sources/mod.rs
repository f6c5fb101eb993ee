//! Sources of packets: the TCP ingest that nodes connect to, the MQTT source for nodes that
//! publish, replay of packet-log files, and a
//! fault-injecting sender that plays the node side for tests and the simulator.
//!
//! Every source hands validated [`Packet`](crate::packet::Packet)s to the rest of the gateway
//! through a bounded channel; a full channel stops the source reading (back-pressure).

pub mod config;
pub mod inject;
pub mod mqtt;
pub mod packet_log;
pub mod tcp;

pub use config::IngestConfig;
pub use inject::{send_encoded, send_packets, FaultPlan, Pace, SendReport, WindowKey};
pub use tcp::{IngestError, IngestSnapshot, IngestStats};
