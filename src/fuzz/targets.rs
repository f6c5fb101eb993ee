//! One case of each target: build the input from the seed, run the code under test inside
//! `catch_unwind`, check the invariants.

use super::gen::{self, fix_crc, mutate_bytes, test_key};
use super::{CaseOutcome, Failure, FuzzRng, Target};
use crate::daemon::GatewayConfig;
use crate::packet::codec::FrameCodec;
use crate::packet::log::{LogHeader, LogReader, LOG_VERSION};
use crate::packet::wire::{self, Frame};
use crate::packet::Limits;
use bytes::BytesMut;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;
use tokio_util::codec::Decoder;

type CaseResult = Result<CaseOutcome, String>;

/// Runs one case of `target` from `seed`: `Ok` when every invariant held, the failure otherwise
/// (a panic is caught and reported with its message).
pub fn run_case(target: Target, seed: u64) -> Result<CaseOutcome, Failure> {
    let outcome = catch_unwind(AssertUnwindSafe(|| {
        let mut rng = FuzzRng::new(seed);
        match target {
            Target::Frame => frame_case(&mut rng),
            Target::Codec => codec_case(&mut rng),
            Target::Log => log_case(&mut rng),
            Target::Config => config_case(&mut rng),
            Target::Record => record_case(&mut rng),
        }
    }));
    let message = match outcome {
        Ok(Ok(o)) => return Ok(o),
        Ok(Err(broken)) => broken,
        Err(panic) => {
            let what = panic
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| panic.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "(no message)".into());
            format!("panic: {what}")
        }
    };
    Err(Failure {
        target,
        seed,
        message,
    })
}

fn limits(rng: &mut FuzzRng) -> Limits {
    Limits {
        max_frame_len: [wire::MAX_FRAME_LEN, 4096, 1024, 256][rng.below(4)],
        ..Limits::default()
    }
}

fn frame_case(rng: &mut FuzzRng) -> CaseResult {
    let limits = limits(rng);
    let (bytes, orig, spliced) = gen::frame_input(rng);
    let checked = wire::check(&bytes, limits.max_frame_len);
    if let Ok(Some(len)) = checked {
        if len > limits.max_frame_len || len > bytes.len() {
            return Err(format!(
                "check accepted {len} bytes (buffer {}, max {})",
                bytes.len(),
                limits.max_frame_len
            ));
        }
    }
    let parsed = wire::parse(&bytes, &limits);
    if let Some((orig, signed)) = &orig {
        let same = *orig == bytes;
        if same && orig.len() <= limits.max_frame_len && parsed.is_err() {
            return Err(format!(
                "a valid frame was refused: {}",
                parsed.expect_err("checked")
            ));
        }
        // A signed frame whose covered bytes or tag changed must not verify, unless the
        // mutations rebuilt a frame the key did sign: the one spliced in (a splice at the same
        // offset of both frames within their common head gives it back whole; found by the
        // long run, seeds 0xabf8e9a80ca8a9a8 and 0xa70ffe5bf87961e9).
        if *signed && bytes.len() >= wire::MIN_FRAME_LEN {
            let body = |b: &[u8]| b[..b.len().saturating_sub(wire::CRC_LEN)].to_vec();
            let verified = test_key().verify(&bytes).is_ok();
            let signed_by_us = body(&bytes) == body(orig)
                || spliced.as_deref().is_some_and(|o| body(&bytes) == body(o));
            if verified && !signed_by_us {
                return Err("a changed signed frame still verifies".into());
            }
            if same && !verified {
                return Err("an unchanged signed frame does not verify".into());
            }
        }
    }
    match parsed {
        Ok(frame) => {
            let mut again = BytesMut::new();
            frame
                .encode(None, &mut again)
                .map_err(|e| format!("a parsed frame does not re-encode: {e}"))?;
            if again[..] != bytes[..] {
                return Err(format!(
                    "round trip changed the bytes ({} in, {} out)",
                    bytes.len(),
                    again.len()
                ));
            }
            if let Frame::Window(p) = &frame {
                if p.indices.len() != p.raw.len() || p.values.len() != p.raw.len() {
                    return Err("window with mismatched index and value counts".into());
                }
            }
            Ok(CaseOutcome::Accepted)
        }
        Err(_) => Ok(CaseOutcome::Rejected),
    }
}

