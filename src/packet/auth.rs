//! Per-node pre-shared keys and the truncated HMAC-SHA256 tag of authenticated frames.
//!
//! The tag is the first [`TAG_LEN`] bytes of HMAC-SHA256(key, frame[0 .. len - 20]), i.e. over
//! every byte from the magic up to the tag itself (header with its auth flag and length
//! included), and sits just before the CRC. The CRC covers the tag too, so a transmission error
//! shows as a CRC error and only a wrong key or a forgery shows as an authentication failure.

use super::wire::{self, CRC_LEN};
use hmac::{Hmac, KeyInit, Mac};
use sha2::Sha256;
use std::collections::HashMap;
use std::fmt;

type HmacSha256 = Hmac<Sha256>;

/// Length of the truncated tag in bytes (128 bits, the truncation RFC 2104 section 5 allows
/// down to half the hash output).
pub const TAG_LEN: usize = 16;

/// A node's pre-shared key.
#[derive(Clone, PartialEq, Eq)]
pub struct NodeKey(Vec<u8>);

impl fmt::Debug for NodeKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        // Keys never go to logs.
        write!(f, "NodeKey({} bytes)", self.0.len())
    }
}

impl NodeKey {
    /// A key from raw bytes.
    pub fn new(bytes: impl Into<Vec<u8>>) -> NodeKey {
        NodeKey(bytes.into())
    }

    /// A key from hex digits (as in the configuration), at least 16 bytes.
    pub fn from_hex(hex: &str) -> Result<NodeKey, AuthError> {
        let hex = hex.trim();
        if hex.len() % 2 != 0 || !hex.bytes().all(|b| b.is_ascii_hexdigit()) {
            return Err(AuthError::BadKey(
                "key must be an even number of hex digits".into(),
            ));
        }
        let bytes: Vec<u8> = (0..hex.len())
            .step_by(2)
            .map(|i| u8::from_str_radix(&hex[i..i + 2], 16).expect("checked hex digits"))
            .collect();
        if bytes.len() < 16 {
            return Err(AuthError::BadKey(format!(
                "key has {} bytes, at least 16 are required",
                bytes.len()
            )));
        }
        Ok(NodeKey(bytes))
    }

    /// The tag over `covered` (the frame's bytes before the tag).
    pub fn tag(&self, covered: &[u8]) -> [u8; TAG_LEN] {
        let mut mac = HmacSha256::new_from_slice(&self.0).expect("HMAC takes keys of any length");
        mac.update(covered);
        let full = mac.finalize().into_bytes();
        let mut tag = [0u8; TAG_LEN];
        tag.copy_from_slice(&full[..TAG_LEN]);
        tag
    }

    /// Checks the tag of a whole frame (one that passed [`wire::check`]), in constant time.
    pub fn verify(&self, frame: &[u8]) -> Result<(), AuthError> {
        let Some(tag_at) = tag_offset(frame) else {
            return Err(AuthError::MissingTag {
                node: frame_node(frame),
            });
        };
        let mut mac = HmacSha256::new_from_slice(&self.0).expect("HMAC takes keys of any length");
        mac.update(&frame[..tag_at]);
        mac.verify_truncated_left(&frame[tag_at..tag_at + TAG_LEN])
            .map_err(|_| AuthError::BadTag {
                node: frame_node(frame),
            })
    }
}

/// Offset of the tag in a checked frame, `None` when its auth flag is clear.
pub fn tag_offset(frame: &[u8]) -> Option<usize> {
    let flags = u16::from_le_bytes([*frame.get(10)?, *frame.get(11)?]);
    if flags & wire::FLAG_AUTH == 0 || frame.len() < wire::HEADER_LEN + TAG_LEN + CRC_LEN {
        return None;
    }
    Some(frame.len() - CRC_LEN - TAG_LEN)
}

fn frame_node(frame: &[u8]) -> Option<u32> {
    frame
        .get(12..16)
        .map(|b| u32::from_le_bytes(b.try_into().expect("four bytes")))
}

/// Authentication failures.
#[derive(Debug, thiserror::Error, Clone, PartialEq, Eq)]
pub enum AuthError {
    /// The node is enrolled but the frame has no tag.
    #[error("frame from node {node:?} has no authentication tag but the node is enrolled")]
    MissingTag {
        /// Node id from the frame, if it had one.
        node: Option<u32>,
    },
    /// The tag does not match the node's key.
    #[error("authentication tag of a frame from node {node:?} does not match its key")]
    BadTag {
        /// Node id from the frame, if it had one.
        node: Option<u32>,
    },
    /// Authentication is required and the node is not enrolled, or a tagged frame came from a
    /// node whose key the gateway does not have.
    #[error("node {node:?} is not enrolled")]
    NotEnrolled {
        /// Node id from the frame, if it had one.
        node: Option<u32>,
    },
    /// A configured key is malformed.
    #[error("bad node key: {0}")]
    BadKey(String),
}

/// Enrolled node keys and the policy for nodes without one.
#[derive(Debug, Clone, Default)]
pub struct KeyRing {
    keys: HashMap<u32, NodeKey>,
    /// When set, frames from nodes without a key are rejected.
    pub require_auth: bool,
}

impl KeyRing {
    /// An empty ring; `require_auth` says what happens to nodes without a key.
    pub fn new(require_auth: bool) -> KeyRing {
        KeyRing {
            keys: HashMap::new(),
            require_auth,
        }
    }

    /// Enrolls (or re-keys) a node.
    pub fn insert(&mut self, node: u32, key: NodeKey) {
        self.keys.insert(node, key);
    }

    /// The key of a node, if enrolled.
    pub fn get(&self, node: u32) -> Option<&NodeKey> {
        self.keys.get(&node)
    }

    /// Applies the policy to a checked frame: enrolled nodes must carry a valid tag; other
    /// nodes are accepted untagged unless `require_auth` is set. Returns whether the frame was
    /// authenticated.
    pub fn check(&self, frame: &[u8]) -> Result<bool, AuthError> {
        let node = frame_node(frame);
        match node.and_then(|n| self.keys.get(&n)) {
            Some(key) => key.verify(frame).map(|()| true),
            None if self.require_auth || tag_offset(frame).is_some() => {
                Err(AuthError::NotEnrolled { node })
            }
            None => Ok(false),
        }
    }
}
