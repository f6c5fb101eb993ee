//! Integration tests: wire format v1 (the document's test vectors, round trips, robustness
//! against truncation and bit flips, validation messages) and packet-log files.
//!
//! The hex vectors and the seeded index sets were produced by `tests/python/wire_vectors.py`,
//! an independent implementation written from `docs/wire-format.md`, run once.

use bytes::BytesMut;
use csgate::packet::indices::{sample_indices, Pcg32};
use csgate::packet::log::{LogReader, LogWriter};
use csgate::packet::wire::{self, Frame};
use csgate::packet::{
    DecodeError, Field, FrameCodec, IndexCoding, Limits, NodeKey, Packet, RawValues, Sampling,
    StreamId, Units, WindowHeader,
};
use proptest::prelude::*;
use tokio_util::codec::Decoder;

use crate::util::test_dir;

const T0: i64 = 1_700_000_000_000_000;

fn unhex(s: &str) -> Vec<u8> {
    (0..s.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&s[i..i + 2], 16).unwrap())
        .collect()
}

// Vector 1: delta-varint indices, i16 counts.
const V1: &str = "c55347575b00000001010000070000000100010c0d0c0b0a0300000000000000000000000000d940400000002000000000401e18240a0600fca9f1d24d62503f05000000050000000201071e1764009cffff0700f800002b8cf5ea";
// Vector 2: seeded indices (seed 0xDEADBEEF), f32 values.
const V2: &str = "c553475764000000010106000900000000000410010000000000000000000000000000000070e7401000000010000000f4411e18240a0600000000000000e03f0400000008000000efbeadde000000000000803e0000c0bf000040406f12833a6825da98";
// Vector 3: bitmap indices, authenticated with key 00 01 .. 0f.
const V3: &str = "c553475770000000010109000b000000020002104d000000e803000000000000000000000088c340200000001000000000144f18240a0600000000000000103f080000000400000021c210880100020003000400fffffefffdfffcff7c204f7f115bb1a941f4ba05c76a15751bd05bdf";
// Vector 4: acknowledgement of vector 1's window.
const V4: &str = "c5534757240000000102000007000000010000000d0c0b0a0300000000000000c5dc453f";
// Vector 5: sampling advice to node 7, channel 1: 512 samples per window.
const V5: &str = "c55347571e000000010300000700000001000100010400020000445a18e2";
// Vector 6: sampling advice to node 11, channel 2: 384, authenticated with key 00 01 .. 0f.
const V6: &str =
    "c55347572e000000010308000b000000020001000104800100008030d053e6bf597a98342aba4e1ecf857160045a";

fn window(bytes: &[u8]) -> Packet {
    match wire::parse(bytes, &Limits::default()).expect("vector decodes") {
        Frame::Window(p) => p,
        other => panic!("expected a window, got {other:?}"),
    }
}

#[test]
fn vector_1_delta_varint() {
    let bytes = unhex(V1);
    let p = window(&bytes);
    let h = p.header;
    assert_eq!(
        h.stream,
        StreamId {
            node: 7,
            channel: 1
        }
    );
    assert_eq!((h.capture_id, h.seq), (0x0A0B_0C0D, 3));
    assert_eq!(
        (h.sample_rate_hz, h.window_len, h.hop_len),
        (25_600.0, 64, 32)
    );
    assert_eq!(
        (h.t0_us, h.units, h.scale, h.adc_bits),
        (T0, Units::MetersPerSecond2, 0.001, 12)
    );
    assert_eq!(p.index_coding, IndexCoding::DeltaVarint);
    assert_eq!(p.indices, [2, 3, 10, 40, 63]);
    assert_eq!(p.raw, RawValues::I16(vec![100, -100, 2047, -2048, 0]));
    assert_eq!(p.values, [0.1f32, -0.1, 2.047, -2.048, 0.0]);
    assert!(!p.is_authenticated());
    assert_eq!(wire::encode_window_to_vec(&p, None).unwrap(), bytes);
}

#[test]
fn vector_2_seeded() {
    let bytes = unhex(V2);
    let p = window(&bytes);
    let h = p.header;
    assert_eq!(
        h.stream,
        StreamId {
            node: 9,
            channel: 0
        }
    );
    assert_eq!(
        (h.capture_id, h.seq, h.window_len, h.hop_len),
        (1, 0, 16, 16)
    );
    assert_eq!(
        (h.sample_rate_hz, h.t0_us, h.units),
        (48_000.0, T0 + 500, Units::Pascal)
    );
    assert_eq!((h.scale, h.adc_bits), (0.5, 16));
    assert_eq!(p.index_coding, IndexCoding::Seeded { seed: 0xDEAD_BEEF });
    assert_eq!(p.indices, [0, 3, 4, 13]);
    assert_eq!(p.raw, RawValues::F32(vec![0.25, -1.5, 3.0, 1e-3]));
    assert_eq!(p.values, [0.125f32, -0.75, 1.5, 5e-4]);
    assert_eq!(wire::encode_window_to_vec(&p, None).unwrap(), bytes);
}

