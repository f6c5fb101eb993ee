//! The wire format between sensor nodes and the gateway, its codec, semantic validation,
//! authentication and packet-log files.
//!
//! This is the first stage of the pipeline: bytes from a TCP connection or a packet log become
//! validated [`Packet`]s here, and nothing downstream re-checks them.
//!
//! - [`wire`]: byte layout of version 1 (see `docs/wire-format.md`), `check` before `parse`,
//!   encoders for window, acknowledgement and control frames.
//! - [`codec`]: the tokio-util [`codec::FrameCodec`] shared by TCP streams and packet logs.
//! - [`validate`]: semantic checks with errors naming node, field and value.
//! - [`indices`]: the PCG32 generator and selection sampling that regenerate seeded index sets.
//! - [`auth`]: per-node keys and the truncated HMAC-SHA256 tag.
//! - [`log`]: the packet-log file format (writer and resynchronising reader).
//!
//! ```
//! use csgate::packet::{Packet, RawValues, Sampling, StreamId, Units, WindowHeader, wire};
//! let header = WindowHeader {
//!     stream: StreamId { node: 7, channel: 0 },
//!     capture_id: 1,
//!     seq: 0,
//!     sample_rate_hz: 25_600.0,
//!     window_len: 64,
//!     hop_len: 32,
//!     t0_us: 1_700_000_000_000_000,
//!     units: Units::MetersPerSecond2,
//!     scale: 0.001,
//!     adc_bits: 16,
//! };
//! let packet = Packet::new(header, Sampling::Seeded { seed: 42, m: 16 }, RawValues::I16(vec![5; 16]))
//!     .unwrap();
//! let bytes = wire::encode_window_to_vec(&packet, None).unwrap();
//! let frame = wire::parse(&bytes, &Default::default()).unwrap();
//! assert_eq!(frame, wire::Frame::Window(packet));
//! ```

pub mod auth;
pub mod codec;
pub mod indices;
pub mod log;
pub mod validate;
pub mod wire;

use serde::{Deserialize, Serialize};
use std::fmt;

pub use auth::{AuthError, KeyRing, NodeKey, TAG_LEN};
pub use codec::{CodecError, FrameCodec, RawFrame};
pub use validate::{Field, ValidationError};
pub use wire::{Ack, Control, DecodeError, EncodeError, Frame, Tlv, WireError};

/// Identity of one sensor stream: a node and one of its channels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
pub struct StreamId {
    /// Node id, unique per gateway deployment.
    pub node: u32,
    /// Channel of the node (one sensor axis or microphone).
    pub channel: u16,
}

impl fmt::Display for StreamId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "node {} channel {}", self.node, self.channel)
    }
}

/// Physical units of the values after scaling (wire code in parentheses).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum Units {
    /// (0) Raw ADC counts; `scale` is then normally 1.
    Counts,
    /// (1) Acceleration in metres per second squared.
    MetersPerSecond2,
    /// (2) Acceleration in standard gravity, g = 9.80665 m/s^2.
    StandardGravity,
    /// (3) Vibration velocity in millimetres per second.
    MillimetersPerSecond,
    /// (4) Sound pressure in pascal.
    Pascal,
    /// (5) Voltage in volt.
    Volt,
    /// (6) Displacement in micrometres.
    Micrometer,
}

impl Units {
    /// Wire code of this unit.
    pub fn code(self) -> u8 {
        match self {
            Units::Counts => 0,
            Units::MetersPerSecond2 => 1,
            Units::StandardGravity => 2,
            Units::MillimetersPerSecond => 3,
            Units::Pascal => 4,
            Units::Volt => 5,
            Units::Micrometer => 6,
        }
    }

    /// The unit for a wire code, `None` for codes not in the table.
    pub fn from_code(code: u8) -> Option<Units> {
        Some(match code {
            0 => Units::Counts,
            1 => Units::MetersPerSecond2,
            2 => Units::StandardGravity,
            3 => Units::MillimetersPerSecond,
            4 => Units::Pascal,
            5 => Units::Volt,
            6 => Units::Micrometer,
            _ => return None,
        })
    }

    /// Short symbol for records and logs.
    pub fn symbol(self) -> &'static str {
        match self {
            Units::Counts => "counts",
            Units::MetersPerSecond2 => "m/s^2",
            Units::StandardGravity => "g",
            Units::MillimetersPerSecond => "mm/s",
            Units::Pascal => "Pa",
            Units::Volt => "V",
            Units::Micrometer => "um",
        }
    }
}

/// Limits the decoder and the validator enforce.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct Limits {
    /// Largest frame accepted, in bytes, magic through CRC. At most [`wire::MAX_FRAME_LEN`].
    pub max_frame_len: usize,
    /// Smallest window length `n` accepted.
    pub min_window_len: u32,
    /// Largest window length `n` accepted. Also bounds the work of expanding a seeded index set
    /// (one PRNG draw per grid instant), so a hostile frame cannot make the decoder spin.
    pub max_window_len: u32,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_frame_len: wire::MAX_FRAME_LEN,
            // Below 16 instants a window holds too little for a sparse recovery to be useful
            // (common practice); 65536 covers 2.5 s at 25.6 kHz, the longest windows we expect.
            min_window_len: 16,
            max_window_len: 65_536,
        }
    }
}