/// Decodes `buf` with the codec, in chunks from `chunk` (`None`: all at once), until the input
/// ends or the first error. Checks the codec's limits along the way.
fn decode_all(
    codec: &mut FrameCodec,
    buf: &[u8],
    mut chunk: impl FnMut() -> usize,
) -> Result<(Vec<Vec<u8>>, Option<String>), String> {
    let max = codec.max_frame_len();
    let mut src = BytesMut::new();
    let mut out = Vec::new();
    let mut at = 0;
    loop {
        let eof = at >= buf.len();
        if !eof {
            let k = chunk().clamp(1, buf.len() - at);
            src.extend_from_slice(&buf[at..at + k]);
            at += k;
        }
        loop {
            let r = if eof {
                codec.decode_eof(&mut src)
            } else {
                codec.decode(&mut src)
            };
            match r {
                Ok(Some(f)) => {
                    if f.len() > max {
                        return Err(format!("codec emitted {} bytes, max {max}", f.len()));
                    }
                    out.push(f.as_bytes().to_vec());
                }
                Ok(None) => {
                    // Waiting for more: the declared length must be within the maximum (an
                    // oversized length is refused from its first 8 bytes, before any reserve).
                    if src.len() >= 8 {
                        let declared =
                            u32::from_le_bytes(src[4..8].try_into().expect("4")) as usize;
                        if declared > max {
                            return Err(format!(
                                "codec waits for a {declared}-byte frame, max {max}"
                            ));
                        }
                    }
                    if src.len() > max {
                        return Err(format!("codec buffers {} bytes, max {max}", src.len()));
                    }
                    break;
                }
                Err(e) => return Ok((out, Some(e.to_string()))),
            }
        }
        if eof {
            return Ok((out, None));
        }
    }
}

fn codec_case(rng: &mut FuzzRng) -> CaseResult {
    let max = [wire::MAX_FRAME_LEN, 4096, 1024][rng.below(3)];
    let count = rng.range(1, 6);
    let mutated_at = if rng.one_in(4) {
        None
    } else {
        Some(rng.below(count))
    };
    let mut buf = Vec::new();
    let mut clean = Vec::new();
    for k in 0..count {
        let (mut f, _) = gen::valid_frame(rng);
        if Some(k) == mutated_at {
            let other = gen::valid_frame(rng).0;
            gen::mutate_frame(rng, &mut f, &other);
            if rng.one_in(2) {
                fix_crc(&mut f);
            }
        } else if mutated_at.is_none() {
            clean.push(f.clone());
        }
        buf.extend_from_slice(&f);
    }
    let whole = decode_all(&mut FrameCodec::new(max), &buf, || usize::MAX)?;
    let big = rng.one_in(2);
    let chunked = decode_all(&mut FrameCodec::new(max), &buf, || {
        if big {
            rng.range(1, 4096)
        } else {
            rng.range(1, 9)
        }
    })?;
    // The same frames and the same fate (the error text may differ: a bad magic reports the
    // bytes present when it is seen).
    if whole.0 != chunked.0 || whole.1.is_some() != chunked.1.is_some() {
        return Err(format!(
            "chunked decoding differs: {} frames / {:?} at once, {} frames / {:?} in chunks",
            whole.0.len(),
            whole.1,
            chunked.0.len(),
            chunked.1
        ));
    }
    let fits = clean.iter().all(|f| f.len() <= max);
    if mutated_at.is_none() && fits && (chunked.0 != clean || chunked.1.is_some()) {
        return Err(format!(
            "a clean run of {} frames decoded as {} frames, error {:?}",
            clean.len(),
            chunked.0.len(),
            chunked.1
        ));
    }
    Ok(if chunked.1.is_none() {
        CaseOutcome::Accepted
    } else {
        CaseOutcome::Rejected
    })
}