#[test]
fn vector_3_bitmap_authenticated() {
    let bytes = unhex(V3);
    let p = window(&bytes);
    let h = p.header;
    assert_eq!(
        h.stream,
        StreamId {
            node: 11,
            channel: 2
        }
    );
    assert_eq!(
        (h.capture_id, h.seq, h.window_len, h.hop_len),
        (77, 1000, 32, 16)
    );
    assert_eq!((h.sample_rate_hz, h.t0_us), (10_000.0, T0 + 3_200_000));
    assert_eq!(
        (h.units, h.scale, h.adc_bits),
        (Units::StandardGravity, 1.0 / 16384.0, 16)
    );
    assert_eq!(p.index_coding, IndexCoding::Bitmap);
    assert_eq!(p.indices, [0, 5, 9, 14, 15, 20, 27, 31]);
    assert_eq!(p.raw, RawValues::I16(vec![1, 2, 3, 4, -1, -2, -3, -4]));
    assert!(p.is_authenticated());
    let key = NodeKey::new((0u8..16).collect::<Vec<_>>());
    key.verify(&bytes).expect("tag matches the documented key");
    assert!(NodeKey::new(vec![0xAA; 16]).verify(&bytes).is_err());
    // Re-encoding with the key computes the same tag; without it the carried tag is copied.
    assert_eq!(wire::encode_window_to_vec(&p, Some(&key)).unwrap(), bytes);
    assert_eq!(wire::encode_window_to_vec(&p, None).unwrap(), bytes);
}

#[test]
fn vector_4_ack() {
    let bytes = unhex(V4);
    let Frame::Ack(a) = wire::parse(&bytes, &Limits::default()).unwrap() else {
        panic!("expected an ack")
    };
    assert_eq!(
        a.stream,
        StreamId {
            node: 7,
            channel: 1
        }
    );
    assert_eq!((a.capture_id, a.seq), (0x0A0B_0C0D, 3));
    let mut out = BytesMut::new();
    wire::encode_ack(&a, None, &mut out);
    assert_eq!(&out[..], &bytes[..]);
}

#[test]
fn vectors_5_and_6_sampling_advice() {
    let key = NodeKey::new((0u8..16).collect::<Vec<_>>());
    for (hex, node, channel, m, key) in [(V5, 7, 1, 512u32, None), (V6, 11, 2, 384, Some(&key))] {
        let bytes = unhex(hex);
        let Frame::Control(c) = wire::parse(&bytes, &Limits::default()).unwrap() else {
            panic!("expected a control frame")
        };
        assert_eq!(c.stream, StreamId { node, channel });
        assert_eq!(c.msg_type, wire::CONTROL_SAMPLING_ADVICE);
        assert_eq!(c.fields.len(), 1);
        assert_eq!(c.fields[0].tag, wire::TLV_REQUESTED_M);
        assert_eq!(c.fields[0].value, m.to_le_bytes());
        assert_eq!(c.auth_tag.is_some(), key.is_some());
        // The gateway's encoder produces the same bytes (computing the tag with the key).
        let mut out = BytesMut::new();
        wire::encode_control(&wire::Control::sampling_advice(c.stream, m), key, &mut out).unwrap();
        assert_eq!(&out[..], &bytes[..]);
    }
}

#[test]
fn control_frame_round_trip() {
    let c = wire::Control::sampling_advice(
        StreamId {
            node: 3,
            channel: 1,
        },
        512,
    );
    let mut out = BytesMut::new();
    wire::encode_control(&c, None, &mut out).unwrap();
    assert_eq!(
        wire::parse(&out, &Limits::default()).unwrap(),
        Frame::Control(c)
    );
}

#[test]
fn crc32_check_value() {
    // Published check value of CRC-32/ISO-HDLC (the IEEE 802.3 CRC) for ASCII "123456789".
    assert_eq!(crc32fast::hash(b"123456789"), 0xCBF4_3926);
}