/// The fixed fields of a window frame: which stream, which window, and the grid it lies on.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct WindowHeader {
    /// Node and channel.
    pub stream: StreamId,
    /// Changes whenever the node restarts or starts a new acquisition.
    pub capture_id: u32,
    /// Index of this window within its capture, counted from 0.
    pub seq: u64,
    /// Base sample rate of the ADC grid in hertz.
    pub sample_rate_hz: f64,
    /// Window length `n`, in grid instants.
    pub window_len: u32,
    /// Hop between the starts of consecutive windows, in grid instants.
    pub hop_len: u32,
    /// Node-clock time of the window's first grid instant, microseconds since the Unix epoch.
    pub t0_us: i64,
    /// Physical units after scaling.
    pub units: Units,
    /// Physical units per raw value: `value = raw * scale`.
    pub scale: f64,
    /// Resolution of the node's ADC in bits.
    pub adc_bits: u8,
}

/// How a frame tells which grid instants were sampled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum IndexCoding {
    /// Explicit list: first index, then differences, as LEB128 varints.
    DeltaVarint,
    /// Explicit list: a bitmap of `n` bits, bit `i` set when instant `i` was sampled.
    Bitmap,
    /// Regenerated on both sides from a seed by [`indices::sample_indices`].
    Seeded {
        /// Seed of the PCG32 generator.
        seed: u64,
    },
}

/// Which instants to sample, as given to [`Packet::new`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Sampling {
    /// An explicit index list, sent in whichever explicit coding is smaller.
    Explicit(Vec<u32>),
    /// An explicit index list forced into one explicit coding.
    Coded(IndexCoding, Vec<u32>),
    /// `m` instants chosen by the seeded generator.
    Seeded {
        /// Seed of the PCG32 generator.
        seed: u64,
        /// Number of instants.
        m: u32,
    },
}

/// Sample values as carried on the wire.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum RawValues {
    /// Signed 16-bit ADC counts.
    I16(Vec<i16>),
    /// 32-bit floats.
    F32(Vec<f32>),
}

impl RawValues {
    /// Number of values.
    pub fn len(&self) -> usize {
        match self {
            RawValues::I16(v) => v.len(),
            RawValues::F32(v) => v.len(),
        }
    }

    /// Whether there are no values.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Values in physical units: `raw * scale`, rounded to f32.
    pub fn scaled(&self, scale: f64) -> Vec<f32> {
        match self {
            RawValues::I16(v) => v.iter().map(|&c| (f64::from(c) * scale) as f32).collect(),
            RawValues::F32(v) => v.iter().map(|&x| (f64::from(x) * scale) as f32).collect(),
        }
    }
}

/// A decoded, validated window of compressive samples.
///
/// Fields are public for the simulator and tests; a packet built by hand should come from
/// [`Packet::new`] or pass [`validate::validate`], and the encoder re-checks what it relies on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Packet {
    /// The fixed header fields.
    pub header: WindowHeader,
    /// How the index set travels on the wire; kept so that re-encoding gives the same bytes.
    pub index_coding: IndexCoding,
    /// Sampled grid instants, strictly increasing, each `< window_len`.
    pub indices: Vec<u32>,
    /// Values exactly as on the wire.
    pub raw: RawValues,
    /// Values in physical units (`raw * scale`), one per index.
    pub values: Vec<f32>,
    /// The truncated HMAC tag the frame carried, if any. The TCP ingest verifies it against the
    /// node's key before a packet goes further; re-encoding without a key copies it.
    pub auth_tag: Option<[u8; TAG_LEN]>,
}

impl Packet {
    /// Builds and validates a packet (with [`Limits::default`]), expanding a seeded index set
    /// and choosing the smaller explicit coding for [`Sampling::Explicit`].
    pub fn new(
        header: WindowHeader,
        sampling: Sampling,
        raw: RawValues,
    ) -> Result<Packet, ValidationError> {
        Packet::with_limits(header, sampling, raw, &Limits::default())
    }

    /// As [`Packet::new`], validating against the given limits.
    pub fn with_limits(
        header: WindowHeader,
        sampling: Sampling,
        raw: RawValues,
        limits: &Limits,
    ) -> Result<Packet, ValidationError> {
        validate::validate_header(&header, limits)?;
        let (index_coding, indices) = match sampling {
            Sampling::Explicit(idx) => {
                (wire::smaller_explicit_coding(&idx, header.window_len), idx)
            }
            Sampling::Coded(IndexCoding::Seeded { seed }, _) => {
                return Err(ValidationError::new(
                    &header,
                    Field::IndexCoding,
                    format!("seeded (seed {seed})"),
                    "an explicit list cannot be sent as a seeded set; use Sampling::Seeded",
                ))
            }
            Sampling::Coded(coding, idx) => (coding, idx),
            Sampling::Seeded { seed, m } => {
                validate::check_sample_count(&header, m)?;
                (
                    IndexCoding::Seeded { seed },
                    indices::sample_indices(seed, header.window_len, m),
                )
            }
        };
        let values = raw.scaled(header.scale);
        let packet = Packet {
            header,
            index_coding,
            indices,
            raw,
            values,
            auth_tag: None,
        };
        validate::validate(&packet, limits)?;
        Ok(packet)
    }

    /// The stream this window belongs to.
    pub fn stream(&self) -> StreamId {
        self.header.stream
    }

    /// Number of samples `m`.
    pub fn sample_count(&self) -> usize {
        self.indices.len()
    }

    /// Whether the frame carried an authentication tag.
    pub fn is_authenticated(&self) -> bool {
        self.auth_tag.is_some()
    }
}
