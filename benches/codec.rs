//! Frames decoded and validated per second: n = 4096, m = 1024, each index coding.
//!
//! Run: `cargo bench --bench codec`. Frames are encoded outside the measured closure; the
//! closure runs the codec's `check` (length, CRC) and `parse` (expansion and validation).

use bytes::BytesMut;
use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use csgate::packet::indices::sample_indices;
use csgate::packet::{
    wire, FrameCodec, IndexCoding, Limits, Packet, RawValues, Sampling, StreamId, Units,
    WindowHeader,
};
use std::hint::black_box;
use tokio_util::codec::Decoder;

fn frame(sampling: Sampling) -> Vec<u8> {
    let header = WindowHeader {
        stream: StreamId {
            node: 1,
            channel: 0,
        },
        capture_id: 1,
        seq: 0,
        sample_rate_hz: 25_600.0,
        window_len: 4096,
        hop_len: 2048,
        t0_us: 0,
        units: Units::MetersPerSecond2,
        scale: 1e-3,
        adc_bits: 16,
    };
    let raw = RawValues::I16((0..1024).map(|k| (k * 7 % 2000) as i16 - 1000).collect());
    wire::encode_window_to_vec(&Packet::new(header, sampling, raw).unwrap(), None).unwrap()
}

fn bench(c: &mut Criterion) {
    let idx = sample_indices(9, 4096, 1024);
    let cases = [
        (
            "delta_varint",
            frame(Sampling::Coded(IndexCoding::DeltaVarint, idx.clone())),
        ),
        ("bitmap", frame(Sampling::Coded(IndexCoding::Bitmap, idx))),
        ("seeded", frame(Sampling::Seeded { seed: 9, m: 1024 })),
    ];
    let limits = Limits::default();
    let mut group = c.benchmark_group("decode_validate_n4096_m1024");
    group.throughput(Throughput::Elements(1));
    for (name, bytes) in &cases {
        group.bench_function(*name, |b| {
            let mut codec = FrameCodec::default();
            let mut buf = BytesMut::with_capacity(bytes.len());
            b.iter(|| {
                buf.extend_from_slice(bytes);
                let raw = codec.decode(&mut buf).unwrap().unwrap();
                black_box(raw.parse(&limits).unwrap())
            })
        });
    }
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