#[test]
fn pcg32_and_sampling_vectors() {
    // PCG reference demo (pcg32-demo, srandom(42, 54)), from memory and matched by the
    // independent Python implementation.
    let mut rng = Pcg32::new(42, 54);
    let first: Vec<u32> = (0..3).map(|_| rng.next_u32()).collect();
    assert_eq!(first, [0xa15c02b7, 0x7b47f409, 0xba1d3330]);
    // From tests/python/wire_vectors.py.
    assert_eq!(sample_indices(1, 64, 8), [5, 19, 27, 34, 38, 42, 53, 55]);
    assert_eq!(
        sample_indices(42, 4096, 10),
        [93, 153, 458, 1065, 1763, 2162, 2197, 2963, 3124, 3237]
    );
    assert_eq!(sample_indices(0xDEAD_BEEF, 16, 4), [0, 3, 4, 13]);
}

fn header() -> WindowHeader {
    WindowHeader {
        stream: StreamId {
            node: 5,
            channel: 2,
        },
        capture_id: 9,
        seq: 17,
        sample_rate_hz: 25_600.0,
        window_len: 64,
        hop_len: 32,
        t0_us: T0,
        units: Units::MillimetersPerSecond,
        scale: 0.01,
        adc_bits: 12,
    }
}

fn field_of(r: Result<Packet, csgate::packet::ValidationError>) -> (Field, String) {
    let e = r.expect_err("must be rejected");
    let msg = e.to_string();
    assert!(msg.contains("node 5 channel 2"), "{msg}");
    assert!(msg.contains(e.field.name()), "{msg}");
    (e.field, msg)
}

#[test]
fn validation_errors_name_the_field() {
    let ok_vals = || RawValues::I16(vec![1, 2, 3]);
    let ok_idx = || Sampling::Explicit(vec![1, 2, 3]);
    let mut h = header();
    h.sample_rate_hz = f64::NAN;
    assert_eq!(
        field_of(Packet::new(h, ok_idx(), ok_vals())).0,
        Field::SampleRate
    );
    let mut h = header();
    h.window_len = 8;
    assert_eq!(
        field_of(Packet::new(h, ok_idx(), ok_vals())).0,
        Field::WindowLen
    );
    let mut h = header();
    h.hop_len = 0;
    assert_eq!(
        field_of(Packet::new(h, ok_idx(), ok_vals())).0,
        Field::HopLen
    );
    let mut h = header();
    h.hop_len = 65;
    assert!(field_of(Packet::new(h, ok_idx(), ok_vals()))
        .1
        .contains("65"));
    let mut h = header();
    h.adc_bits = 25;
    assert_eq!(
        field_of(Packet::new(h, ok_idx(), ok_vals())).0,
        Field::AdcBits
    );
    let mut h = header();
    h.scale = 0.0;
    assert_eq!(
        field_of(Packet::new(h, ok_idx(), ok_vals())).0,
        Field::Scale
    );
    let seeded = Sampling::Seeded { seed: 1, m: 65 };
    assert_eq!(
        field_of(Packet::new(header(), seeded, ok_vals())).0,
        Field::SampleCount
    );
    let unsorted = Sampling::Explicit(vec![3, 2, 1]);
    assert_eq!(
        field_of(Packet::new(header(), unsorted, ok_vals())).0,
        Field::Indices
    );
    let repeated = Sampling::Explicit(vec![1, 1, 2]);
    assert_eq!(
        field_of(Packet::new(header(), repeated, ok_vals())).0,
        Field::Indices
    );
    let outside = Sampling::Explicit(vec![1, 2, 64]);
    assert_eq!(
        field_of(Packet::new(header(), outside, ok_vals())).0,
        Field::Indices
    );
    let short = RawValues::I16(vec![1, 2]);
    assert_eq!(
        field_of(Packet::new(header(), ok_idx(), short)).0,
        Field::Values
    );
    let out_of_adc = RawValues::I16(vec![1, 2, 2048]);
    assert_eq!(
        field_of(Packet::new(header(), ok_idx(), out_of_adc)).0,
        Field::Values
    );
    // An unknown units code can only come off the wire: patch vector 1 (offset 18) and fix
    // its CRC.
    let mut bytes = unhex(V1);
    bytes[18] = 200;
    let n = bytes.len();
    let crc = crc32fast::hash(&bytes[..n - 4]);
    bytes[n - 4..].copy_from_slice(&crc.to_le_bytes());
    match wire::parse(&bytes, &Limits::default()) {
        Err(DecodeError::Invalid(e)) => {
            assert_eq!(e.field, Field::Units);
            assert!(e.to_string().contains("units = 200"), "{e}");
        }
        other => panic!("expected a units error, got {other:?}"),
    }
}

