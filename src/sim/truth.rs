//! Ground truth as an HDF5 file: the full-rate noise-free signal of every channel, in the same
//! `/streams/<node>/<channel>/samples` layout as a gateway record (written with the store's
//! [`RecordWriter`]), with `basis = "truth"`, so a record and its truth compare index by index.
//!
//! The truth covers grid instants `0 .. (windows - 1) hop + n` of each stream, the instants its
//! windows span; sample 0 is the stream's `start_time`.

use super::run::SimWindow;
use super::{Scenario, Simulation};
use crate::store::{
    layout::close_reason, RecordWriter, StoreError, StreamKey, StreamMeta, WriterOptions,
};
use std::path::Path;

/// Basis attribute of truth streams.
pub const TRUTH_BASIS: &str = "truth";

/// Writes the truth of a run as its windows come.
pub struct TruthWriter {
    writer: RecordWriter,
    /// Stream keys per node, in scenario channel order: `(node id, keys)`.
    streams: Vec<(u32, Vec<StreamKey>)>,
}

impl std::fmt::Debug for TruthWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TruthWriter")
            .field("path", &self.writer.path())
            .finish_non_exhaustive()
    }
}

impl TruthWriter {
    /// Creates `path` (replacing a file there) with one stream per node channel of `sim`.
    pub fn create(path: &Path, scenario: &Scenario, sim: &Simulation) -> Result<Self, StoreError> {
        match std::fs::remove_file(path) {
            Err(e) if e.kind() != std::io::ErrorKind::NotFound => {
                return Err(StoreError::Io {
                    path: path.to_owned(),
                    source: e,
                })
            }
            _ => {}
        }
        let start_ns = scenario.start_time_us() * 1000;
        let mut metas = Vec::new();
        let mut streams = Vec::new();
        for node in sim.nodes() {
            let spec = node.spec();
            let mut keys = Vec::new();
            for ch in &spec.channels {
                metas.push(StreamMeta {
                    node: spec.id,
                    channel: ch.channel,
                    sample_rate_hz: spec.sample_rate_hz,
                    start_time_unix_ns: start_ns,
                    capture_id: node.capture_id(),
                    units: spec.units(ch).symbol().to_owned(),
                    basis: TRUTH_BASIS.to_owned(),
                });
                keys.push(StreamKey::new(spec.id, ch.channel));
            }
            streams.push((spec.id, keys));
        }
        let digest = format!(
            "simulate site={:?} seed={} crc32={:08x}",
            scenario.site.name,
            scenario.site.seed,
            crc32fast::hash(format!("{scenario:?}").as_bytes())
        );
        let writer = RecordWriter::create(path, &metas, &WriterOptions::default(), &digest)?;
        Ok(TruthWriter { writer, streams })
    }

    /// Appends the truth a window adds; windows without truth are skipped.
    pub fn append(&mut self, w: &SimWindow) -> Result<(), StoreError> {
        let Some(chunk) = &w.truth else { return Ok(()) };
        let Some((_, keys)) = self.streams.iter().find(|(id, _)| *id == w.node) else {
            return Ok(());
        };
        for (key, samples) in keys.iter().zip(&chunk.channels) {
            self.writer.append_samples(*key, chunk.start, samples)?;
        }
        Ok(())
    }

    /// Flushes and closes the file.
    pub fn finish(self) -> Result<(), StoreError> {
        self.writer.close(close_reason::SHUTDOWN)
    }
}
