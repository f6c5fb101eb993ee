//! Generators of valid inputs and the mutators applied to them.

use super::FuzzRng;
use crate::packet::auth::NodeKey;
use crate::packet::wire::{self, Ack, Control, Frame, Tlv};
use crate::packet::{IndexCoding, Packet, RawValues, Sampling, StreamId, Units, WindowHeader};
use bytes::BytesMut;

/// The key of every signed frame the generators make (an invented test key).
pub(crate) fn test_key() -> NodeKey {
    NodeKey::new(b"fuzzing key of node 77, not a secret".to_vec())
}

/// A valid frame: the frame and whether it carries a tag made with [`test_key`].
pub(crate) fn valid_frame(rng: &mut FuzzRng) -> (Vec<u8>, bool) {
    let signed = rng.one_in(3);
    let key = test_key();
    let key = signed.then_some(&key);
    let mut dst = BytesMut::new();
    let frame = match rng.below(10) {
        0 => Frame::Ack(Ack {
            stream: stream(rng),
            capture_id: rng.next_u64() as u32,
            seq: rng.next_u64(),
            auth_tag: None,
        }),
        1 => Frame::Control(Control {
            stream: stream(rng),
            msg_type: rng.next_u64() as u8,
            fields: (0..rng.below(4))
                .map(|_| {
                    let len = if rng.one_in(8) { 255 } else { rng.below(9) };
                    Tlv {
                        tag: rng.next_u64() as u8,
                        value: rng.bytes(len),
                    }
                })
                .collect(),
            auth_tag: None,
        }),
        _ => Frame::Window(window(rng)),
    };
    frame
        .encode(key, &mut dst)
        .expect("generated frames are valid");
    (dst.to_vec(), signed)
}

fn stream(rng: &mut FuzzRng) -> StreamId {
    StreamId {
        node: if rng.one_in(2) {
            77
        } else {
            rng.next_u64() as u32
        },
        channel: rng.below(4) as u16,
    }
}

/// A valid window packet: small windows (16..=512 instants) so that a case stays cheap, every
/// index coding, i16 or f32 values.
pub(crate) fn window(rng: &mut FuzzRng) -> Packet {
    let n = rng.range(16, 512) as u32;
    let m = rng.range(1, n as usize) as u32;
    let header = WindowHeader {
        stream: stream(rng),
        capture_id: rng.next_u64() as u32,
        seq: rng.below(1 << 20) as u64,
        sample_rate_hz: [25_600.0, 51_200.0, 8_000.0][rng.below(3)],
        window_len: n,
        hop_len: rng.range(1, n as usize) as u32,
        t0_us: 1_796_126_400_000_000 + rng.below(1 << 30) as i64,
        units: Units::from_code(rng.below(7) as u8).expect("codes 0..7 exist"),
        scale: [1.0, 0.001, 9.80665e-4][rng.below(3)],
        adc_bits: rng.range(1, 24) as u8,
    };
    let f32_values = rng.one_in(2);
    let adc_bits = header.adc_bits;
    let raw = |m: usize, rng: &mut FuzzRng| {
        if f32_values {
            RawValues::F32(
                (0..m)
                    .map(|_| (rng.next_u64() as i32 as f32) * 1e-6)
                    .collect(),
            )
        } else {
            // Counts within the ADC's signed range (the validator refuses others).
            let half = 1i64 << (adc_bits.min(16) - 1);
            RawValues::I16(
                (0..m)
                    .map(|_| (rng.below(2 * half as usize) as i64 - half) as i16)
                    .collect(),
            )
        }
    };
    let sampling = match rng.below(3) {
        0 => Sampling::Seeded {
            seed: rng.next_u64(),
            m,
        },
        k => {
            let idx = crate::packet::indices::sample_indices(rng.next_u64(), n, m);
            let coding = if k == 1 {
                IndexCoding::DeltaVarint
            } else {
                IndexCoding::Bitmap
            };
            Sampling::Coded(coding, idx)
        }
    };
    let values = raw(m as usize, rng);
    Packet::new(header, sampling, values).expect("generated packets are valid")
}

/// Bytes that are a frame's, or random, or a frame's mutated (the mix every frame target uses).
/// The frame-target input: the bytes, and (unless they are random) the valid frame they were
/// made from, whether it is signed, and the other valid frame spliced in, if one was (it may
/// be signed with the same key, and a splice can reproduce it whole).
pub(crate) fn frame_input(rng: &mut FuzzRng) -> FrameInput {
    if rng.one_in(16) {
        let k = rng.below(96);
        let mut b = rng.bytes(k);
        if rng.one_in(2) && b.len() >= 4 {
            b[..4].copy_from_slice(&wire::MAGIC);
        }
        return (b, None, None);
    }
    let (orig, signed) = valid_frame(rng);
    let mut b = orig.clone();
    let mut spliced = None;
    if !rng.one_in(8) {
        let other = valid_frame(rng).0;
        for _ in 0..rng.range(1, 3) {
            mutate_frame(rng, &mut b, &other);
        }
        spliced = Some(other);
        // Most mutations would stop at the CRC; fixing it up lets them reach the parser.
        if rng.below(4) != 0 {
            fix_crc(&mut b);
        }
    }
    (b, Some((orig, signed)), spliced)
}