fn arb_packet() -> impl Strategy<Value = Packet> {
    (
        (
            any::<u32>(),
            any::<u16>(),
            any::<u32>(),
            any::<u64>(),
            16u32..=512,
        ),
        (1.0f64..1e6, any::<i64>(), 0u8..=6, 1u8..=24, 1e-6f64..10.0),
        (0u8..3, any::<u64>(), any::<bool>(), any::<u64>()),
    )
        .prop_flat_map(|(ids, grid, coding)| {
            let n = ids.4;
            (Just((ids, grid, coding)), 1..=n, 1..=n)
        })
        .prop_map(
            |(
                (
                    (node, channel, capture_id, seq, n),
                    (rate, t0, units, bits, scale),
                    (coding, seed, f32s, vseed),
                ),
                hop,
                m,
            )| {
                let header = WindowHeader {
                    stream: StreamId { node, channel },
                    capture_id,
                    seq,
                    sample_rate_hz: rate,
                    window_len: n,
                    hop_len: hop,
                    t0_us: t0,
                    units: Units::from_code(units).unwrap(),
                    scale,
                    adc_bits: bits,
                };
                let mut rng = Pcg32::new(vseed, 7);
                let idx = sample_indices(seed, n, m);
                let sampling = match coding {
                    0 => Sampling::Coded(IndexCoding::DeltaVarint, idx),
                    1 => Sampling::Coded(IndexCoding::Bitmap, idx),
                    _ => Sampling::Seeded { seed, m },
                };
                let half = 1i32 << (bits.min(16) - 1);
                let raw = if f32s {
                    RawValues::F32((0..m).map(|_| rng.unit_f64() as f32 * 2.0 - 1.0).collect())
                } else {
                    RawValues::I16(
                        (0..m)
                            .map(|_| (rng.bounded(2 * half as u32) as i32 - half) as i16)
                            .collect(),
                    )
                };
                Packet::new(header, sampling, raw).expect("generated packets are valid")
            },
        )
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

    #[test]
    fn random_valid_frames_round_trip(p in arb_packet(), auth in any::<bool>()) {
        let key = NodeKey::new(vec![0x5A; 32]);
        let bytes = wire::encode_window_to_vec(&p, auth.then_some(&key)).unwrap();
        prop_assert_eq!(bytes.len(), wire::encoded_window_len(&p, auth));
        let back = match wire::parse(&bytes, &Limits::default()).unwrap() {
            Frame::Window(b) => b,
            _ => unreachable!(),
        };
        prop_assert_eq!(back.auth_tag.is_some(), auth);
        let mut expect = p.clone();
        expect.auth_tag = back.auth_tag;
        prop_assert_eq!(&back, &expect);
        prop_assert_eq!(wire::encode_window_to_vec(&back, None).unwrap(), bytes);
    }

    #[test]
    fn truncations_and_bit_flips_never_panic(p in arb_packet(), flip in any::<u32>()) {
        let bytes = wire::encode_window_to_vec(&p, None).unwrap();
        let mut codec = FrameCodec::default();
        for cut in 0..bytes.len() {
            let mut buf = BytesMut::from(&bytes[..cut]);
            let r = codec.decode(&mut buf);
            prop_assert!(matches!(r, Ok(None)), "prefix of {} bytes gave {:?}", cut, r);
            prop_assert!(codec.decode_eof(&mut buf).is_err() || cut == 0);
            prop_assert!(wire::parse(&bytes[..cut], &Limits::default()).is_err());
        }
        let bit = flip as usize % (bytes.len() * 8);
        let mut bad = bytes.clone();
        bad[bit / 8] ^= 1 << (bit % 8);
        // A flipped frame followed by a good one: the codec reports an error or waits, never
        // yields the damaged frame; parsing the damaged bytes alone is an error.
        let mut buf = BytesMut::from(&bad[..]);
        buf.extend_from_slice(&bytes);
        match codec.decode(&mut buf) {
            Err(_) | Ok(None) => {}
            Ok(Some(f)) => prop_assert!(false, "damaged frame accepted: {:?}", f),
        }
        prop_assert!(wire::parse(&bad, &Limits::default()).is_err());
    }
}

#[test]
fn every_single_bit_flip_of_the_vectors_is_rejected() {
    for v in [V1, V2, V3, V4] {
        let bytes = unhex(v);
        for bit in 0..bytes.len() * 8 {
            let mut bad = bytes.clone();
            bad[bit / 8] ^= 1 << (bit % 8);
            assert!(wire::parse(&bad, &Limits::default()).is_err(), "bit {bit}");
            let mut buf = BytesMut::from(&bad[..]);
            assert!(
                !matches!(FrameCodec::default().decode(&mut buf), Ok(Some(_))),
                "bit {bit}"
            );
        }
    }
}