fn log_case(rng: &mut FuzzRng) -> CaseResult {
    let header = LogHeader {
        version: LOG_VERSION,
        created_us: 1_796_126_400_000_000,
        note: ["", "quillmoor pump 3", "ünïcode note"][rng.below(3)].to_string(),
    };
    let mut file = header.encode();
    // (offset, frame) of every record.
    let mut records = Vec::new();
    for _ in 0..rng.range(0, 6) {
        let (f, _) = gen::valid_frame(rng);
        let at = file.len();
        file.extend_from_slice(&(1_796_126_400_000_000i64 + at as i64).to_le_bytes());
        file.extend_from_slice(&f);
        records.push((at as u64, f));
    }
    let max = [wire::MAX_FRAME_LEN, 8192][rng.below(2)];
    let mut mode = rng.below(4);
    if mode == 1 && records.is_empty() {
        mode = 2;
    }
    let mut damaged = None;
    match mode {
        0 => {}
        1 => {
            // Damage inside one record's frame, length unchanged.
            let k = rng.below(records.len());
            let (at, f) = &records[k];
            let start = *at as usize + 8;
            for _ in 0..rng.range(1, 3) {
                let i = start + rng.below(f.len());
                file[i] ^= 1 << rng.below(8);
            }
            if file[start..start + f.len()] != f[..] {
                damaged = Some(k);
            }
        }
        _ => {
            let other = gen::valid_frame(rng).0;
            for _ in 0..rng.range(1, 4) {
                mutate_bytes(rng, &mut file, &other);
            }
        }
    }
    let reader = LogReader::new(std::io::Cursor::new(&file), Path::new("fuzz.cslog"), max);
    let mut reader = match reader {
        Ok(r) => r,
        Err(_) if mode >= 2 => return Ok(CaseOutcome::Rejected),
        Err(e) => return Err(format!("header of a valid log refused: {e}")),
    };
    let mut got = Vec::new();
    // Each call returns a record or ends; a record is at least 24 bytes.
    let bound = file.len() / (8 + wire::MIN_FRAME_LEN) + 2;
    loop {
        if got.len() > bound {
            return Err(format!(
                "more than {bound} records from {} bytes",
                file.len()
            ));
        }
        match reader.next_record() {
            Ok(Some(r)) => {
                let at = r.offset as usize + 8;
                let bytes = r.frame.as_bytes();
                if file.get(at..at + bytes.len()) != Some(bytes) {
                    return Err(format!("record at {} is not the file's bytes", r.offset));
                }
                if got
                    .last()
                    .is_some_and(|(o, f): &(u64, Vec<u8>)| r.offset < *o + 8 + f.len() as u64)
                {
                    return Err(format!("record at {} overlaps the one before", r.offset));
                }
                got.push((r.offset, bytes.to_vec()));
            }
            Ok(None) => break,
            Err(e) => return Err(format!("in-memory read failed: {e}")),
        }
    }
    match mode {
        0 if got != records => Err(format!(
            "clean log of {} records read as {}",
            records.len(),
            got.len()
        )),
        0 if reader.stats().garbage_bytes > 0 || reader.stats().truncated.is_some() => {
            Err("clean log reported garbage or a cut".into())
        }
        1 => {
            let lost: Vec<_> = records
                .iter()
                .enumerate()
                .filter(|(k, r)| Some(*k) != damaged && !got.contains(r))
                .map(|(k, _)| k)
                .collect();
            if lost.is_empty() {
                Ok(CaseOutcome::Accepted)
            } else {
                Err(format!(
                    "damage in record {damaged:?} of {} lost intact records {lost:?}",
                    records.len()
                ))
            }
        }
        _ => Ok(CaseOutcome::Accepted),
    }
}

/// Hex keys of the generated configurations: long enough that no error message could hold
/// one by chance.
fn config_text(rng: &mut FuzzRng) -> (String, Vec<String>) {
    if rng.one_in(4) {
        let text = include_str!("../../configs/gateway.toml").to_string();
        let keys = text
            .lines()
            .filter_map(|l| l.trim().strip_prefix("key = \""))
            .map(|k| k.trim_end_matches('"').to_string())
            .collect();
        return (text, keys);
    }
    let mut config = GatewayConfig::default();
    let mut keys = Vec::new();
    for i in 0..rng.below(4) {
        let key = (!rng.one_in(4)).then(|| {
            let len = rng.range(16, 32);
            let k: String = rng.bytes(len).iter().map(|b| format!("{b:02x}")).collect();
            k
        });
        if let Some(k) = &key {
            keys.push(k.clone());
        }
        config.nodes.push(crate::daemon::config::NodeEntry {
            id: 100 + i as u32,
            name: format!("pump {i}"),
            key,
            advise: rng.one_in(2),
        });
    }
    config.ingest.require_auth = rng.one_in(2);
    let text = toml::to_string(&config).expect("a config serializes");
    (text, keys)
}

