//! Sampling planner: how many random samples per window a node must send.
//!
//! Pure computation, no I/O; `csgate plan` is its thin front end. Given a window length `n`
//! and a sparsity `k` (stated, or measured from a record as the best-k count holding a chosen
//! share of each window's energy), [`plan`] returns the minimum `m` per window from the L1 phase
//! transition, the compression ratio, the radio payload per node for every index and value
//! encoding of the wire format (sizes from [`crate::packet::wire::encoded_window_len`], the
//! encoder's own arithmetic), and the coherence of random time samples with the basis.
//!
//! The phase transition is the statistical dimension of the L1 descent cone (Amelunxen, Lotz,
//! McCoy & Tropp, "Living on the edge: phase transitions in convex programs with random data",
//! Information and Inference, 2014): noise-free basis pursuit with a Gaussian `m x n` matrix
//! succeeds with probability about 1/2 at `m = n psi(k/n)`. Random time samples of a DCT- or
//! Fourier-sparse signal follow the same curve empirically (Donoho & Tanner, Phil. Trans. R.
//! Soc. A, 2009); real vibration windows are compressible and noisy, so `m` is a lower bound
//! and the margin is there to be used.

use crate::basis::{plan_basis, BasisError, BasisKind, BasisScratch};
use crate::packet::wire::encoded_window_len;
use crate::packet::{IndexCoding, Packet, RawValues, StreamId, Units, WindowHeader};
use serde::Serialize;

/// Coherence above which [`Plan::coherence_warning`] is set. Own choice: DCT and Fourier sit
/// at sqrt(2) and 1, periodized Daubechies bases at 10..14 for n = 256 (CHECK-VALUES 6.4), so
/// any threshold between leaves the two families apart.
pub const COHERENCE_WARN: f64 = 3.0;

/// Largest `n` for which [`coherence`] is computed (it costs `n` syntheses of length `n`).
pub const COHERENCE_MAX_N: usize = 1 << 14;

/// Bad planner input.
#[derive(Debug, thiserror::Error)]
pub enum PlanError {
    /// Sparsity outside `1..n` (or a fraction outside `(0, 1)`).
    #[error("sparsity {k} is not usable for window length {n}: expected 1 <= k < n")]
    BadSparsity {
        /// The sparsity given or measured.
        k: f64,
        /// Window length.
        n: usize,
    },
    /// Negative or non-finite margin.
    #[error(
        "margin {0} is not usable: expected a finite fraction >= 0 (0.25 = 25% above the edge)"
    )]
    BadMargin(f64),
    /// The basis cannot be planned at this length.
    #[error("basis {kind} cannot be used at window length {n}")]
    Basis {
        /// Basis kind.
        kind: BasisKind,
        /// Window length.
        n: usize,
        /// Why.
        source: BasisError,
    },
    /// A record too short for one window.
    #[error("{len} samples hold no whole window of {n}")]
    TooShort {
        /// Samples given.
        len: usize,
        /// Window length.
        n: usize,
    },
}