#[test]
fn oversized_length_is_refused_before_buffering() {
    let mut bytes = unhex(V1);
    bytes[4..8].copy_from_slice(&(2u32 << 20).to_le_bytes());
    let mut buf = BytesMut::from(&bytes[..]);
    assert!(FrameCodec::new(4096).decode(&mut buf).is_err());
    let mut small = BytesMut::from(&unhex(V1)[..]);
    assert!(
        FrameCodec::new(64).decode(&mut small).is_err(),
        "91-byte frame over a 64-byte cap"
    );
}

fn log_with(frames: &[Vec<u8>], dir: &std::path::Path) -> std::path::PathBuf {
    let path = dir.join("capture.csglog");
    let mut w = LogWriter::open_append(&path, T0, "test capture").unwrap();
    for (k, f) in frames.iter().enumerate() {
        w.append(T0 + k as i64, f).unwrap();
    }
    w.sync().unwrap();
    path
}

#[test]
fn log_round_trip_and_append() {
    let dir = test_dir();
    let frames = [unhex(V1), unhex(V2), unhex(V3)];
    let path = log_with(&frames[..2], dir.path());
    // Reopening appends after the existing records, keeping the header.
    let mut w = LogWriter::open_append(&path, 0, "ignored").unwrap();
    w.append(T0 + 2, &frames[2]).unwrap();
    drop(w);
    let mut r = LogReader::open(&path).unwrap();
    assert_eq!(r.header().note, "test capture");
    assert_eq!(r.header().created_us, T0);
    let got: Vec<_> = r.by_ref().map(|x| x.unwrap()).collect();
    assert_eq!(got.len(), 3);
    for (k, rec) in got.iter().enumerate() {
        assert_eq!(rec.frame.as_bytes(), &frames[k][..]);
        assert_eq!(rec.received_us, T0 + k as i64);
    }
    assert_eq!(r.stats().truncated, None);
    assert_eq!(r.stats().garbage_regions, 0);
}

#[test]
fn truncated_log_returns_complete_frames_and_reports_the_cut() {
    let dir = test_dir();
    let frames = [unhex(V1), unhex(V2), unhex(V3)];
    let path = log_with(&frames, dir.path());
    let full = std::fs::read(&path).unwrap();
    for cut in [1usize, 8, 20, frames[2].len() + 7] {
        std::fs::write(&path, &full[..full.len() - cut]).unwrap();
        let mut r = LogReader::open(&path).unwrap();
        let got: Vec<_> = r.by_ref().map(|x| x.unwrap()).collect();
        assert_eq!(got.len(), 2, "cut {cut}");
        let t = r.stats().truncated.expect("cut reported");
        assert_eq!(t.len, (frames[2].len() + 8 - cut) as u64, "cut {cut}");
        assert_eq!(r.stats().garbage_regions, 0);
    }
}

#[test]
fn garbage_in_a_log_is_skipped_and_counted() {
    let dir = test_dir();
    let frames = [unhex(V1), unhex(V2), unhex(V3)];
    let path = log_with(&frames, dir.path());
    let full = std::fs::read(&path).unwrap();
    let header_len = 24 + "test capture".len() + 4;
    let second = header_len + 8 + frames[0].len();
    // Splice garbage (including a fake magic) between records 1 and 2, and damage record 3.
    let mut spliced = full[..second].to_vec();
    spliced.extend_from_slice(b"noise\xC5SGW\xff\xff\xff\xff more noise");
    spliced.extend_from_slice(&full[second..]);
    let n = spliced.len();
    spliced[n - 10] ^= 0x40;
    std::fs::write(&path, &spliced).unwrap();
    let mut r = LogReader::open(&path).unwrap();
    let got: Vec<_> = r.by_ref().map(|x| x.unwrap()).collect();
    assert_eq!(got.len(), 2);
    assert_eq!(got[0].frame.as_bytes(), &frames[0][..]);
    assert_eq!(got[1].frame.as_bytes(), &frames[1][..]);
    assert_eq!(got[1].received_us, T0 + 1);
    let s = r.stats();
    assert_eq!(s.garbage_regions, 2);
    assert_eq!(s.garbage_bytes, 24 + (8 + frames[2].len()) as u64);
    assert_eq!(s.truncated, None);
}