fn random_value(rng: &mut FuzzRng) -> toml::Value {
    use toml::Value;
    match rng.below(9) {
        0 => Value::Integer(rng.next_u64() as i64),
        1 => Value::Integer(-(rng.below(3) as i64)),
        2 => Value::Integer(i64::MAX),
        3 => Value::Float([f64::NAN, f64::INFINITY, -0.0, 1e300][rng.below(4)]),
        4 => Value::Boolean(rng.one_in(2)),
        5 => Value::String(
            [
                "",
                "0.0.0.0:7700",
                "[::]:0",
                "x",
                "../..",
                "info,csgate=trace",
                "zz",
            ][rng.below(7)]
            .into(),
        ),
        6 => {
            let len = rng.below(12);
            Value::String(String::from_utf8_lossy(&rng.bytes(len)).into())
        }
        7 => Value::Array(vec![Value::Integer(1)]),
        _ => Value::Table(toml::Table::new()),
    }
}

/// A structural mutation: replace, remove or add one key somewhere in the table tree.
fn mutate_table(rng: &mut FuzzRng, t: &mut toml::Table, depth: usize) {
    let keys: Vec<String> = t.keys().cloned().collect();
    if keys.is_empty() || (depth > 0 && rng.one_in(4)) {
        let name = ["bogus", "listen", "key", "id", "max_frame_len"][rng.below(5)];
        t.insert(name.into(), random_value(rng));
        return;
    }
    let k = &keys[rng.below(keys.len())];
    let v = t.get_mut(k).expect("listed key");
    match v {
        toml::Value::Table(inner) if !rng.one_in(4) => mutate_table(rng, inner, depth + 1),
        toml::Value::Array(items) if !items.is_empty() && !rng.one_in(4) => {
            let i = rng.below(items.len());
            if let toml::Value::Table(inner) = &mut items[i] {
                mutate_table(rng, inner, depth + 1);
            } else {
                items[i] = random_value(rng);
            }
        }
        _ if rng.one_in(3) => {
            t.remove(k);
        }
        _ => *v = random_value(rng),
    }
}

fn mutate_text(rng: &mut FuzzRng, text: &str) -> String {
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    match rng.below(6) {
        0 if !lines.is_empty() => {
            let i = rng.below(lines.len());
            lines.remove(i);
        }
        1 if !lines.is_empty() => {
            let i = rng.below(lines.len());
            let l = lines[i].clone();
            lines.insert(i, l);
        }
        2 if !lines.is_empty() => {
            let i = rng.below(lines.len());
            let tok = [
                "=",
                "[",
                "]]",
                "\"",
                "'''",
                "\\u",
                "#",
                "=\"\"",
                "9999999999999999999",
            ][rng.below(9)];
            let at = rng.below(lines[i].len() + 1);
            if lines[i].is_char_boundary(at) {
                lines[i].insert_str(at, tok);
            }
        }
        _ => {
            let mut b = text.as_bytes().to_vec();
            mutate_bytes(rng, &mut b, b"[[node]]\nid = 1\nkey = \"00\"\n");
            return String::from_utf8_lossy(&b).into_owned();
        }
    }
    lines.join("\n")
}

fn config_case(rng: &mut FuzzRng) -> CaseResult {
    let (text, keys) = config_text(rng);
    let path = Path::new("fuzz.toml");
    let mutated = match rng.below(8) {
        0 => text.clone(),
        1..=3 => mutate_text(rng, &text),
        _ => match toml::from_str::<toml::Table>(&text) {
            Ok(mut t) => {
                for _ in 0..rng.range(1, 3) {
                    mutate_table(rng, &mut t, 0);
                }
                toml::to_string(&t).unwrap_or_else(|_| text.clone())
            }
            Err(e) => return Err(format!("a generated config is not TOML: {e}")),
        },
    };
    let leaks = |s: &str| keys.iter().any(|k| s.contains(k.as_str()));
    match GatewayConfig::from_toml_str(&mutated, path) {
        Ok(config) => {
            if leaks(&format!("{config:?}")) {
                return Err("the Debug form of a config shows a node key".into());
            }
            let again = toml::to_string(&config).map_err(|e| format!("no re-serialize: {e}"))?;
            GatewayConfig::from_toml_str(&again, path)
                .map_err(|e| format!("an accepted config re-serialized is refused: {e}"))?;
            Ok(CaseOutcome::Accepted)
        }
        Err(e) => {
            if mutated == text {
                return Err(format!("a valid config is refused: {e}"));
            }
            if leaks(&e.to_string()) || leaks(&format!("{e:?}")) {
                return Err(format!("an error message shows a node key: {e}"));
            }
            Ok(CaseOutcome::Rejected)
        }
    }
}

