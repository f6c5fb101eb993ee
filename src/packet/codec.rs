//! The tokio-util codec shared by TCP connections and packet-log files.
//!
//! [`FrameCodec`] delimits frames and checks their CRC ([`wire::check`]) and hands out each as
//! a [`RawFrame`]: the exact bytes, zero-copy. Authentication needs those bytes, and so does a
//! packet log, so parsing into a [`Frame`] is a separate step ([`RawFrame::parse`]).

use super::wire::{self, DecodeError, Frame, WireError};
use super::{auth, Limits};
use bytes::{Bytes, BytesMut};
use tokio_util::codec::{Decoder, Encoder};

/// One frame whose length and CRC have been checked, as the bytes on the wire.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RawFrame(Bytes);

impl RawFrame {
    /// Checks `bytes` as exactly one frame.
    pub fn new(bytes: Bytes, max_frame_len: usize) -> Result<RawFrame, WireError> {
        match wire::check(&bytes, max_frame_len)? {
            Some(len) if len == bytes.len() => Ok(RawFrame(bytes)),
            Some(len) => Err(WireError::BadLength {
                kind: bytes[9],
                len: bytes.len(),
                expected: len as u64,
            }),
            None => Err(WireError::Truncated {
                needed: bytes.len() + 1,
                have: bytes.len(),
            }),
        }
    }

    /// Wraps bytes this crate just encoded.
    pub(crate) fn from_trusted(bytes: Bytes) -> RawFrame {
        debug_assert!(
            matches!(wire::check(&bytes, wire::MAX_FRAME_LEN), Ok(Some(l)) if l == bytes.len())
        );
        RawFrame(bytes)
    }

    /// The frame's bytes.
    pub fn as_bytes(&self) -> &[u8] {
        &self.0
    }

    /// The frame's bytes, shared.
    pub fn into_bytes(self) -> Bytes {
        self.0
    }

    /// Frame length in bytes.
    pub fn len(&self) -> usize {
        self.0.len()
    }

    /// Always false: a frame has at least [`wire::MIN_FRAME_LEN`] bytes.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    /// Frame kind byte.
    pub fn kind(&self) -> u8 {
        self.0[9]
    }

    /// Node id of the frame, for frame kinds that carry one at offset 12.
    pub fn node(&self) -> Option<u32> {
        self.0
            .get(12..16)
            .map(|b| u32::from_le_bytes(b.try_into().expect("four bytes")))
    }

    /// Whether the auth flag is set.
    pub fn has_tag(&self) -> bool {
        auth::tag_offset(&self.0).is_some()
    }

    /// Parses (and for windows validates) the frame.
    pub fn parse(&self, limits: &Limits) -> Result<Frame, DecodeError> {
        wire::parse(&self.0, limits)
    }
}

/// Errors of [`FrameCodec`].
#[derive(Debug, thiserror::Error)]
pub enum CodecError {
    /// A frame could not be delimited or failed its CRC.
    #[error(transparent)]
    Wire(#[from] WireError),
    /// The underlying reader or writer failed.
    #[error("i/o error: {0}")]
    Io(#[from] std::io::Error),
}

impl CodecError {
    /// Whether this is a CRC mismatch (counted apart from other decode errors).
    pub fn is_crc(&self) -> bool {
        matches!(self, CodecError::Wire(WireError::BadCrc { .. }))
    }
}

/// Delimits frames; never buffers more than `max_frame_len` bytes for one frame.
#[derive(Debug, Clone, Copy)]
pub struct FrameCodec {
    max_frame_len: usize,
}

impl Default for FrameCodec {
    fn default() -> Self {
        FrameCodec::new(wire::MAX_FRAME_LEN)
    }
}

impl FrameCodec {
    /// A codec accepting frames up to `max_frame_len` bytes (capped at [`wire::MAX_FRAME_LEN`]).
    pub fn new(max_frame_len: usize) -> FrameCodec {
        FrameCodec {
            max_frame_len: max_frame_len.min(wire::MAX_FRAME_LEN),
        }
    }

    /// The configured maximum.
    pub fn max_frame_len(&self) -> usize {
        self.max_frame_len
    }
}

impl Decoder for FrameCodec {
    type Item = RawFrame;
    type Error = CodecError;

    fn decode(&mut self, src: &mut BytesMut) -> Result<Option<RawFrame>, CodecError> {
        match wire::check(src, self.max_frame_len)? {
            Some(len) => Ok(Some(RawFrame(src.split_to(len).freeze()))),
            None => {
                if src.len() >= 8 {
                    // The length is known and within the maximum: reserve once for the rest.
                    let len = u32::from_le_bytes(src[4..8].try_into().expect("four bytes"));
                    src.reserve((len as usize).saturating_sub(src.len()));
                }
                Ok(None)
            }
        }
    }

    fn decode_eof(&mut self, src: &mut BytesMut) -> Result<Option<RawFrame>, CodecError> {
        match self.decode(src)? {
            Some(frame) => Ok(Some(frame)),
            None if src.is_empty() => Ok(None),
            None => {
                let needed = if src.len() >= 8 {
                    u32::from_le_bytes(src[4..8].try_into().expect("four bytes")) as usize
                } else {
                    wire::MIN_FRAME_LEN
                };
                let have = src.len();
                src.clear();
                Err(WireError::Truncated { needed, have }.into())
            }
        }
    }
}

impl Encoder<RawFrame> for FrameCodec {
    type Error = CodecError;

    fn encode(&mut self, item: RawFrame, dst: &mut BytesMut) -> Result<(), CodecError> {
        dst.extend_from_slice(&item.0);
        Ok(())
    }
}

impl Encoder<&Frame> for FrameCodec {
    type Error = CodecError;

    fn encode(&mut self, item: &Frame, dst: &mut BytesMut) -> Result<(), CodecError> {
        item.encode(None, dst)
            .map_err(|e| CodecError::Io(std::io::Error::new(std::io::ErrorKind::InvalidInput, e)))
    }
}
