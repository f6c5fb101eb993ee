//! The reconstructed-window message a broker worker publishes and a recorder consumes
//! (docs/scale-out.md, "Window messages", version 1): the window frame exactly as the node sent
//! it, the solver's report, the trust figures and the reconstructed window on the full grid.
//!
//! A fixed little-endian layout rather than JSON: the report holds NaN (no JSON number), and
//! the samples are most of the bytes. NATS delivers whole messages over TCP, so there is no
//! framing or checksum of its own; the frame inside keeps its CRC and is parsed again.

use crate::packet::{wire, DecodeError, Frame, Limits, Packet};
use crate::pipeline::reconstruct::SolvedWindow;
use crate::pipeline::trust::{LowTrustReasons, WindowTrust};
use crate::solver::{SolveReport, StopReason};

/// First bytes of every window message: "CSRW" (csgate reconstructed window).
pub const MAGIC: [u8; 4] = *b"CSRW";
/// The layout version this build writes and reads.
pub const VERSION: u8 = 1;
/// Bytes before the frame.
pub const HEADER_LEN: usize = 96;

const FLAG_SIGNAL: u8 = 0x01;
const FLAG_TRUST: u8 = 0x02;
const FLAG_LOW_CV: u8 = 0x04;
const FLAG_LOW_PHASE: u8 = 0x08;
const FLAG_CONVERGED: u8 = 0x10;
const FLAG_DEBIASED: u8 = 0x20;

/// A message that is not a window message of this version.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum MessageError {
    /// Too short, wrong magic or version, or lengths that do not add up.
    #[error("not a version-{VERSION} window message: {0}")]
    Layout(String),
    /// The frame inside does not parse.
    #[error("the window frame inside does not parse: {0}")]
    Frame(#[from] DecodeError),
}

/// The stop-reason code of the message (its own table: the record's codes are coarser).
fn stop_to_code(s: StopReason) -> u8 {
    match s {
        StopReason::DualityGap => 1,
        StopReason::RelativeChange => 2,
        StopReason::IterationCap => 3,
        StopReason::ResidualWithinEps => 4,
        StopReason::ExactResidual => 5,
        StopReason::ZeroSolution => 6,
        StopReason::MinL2 => 7,
    }
}

fn code_to_stop(c: u8) -> Option<StopReason> {
    Some(match c {
        1 => StopReason::DualityGap,
        2 => StopReason::RelativeChange,
        3 => StopReason::IterationCap,
        4 => StopReason::ResidualWithinEps,
        5 => StopReason::ExactResidual,
        6 => StopReason::ZeroSolution,
        7 => StopReason::MinL2,
        _ => return None,
    })
}

/// Encodes a reconstructed window. `frame` is the window frame as received (wire format v1,
/// kind 1); the signal goes out as `f32`, the precision of the record.
pub fn encode(w: &SolvedWindow, frame: &[u8]) -> Vec<u8> {
    let n = w.packet.header.window_len as usize;
    let mut out = Vec::with_capacity(HEADER_LEN + frame.len() + 4 * n);
    let mut flags = 0u8;
    let (report, signal) = match &w.outcome {
        Ok((signal, report)) => {
            flags |= FLAG_SIGNAL;
            (Some(report), Some(signal))
        }
        Err(_) => (None, None),
    };
    if let Some(t) = &w.trust {
        flags |= FLAG_TRUST;
        if t.reasons.cv_error {
            flags |= FLAG_LOW_CV;
        }
        if t.reasons.phase_transition {
            flags |= FLAG_LOW_PHASE;
        }
    }
    if report.is_some_and(|r| r.converged) {
        flags |= FLAG_CONVERGED;
    }
    if report.is_some_and(|r| r.debiased) {
        flags |= FLAG_DEBIASED;
    }
    out.extend_from_slice(&MAGIC);
    out.push(VERSION);
    out.push(flags);
    out.push(report.map_or(0, |r| stop_to_code(r.stop)));
    out.push(0);
    let u32_of = |v: usize| u32::try_from(v).unwrap_or(u32::MAX);
    out.extend_from_slice(&u32_of(report.map_or(0, |r| r.iterations)).to_le_bytes());
    out.extend_from_slice(&u32_of(report.map_or(0, |r| r.support)).to_le_bytes());
    for v in [
        report.map_or(f64::NAN, |r| r.lambda),
        report.map_or(f64::NAN, |r| r.relative_residual),
        report.map_or(f64::NAN, |r| r.relative_gap),
        w.solve_time_us,
        w.trust_time_us,
        w.trust.map_or(f64::NAN, |t| t.cv_error),
    ] {
        out.extend_from_slice(&v.to_le_bytes());
    }
    out.extend_from_slice(&u32_of(w.trust.map_or(0, |t| t.holdout)).to_le_bytes());
    out.extend_from_slice(&u32_of(w.trust.map_or(0, |t| t.effective_support)).to_le_bytes());
    out.extend_from_slice(
        &w.trust
            .map_or(f64::NAN, |t| t.min_measurements)
            .to_le_bytes(),
    );
    out.extend_from_slice(&u32_of(w.trust.map_or(0, |t| t.holdout_iterations)).to_le_bytes());
    out.extend_from_slice(&u32_of(report.map_or(0, |r| r.fista_runs)).to_le_bytes());
    out.extend_from_slice(&[0u8; 4]);
    out.extend_from_slice(&u32_of(frame.len()).to_le_bytes());
    debug_assert_eq!(out.len(), HEADER_LEN);
    out.extend_from_slice(frame);
    match (&w.outcome, signal) {
        (_, Some(signal)) => {
            for &v in signal {
                out.extend_from_slice(&(v as f32).to_le_bytes());
            }
        }
        (Err(e), None) => out.extend_from_slice(e.as_bytes()),
        _ => {}
    }
    out
}