/// The record file that case `seed` of the `record` target opens (a small valid record,
/// usually damaged), e.g. to reproduce a crash of the HDF5 library outside the fuzzer.
pub fn record_case_input(seed: u64) -> Result<Vec<u8>, String> {
    record_bytes(&mut FuzzRng::new(seed)).map(|(b, _)| b)
}

fn record_bytes(rng: &mut FuzzRng) -> Result<(Vec<u8>, bool), String> {
    let base = record::base()?;
    let mut b = base.to_vec();
    let mutated = !rng.one_in(16);
    if mutated {
        match rng.below(8) {
            0 => {
                // Truncation anywhere.
                let k = rng.below(b.len());
                b.truncate(k);
            }
            _ => {
                for _ in 0..rng.range(1, 8) {
                    let at = rng.below(b.len());
                    b[at] = if rng.one_in(2) {
                        b[at] ^ (1 << rng.below(8))
                    } else {
                        rng.next_u64() as u8
                    };
                }
            }
        }
    }
    Ok((b, mutated))
}

fn record_case(rng: &mut FuzzRng) -> CaseResult {
    let (b, mutated) = record_bytes(rng)?;
    let dir = tempfile::tempdir().map_err(|e| format!("temp folder: {e}"))?;
    let path = dir.path().join("mutated.h5");
    std::fs::write(&path, &b).map_err(|e| format!("temp file: {e}"))?;
    match crate::inspect::summarize(&path) {
        Ok(_) => {
            // A summary opened; reading every stream's samples must not fail silently either.
            if let Ok(r) = crate::store::RecordReader::open(&path) {
                for key in r.streams().unwrap_or_default() {
                    let _ = r.samples(key);
                    let _ = r.windows(key);
                    let _ = r.gaps(key);
                }
            }
            Ok(CaseOutcome::Accepted)
        }
        Err(e) if mutated => {
            let _ = e.to_string();
            Ok(CaseOutcome::Rejected)
        }
        Err(e) => Err(format!("the unmutated record is refused: {e}")),
    }
}

mod record {
    //! The small valid record every record case mutates, written once per process.
    use crate::store::layout::{close_reason, stop_reason, trust};
    use crate::store::{GapReason, RecordWriter, StreamKey, StreamMeta, WindowRow, WriterOptions};
    use std::sync::OnceLock;

    static BASE: OnceLock<Result<Vec<u8>, String>> = OnceLock::new();

    pub(super) fn base() -> Result<&'static [u8], String> {
        BASE.get_or_init(write)
            .as_ref()
            .map(Vec::as_slice)
            .map_err(Clone::clone)
    }

    fn write() -> Result<Vec<u8>, String> {
        let dir = tempfile::tempdir().map_err(|e| e.to_string())?;
        let path = dir.path().join("base.h5");
        let t0 = 1_796_126_400_000_000_000;
        let key = StreamKey::new(7, 0);
        let meta = StreamMeta {
            node: 7,
            channel: 0,
            sample_rate_hz: 25_600.0,
            start_time_unix_ns: t0,
            capture_id: 3,
            units: "m/s^2".into(),
            basis: "dct".into(),
        };
        let options = WriterOptions {
            chunk_len: 256,
            row_chunk_len: 4,
            deflate: None,
            ..WriterOptions::default()
        };
        let run = || -> Result<(), crate::store::StoreError> {
            let mut w = RecordWriter::create(&path, &[meta], &options, "fuzz")?;
            let block: Vec<f32> = (0..600).map(|i| (i % 50) as f32 * 0.5).collect();
            w.append_samples(key, 0, &block)?;
            w.append_gap(key, 600, 64, GapReason::WindowMissing)?;
            w.append_samples(key, 664, &block)?;
            for seq in 0..3 {
                w.append_window(
                    key,
                    WindowRow {
                        seq,
                        capture_id: 3,
                        start_sample: seq * 256,
                        t0_unix_ns: t0 + seq as i64 * 10_000_000,
                        m: 64,
                        n: 256,
                        lambda: 0.01,
                        iterations: 80,
                        duality_gap: 1e-4,
                        residual: 0.02,
                        support: 12,
                        stop_reason: stop_reason::DUALITY_GAP,
                        solve_time_us: 500.0,
                        cv_error: f64::NAN,
                        trust: trust::UNKNOWN,
                    },
                )?;
            }
            w.close(close_reason::SHUTDOWN)
        };
        run().map_err(|e| format!("writing the base record: {e}"))?;
        std::fs::read(&path).map_err(|e| e.to_string())
    }
}