/// Standard normal density.
fn normal_pdf(t: f64) -> f64 {
    (-0.5 * t * t).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

/// Upper tail `Q(t) = 1 - Phi(t)`, through `libm::erfc` (a port of the musl/FreeBSD erfc,
/// accurate to about 1 ulp) rather than a hand-written approximation.
fn normal_tail(t: f64) -> f64 {
    0.5 * libm::erfc(t / std::f64::consts::SQRT_2)
}

/// The optimal threshold `tau*` of [`psi`]: the root of
/// `rho tau = 2 (1 - rho) (phi(tau) - tau Q(tau))` (Amelunxen et al. 2014; CHECK-VALUES 6.1).
///
/// The right side minus the left is strictly decreasing in `tau` (its derivative is
/// `-2(1-rho)Q(tau) - rho < 0`), positive at 0 and negative for large `tau`, so bisection on
/// `[0, 40]` finds the unique root. Returns `None` unless `0 < rho < 1`.
pub fn optimal_tau(rho: f64) -> Option<f64> {
    if !(rho > 0.0 && rho < 1.0) {
        return None;
    }
    let g = |t: f64| 2.0 * (1.0 - rho) * (normal_pdf(t) - t * normal_tail(t)) - rho * t;
    let (mut lo, mut hi) = (0.0_f64, 40.0_f64);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if g(mid) > 0.0 {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-15 {
            break;
        }
    }
    Some(0.5 * (lo + hi))
}

/// The normalised statistical dimension of the L1 descent cone at a `k`-sparse point,
/// `psi(rho)` with `rho = k/n`:
///
/// `psi(rho) = inf_tau [ rho (1 + tau^2) + (1 - rho) 2 ((1 + tau^2) Q(tau) - tau phi(tau)) ]`
///
/// (Amelunxen, Lotz, McCoy & Tropp 2014; the closed form of the Gaussian integral as in
/// CHECK-VALUES 6.1). Basis pursuit succeeds with probability about 1/2 at `m = n psi(rho)`.
/// Returns `None` unless `0 < rho < 1`.
pub fn psi(rho: f64) -> Option<f64> {
    let tau = optimal_tau(rho)?;
    let t2 = 1.0 + tau * tau;
    Some(rho * t2 + (1.0 - rho) * 2.0 * (t2 * normal_tail(tau) - tau * normal_pdf(tau)))
}

/// Mutual coherence `mu = sqrt(n) max_{i,j} |<e_i, psi_j>|` between time samples and the basis,
/// from 1 (ideal) to `sqrt(n)`; lower is better for random time sampling (CHECK-VALUES 6.4).
/// Computed exactly by synthesizing every basis vector.
pub fn coherence(kind: BasisKind, n: usize) -> Result<f64, PlanError> {
    let basis =
        plan_basis::<f64>(kind, n).map_err(|source| PlanError::Basis { kind, n, source })?;
    let mut scratch = BasisScratch::new();
    let mut buf = vec![0.0_f64; n];
    let mut max_abs = 0.0_f64;
    for j in 0..n {
        buf.iter_mut().for_each(|v| *v = 0.0);
        buf[j] = 1.0;
        basis.synthesize(&mut buf, &mut scratch);
        max_abs = buf.iter().fold(max_abs, |a, v| a.max(v.abs()));
    }
    Ok((n as f64).sqrt() * max_abs)
}

/// Sparsity measured from a signal: per whole window (hop = n), the least number of basis
/// coefficients holding `energy_fraction` of the window's energy.
#[derive(Debug, Clone, Serialize)]
pub struct MeasuredSparsity {
    /// Windows measured (all-zero windows are skipped).
    pub windows: usize,
    /// Median best-k over the windows.
    pub k_median: usize,
    /// 90th percentile (nearest rank) of best-k: the value the planner uses, so that most
    /// windows fit.
    pub k_p90: usize,
    /// Largest best-k.
    pub k_max: usize,
    /// The energy share asked for.
    pub energy_fraction: f64,
}

/// Measures [`MeasuredSparsity`] of `samples` in `kind` at window length `n`. Non-finite
/// samples (gaps written as NaN) make their window skipped.
pub fn measure_sparsity(
    samples: &[f32],
    kind: BasisKind,
    n: usize,
    energy_fraction: f64,
) -> Result<MeasuredSparsity, PlanError> {
    let basis =
        plan_basis::<f64>(kind, n).map_err(|source| PlanError::Basis { kind, n, source })?;
    if samples.len() < n {
        return Err(PlanError::TooShort {
            len: samples.len(),
            n,
        });
    }
    let mut scratch = BasisScratch::new();
    let mut buf = vec![0.0_f64; n];
    let mut ks = Vec::new();
    for chunk in samples.chunks_exact(n) {
        if chunk.iter().any(|v| !v.is_finite()) {
            continue;
        }
        buf.iter_mut()
            .zip(chunk)
            .for_each(|(b, &v)| *b = f64::from(v));
        basis.analyze(&mut buf, &mut scratch);
        let mut energy: Vec<f64> = buf.iter().map(|c| c * c).collect();
        let total: f64 = energy.iter().sum();
        if total <= 0.0 {
            continue;
        }
        energy.sort_by(|a, b| b.total_cmp(a));
        let mut acc = 0.0;
        let mut k = n;
        for (i, e) in energy.iter().enumerate() {
            acc += e;
            if acc >= energy_fraction * total {
                k = i + 1;
                break;
            }
        }
        ks.push(k);
    }
    if ks.is_empty() {
        return Err(PlanError::TooShort {
            len: samples.len(),
            n,
        });
    }
    ks.sort_unstable();
    let rank = |q: f64| ks[((q * ks.len() as f64).ceil() as usize).clamp(1, ks.len()) - 1];
    Ok(MeasuredSparsity {
        windows: ks.len(),
        k_median: rank(0.5),
        k_p90: rank(0.9),
        k_max: *ks.last().unwrap_or(&n),
        energy_fraction,
    })
}

/// What to plan for.
#[derive(Debug, Clone)]
pub struct PlanRequest {
    /// Window length `n`.
    pub n: usize,
    /// Sparsity `k` (non-zero coefficients per window).
    pub k: usize,
    /// Fraction added above the 50% edge: `m = ceil(n psi(k/n) (1 + margin))`. 0 = the edge.
    pub margin: f64,
    /// Sparsity basis.
    pub basis: BasisKind,
    /// Sample rate of the ADC grid, Hz.
    pub sample_rate_hz: f64,
    /// Hop between window starts, in samples (`n` for no overlap).
    pub hop_len: usize,
    /// Whether frames carry the 16-byte authentication tag.
    pub authenticated: bool,
}

/// Radio payload of one index/value encoding.
#[derive(Debug, Clone, Serialize)]
pub struct EncodingCost {
    /// Index coding: "delta-varint", "bitmap" or "seeded".
    pub index_coding: &'static str,
    /// Value type: "i16" or "f32".
    pub values: &'static str,
    /// Bytes of one window frame, header and CRC included.
    pub frame_bytes: usize,
    /// Bytes per second per stream (frames per second times frame bytes).
    pub bytes_per_s: f64,
}

/// The planner's answer.
#[derive(Debug, Clone, Serialize)]
pub struct Plan {
    /// Window length.
    pub n: usize,
    /// Sparsity planned for.
    pub k: usize,
    /// `k / n`.
    pub rho: f64,
    /// `psi(rho)`: `m/n` at the 50% edge.
    pub psi: f64,
    /// `n psi(rho)`, unrounded.
    pub m_edge: f64,
    /// The margin applied.
    pub margin: f64,
    /// Samples per window to send: `ceil(m_edge (1 + margin))`, at most `n`.
    pub m: usize,
    /// `n / m`.
    pub compression_ratio: f64,
    /// Basis, as spelled on the command line.
    pub basis: String,
    /// Coherence of time samples with the basis (`None` above [`COHERENCE_MAX_N`]).
    pub coherence: Option<f64>,
    /// Set when the coherence exceeds [`COHERENCE_WARN`]: the phase transition then does not
    /// apply to random point samples and `m` is too optimistic.
    pub coherence_warning: bool,
    /// Window frames per second per stream (`sample_rate_hz / hop_len`).
    pub frames_per_s: f64,
    /// Payload for each encoding of wire format v1, smallest first.
    pub encodings: Vec<EncodingCost>,
}

/// Plans `m` for a request; see the module docs.
pub fn plan(req: &PlanRequest) -> Result<Plan, PlanError> {
    let n = req.n;
    if req.k == 0 || req.k >= n {
        return Err(PlanError::BadSparsity { k: req.k as f64, n });
    }
    if !(req.margin.is_finite() && req.margin >= 0.0) {
        return Err(PlanError::BadMargin(req.margin));
    }
    // Plan the basis first so that an invalid length is reported as such.
    plan_basis::<f64>(req.basis, n).map_err(|source| PlanError::Basis {
        kind: req.basis,
        n,
        source,
    })?;
    let rho = req.k as f64 / n as f64;
    let psi_rho = psi(rho).ok_or(PlanError::BadSparsity { k: req.k as f64, n })?;
    let m_edge = n as f64 * psi_rho;
    let m = ((m_edge * (1.0 + req.margin)).ceil() as usize).clamp(1, n);
    let coherence = if n <= COHERENCE_MAX_N {
        Some(coherence(req.basis, n)?)
    } else {
        None
    };
    let frames_per_s = req.sample_rate_hz / req.hop_len.max(1) as f64;
    let encodings = encoding_costs(n, m, req.authenticated, frames_per_s);
    Ok(Plan {
        n,
        k: req.k,
        rho,
        psi: psi_rho,
        m_edge,
        margin: req.margin,
        m,
        compression_ratio: n as f64 / m as f64,
        basis: req.basis.to_string(),
        coherence,
        coherence_warning: coherence.is_some_and(|mu| mu > COHERENCE_WARN),
        frames_per_s,
        encodings,
    })
}

/// Frame sizes of a window of `m` of `n` samples in every coding, computed by the encoder's own
/// length function on a real packet (seeded indices, so the varint size is a typical one).
fn encoding_costs(n: usize, m: usize, authenticated: bool, frames_per_s: f64) -> Vec<EncodingCost> {
    let indices = crate::packet::indices::sample_indices(0x5eed, n as u32, m as u32);
    let header = WindowHeader {
        stream: StreamId {
            node: 1,
            channel: 0,
        },
        capture_id: 1,
        seq: 0,
        sample_rate_hz: 1.0,
        window_len: n as u32,
        hop_len: n as u32,
        t0_us: 0,
        units: Units::Counts,
        scale: 1.0,
        adc_bits: 16,
    };
    let codings: [(&'static str, IndexCoding); 3] = [
        ("delta-varint", IndexCoding::DeltaVarint),
        ("bitmap", IndexCoding::Bitmap),
        ("seeded", IndexCoding::Seeded { seed: 0x5eed }),
    ];
    let mut out = Vec::new();
    for (name, coding) in codings {
        for (vname, raw) in [
            ("i16", RawValues::I16(vec![0; m])),
            ("f32", RawValues::F32(vec![0.0; m])),
        ] {
            let packet = Packet {
                header,
                index_coding: coding,
                indices: indices.clone(),
                values: vec![0.0; m],
                raw,
                auth_tag: None,
            };
            let frame_bytes = encoded_window_len(&packet, authenticated);
            out.push(EncodingCost {
                index_coding: name,
                values: vname,
                frame_bytes,
                bytes_per_s: frame_bytes as f64 * frames_per_s,
            });
        }
    }
    out.sort_by_key(|c| c.frame_bytes);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn psi_edges() {
        assert!(psi(0.0).is_none() && psi(1.0).is_none());
        // psi rises from 0 to 1 (common practice: the statistical dimension is at most n).
        let a = psi(0.01).unwrap();
        let b = psi(0.5).unwrap();
        assert!(0.0 < a && a < b && b < 1.0);
    }
}