/// See [`frame_input`].
pub(crate) type FrameInput = (Vec<u8>, Option<(Vec<u8>, bool)>, Option<Vec<u8>>);

/// Rewrites the trailing CRC of a buffer that looks like a frame (length field permitting).
pub(crate) fn fix_crc(b: &mut [u8]) {
    if b.len() < wire::MIN_FRAME_LEN {
        return;
    }
    let declared = u32::from_le_bytes(b[4..8].try_into().expect("4")) as usize;
    let len = if (wire::MIN_FRAME_LEN..=b.len()).contains(&declared) {
        declared
    } else {
        b.len()
    };
    let crc = crc32fast::hash(&b[..len - wire::CRC_LEN]);
    b[len - wire::CRC_LEN..len].copy_from_slice(&crc.to_le_bytes());
}

/// One structural mutation of a frame: bit flips, byte insert/delete, truncation, a lying
/// length field, a lying count field, a splice with another frame, a random overwrite.
pub(crate) fn mutate_frame(rng: &mut FuzzRng, b: &mut Vec<u8>, other: &[u8]) {
    match rng.below(9) {
        0 | 1 => mutate_bytes(rng, b, other),
        2 => {
            // Length-field lie: small, off by a few, just above the maximum, huge.
            if b.len() >= 8 {
                let len = b.len() as i64;
                let v: u32 = match rng.below(5) {
                    0 => rng.below(wire::MIN_FRAME_LEN + 2) as u32,
                    1 => (len + rng.range(0, 8) as i64 - 4).max(0) as u32,
                    2 => (wire::MAX_FRAME_LEN + rng.below(3)) as u32,
                    3 => u32::MAX - rng.below(4) as u32,
                    _ => rng.next_u64() as u32,
                };
                b[4..8].copy_from_slice(&v.to_le_bytes());
            }
        }
        3 => {
            // Window count fields: sample_count (64..68) and index_len (68..72).
            if b.len() >= wire::WINDOW_FIXED_LEN {
                let at = if rng.one_in(2) { 64 } else { 68 };
                let v: u32 = match rng.below(3) {
                    0 => u32::MAX,
                    1 => u32::from_le_bytes(b[at..at + 4].try_into().expect("4"))
                        .wrapping_add(rng.range(0, 4) as u32)
                        .wrapping_sub(2),
                    _ => rng.next_u64() as u32,
                };
                b[at..at + 4].copy_from_slice(&v.to_le_bytes());
            }
        }
        4 => {
            // Header fields of a window: window_len, hop_len, units, adc_bits, rate, flags.
            if b.len() >= wire::WINDOW_FIXED_LEN {
                match rng.below(6) {
                    0 => b[40..44].copy_from_slice(&(rng.next_u64() as u32).to_le_bytes()),
                    1 => b[44..48].copy_from_slice(&(rng.next_u64() as u32).to_le_bytes()),
                    2 => b[18] = rng.next_u64() as u8,
                    3 => b[19] = rng.next_u64() as u8,
                    4 => {
                        let x = [f64::NAN, 0.0, -1.0, f64::INFINITY, 1e300][rng.below(5)];
                        b[32..40].copy_from_slice(&x.to_le_bytes());
                    }
                    _ => b[10] ^= 1 << rng.below(8),
                }
            }
        }
        _ => mutate_bytes(rng, b, other),
    }
}

/// Byte-level mutations for any input.
pub(crate) fn mutate_bytes(rng: &mut FuzzRng, b: &mut Vec<u8>, other: &[u8]) {
    match rng.below(7) {
        0 if !b.is_empty() => {
            for _ in 0..rng.range(1, 4) {
                let at = rng.below(b.len());
                b[at] ^= 1 << rng.below(8);
            }
        }
        1 => {
            let at = rng.below(b.len() + 1);
            let k = rng.range(1, 8);
            let ins = rng.bytes(k);
            b.splice(at..at, ins);
        }
        2 if !b.is_empty() => {
            let at = rng.below(b.len());
            let k = rng.range(1, 8).min(b.len() - at);
            b.drain(at..at + k);
        }
        3 => {
            let k = rng.below(b.len() + 1);
            b.truncate(k);
        }
        4 if !other.is_empty() => {
            // Splice: our head, the other's tail.
            let at = rng.below(b.len() + 1);
            let from = rng.below(other.len());
            b.truncate(at);
            b.extend_from_slice(&other[from..]);
        }
        5 if !b.is_empty() => {
            let at = rng.below(b.len());
            let k = rng.range(1, 16).min(b.len() - at);
            let r = rng.bytes(k);
            b[at..at + k].copy_from_slice(&r);
        }
        _ if !b.is_empty() => {
            let at = rng.below(b.len());
            b[at] = [0x00, 0xff, 0x7f, 0x80][rng.below(4)];
        }
        _ => b.extend(rng.bytes(4)),
    }
}