fn take<const N: usize>(b: &[u8], at: usize) -> [u8; N] {
    b[at..at + N]
        .try_into()
        .expect("length checked by the caller")
}

/// Decodes a window message; the frame is parsed (CRC, layout, validation) with `limits` but
/// its authentication tag is not checked: the ingest that published it did (docs/scale-out.md,
/// "Trust").
pub fn decode(bytes: &[u8], limits: &Limits) -> Result<SolvedWindow, MessageError> {
    let bad = |what: String| MessageError::Layout(what);
    if bytes.len() < HEADER_LEN {
        return Err(bad(format!(
            "{} bytes, shorter than the {HEADER_LEN}-byte header",
            bytes.len()
        )));
    }
    if bytes[0..4] != MAGIC {
        return Err(bad("wrong magic".into()));
    }
    if bytes[4] != VERSION {
        return Err(bad(format!("version {}", bytes[4])));
    }
    let flags = bytes[5];
    let u32_at = |at: usize| u32::from_le_bytes(take::<4>(bytes, at)) as usize;
    let f64_at = |at: usize| f64::from_le_bytes(take::<8>(bytes, at));
    let frame_len = u32_at(92);
    let frame_end = HEADER_LEN
        .checked_add(frame_len)
        .filter(|&e| e <= bytes.len())
        .ok_or_else(|| bad(format!("frame length {frame_len} past the end")))?;
    let packet: Packet = match wire::parse(&bytes[HEADER_LEN..frame_end], limits)? {
        Frame::Window(p) => p,
        _ => return Err(bad("the frame inside is not a window".into())),
    };
    let trust = (flags & FLAG_TRUST != 0).then(|| WindowTrust {
        cv_error: f64_at(56),
        holdout: u32_at(64),
        effective_support: u32_at(68),
        min_measurements: f64_at(72),
        reasons: LowTrustReasons {
            cv_error: flags & FLAG_LOW_CV != 0,
            phase_transition: flags & FLAG_LOW_PHASE != 0,
        },
        holdout_iterations: u32_at(80),
        // Not carried (the tuned weight itself is the `lambda` field at offset 16).
        lambda_fraction: None,
    });
    let rest = &bytes[frame_end..];
    let outcome = if flags & FLAG_SIGNAL != 0 {
        let n = packet.header.window_len as usize;
        if rest.len() != 4 * n {
            return Err(bad(format!(
                "{} signal bytes for a window of {n} samples",
                rest.len()
            )));
        }
        let signal: Vec<f64> = rest
            .chunks_exact(4)
            .map(|c| f64::from(f32::from_le_bytes(c.try_into().expect("chunks of 4"))))
            .collect();
        let stop = code_to_stop(bytes[6]).ok_or_else(|| bad(format!("stop code {}", bytes[6])))?;
        let report = SolveReport {
            iterations: u32_at(8),
            subspace_steps: 0,
            fista_runs: u32_at(84),
            objective: f64::NAN,
            residual_norm: f64::NAN,
            relative_residual: f64_at(24),
            lasso_residual_norm: f64::NAN,
            support: u32_at(12),
            lambda: f64_at(16),
            lambda_max: f64::NAN,
            sigma: None,
            relative_gap: f64_at(32),
            stop,
            converged: flags & FLAG_CONVERGED != 0,
            debiased: flags & FLAG_DEBIASED != 0,
            cg_steps: 0,
        };
        Ok((signal, report))
    } else {
        Err(String::from_utf8_lossy(rest).into_owned())
    };
    Ok(SolvedWindow {
        packet,
        outcome,
        solve_time_us: f64_at(40),
        trust_time_us: f64_at(48),
        trust,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::packet::{RawValues, Sampling, StreamId, Units, WindowHeader};

    fn packet() -> Packet {
        let header = WindowHeader {
            stream: StreamId {
                node: 7,
                channel: 1,
            },
            capture_id: 3,
            seq: 42,
            sample_rate_hz: 25_600.0,
            window_len: 64,
            hop_len: 32,
            t0_us: 1_700_000_000_000_000,
            units: Units::MetersPerSecond2,
            scale: 0.001,
            adc_bits: 12,
        };
        Packet::new(
            header,
            Sampling::Seeded { seed: 9, m: 16 },
            RawValues::I16(vec![3; 16]),
        )
        .unwrap()
    }

    #[test]
    fn round_trip_with_signal_and_trust() {
        let p = packet();
        let frame = wire::encode_window_to_vec(&p, None).unwrap();
        let report = SolveReport {
            iterations: 77,
            subspace_steps: 0,
            fista_runs: 2,
            objective: f64::NAN,
            residual_norm: f64::NAN,
            relative_residual: 0.05,
            lasso_residual_norm: f64::NAN,
            support: 11,
            lambda: 0.25,
            lambda_max: f64::NAN,
            sigma: None,
            relative_gap: 1e-5,
            stop: StopReason::DualityGap,
            converged: true,
            debiased: true,
            cg_steps: 0,
        };
        let signal: Vec<f64> = (0..64).map(|i| f64::from(i as f32 * 0.5)).collect();
        let w = SolvedWindow {
            packet: p.clone(),
            outcome: Ok((signal.clone(), report.clone())),
            solve_time_us: 123.5,
            trust_time_us: 20.0,
            trust: Some(WindowTrust {
                cv_error: 0.12,
                holdout: 2,
                effective_support: 9,
                min_measurements: 30.5,
                reasons: LowTrustReasons {
                    cv_error: false,
                    phase_transition: true,
                },
                holdout_iterations: 40,
                lambda_fraction: None,
            }),
        };
        let bytes = encode(&w, &frame);
        assert_eq!(bytes.len(), HEADER_LEN + frame.len() + 4 * 64);
        let back = decode(&bytes, &Limits::default()).unwrap();
        assert_eq!(back.packet, p);
        let (s, r) = back.outcome.unwrap();
        assert_eq!(s, signal);
        assert_eq!(
            (r.iterations, r.support, r.lambda, r.relative_residual),
            (77, 11, 0.25, 0.05)
        );
        assert_eq!(
            (r.stop, r.converged, r.debiased, r.fista_runs),
            (StopReason::DualityGap, true, true, 2)
        );
        assert_eq!(back.trust, w.trust);
        assert_eq!((back.solve_time_us, back.trust_time_us), (123.5, 20.0));
    }

    #[test]
    fn a_failed_window_carries_its_reason_and_bad_input_is_refused() {
        let p = packet();
        let frame = wire::encode_window_to_vec(&p, None).unwrap();
        let w = SolvedWindow {
            packet: p,
            outcome: Err("no convergence".into()),
            solve_time_us: 1.0,
            trust_time_us: 0.0,
            trust: None,
        };
        let bytes = encode(&w, &frame);
        let back = decode(&bytes, &Limits::default()).unwrap();
        assert_eq!(back.outcome.unwrap_err(), "no convergence");
        assert!(back.trust.is_none());
        assert!(decode(&bytes[..50], &Limits::default()).is_err());
        let mut wrong = bytes.clone();
        wrong[4] = 2;
        assert!(decode(&wrong, &Limits::default()).is_err());
        let mut cut = bytes;
        cut[92] = 0xFF;
        assert!(decode(&cut, &Limits::default()).is_err());
    }
}
