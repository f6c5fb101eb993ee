//! Semantic checks of window frames: every rule a structurally sound frame can still break.
//!
//! The decoder runs these on every window it parses, so a [`Packet`](super::Packet) that leaves
//! the packet stage is valid; hand-built packets (simulator, tests) go through the same rules
//! in [`Packet::new`](super::Packet::new) and the encoder.

use super::{indices, IndexCoding, Limits, Packet, RawValues, StreamId, WindowHeader};
use std::fmt;

/// The header or body field a [`ValidationError`] is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Field {
    /// `sample_rate_hz`.
    SampleRate,
    /// `window_len` (n).
    WindowLen,
    /// `hop_len`.
    HopLen,
    /// `m`, the number of samples.
    SampleCount,
    /// The index set.
    Indices,
    /// How the index set is coded.
    IndexCoding,
    /// The sample values.
    Values,
    /// `scale`.
    Scale,
    /// `adc_bits`.
    AdcBits,
    /// The physical units code.
    Units,
}

impl Field {
    /// The field's name as in the wire-format document.
    pub fn name(self) -> &'static str {
        match self {
            Field::SampleRate => "sample_rate_hz",
            Field::WindowLen => "window_len",
            Field::HopLen => "hop_len",
            Field::SampleCount => "sample_count",
            Field::Indices => "indices",
            Field::IndexCoding => "index_coding",
            Field::Values => "values",
            Field::Scale => "scale",
            Field::AdcBits => "adc_bits",
            Field::Units => "units",
        }
    }
}

impl fmt::Display for Field {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// A window frame that is well formed but breaks a rule.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{stream} capture {capture_id} seq {seq}: {field} = {value}: {rule}")]
pub struct ValidationError {
    /// The stream the frame claims to belong to.
    pub stream: StreamId,
    /// Its capture id.
    pub capture_id: u32,
    /// Its sequence number.
    pub seq: u64,
    /// The offending field.
    pub field: Field,
    /// The offending value, as text.
    pub value: String,
    /// The rule it breaks.
    pub rule: String,
}

impl ValidationError {
    /// An error about `field` of the window described by `header`.
    pub fn new(
        header: &WindowHeader,
        field: Field,
        value: impl fmt::Display,
        rule: impl Into<String>,
    ) -> ValidationError {
        ValidationError {
            stream: header.stream,
            capture_id: header.capture_id,
            seq: header.seq,
            field,
            value: value.to_string(),
            rule: rule.into(),
        }
    }
}

/// Checks the header fields alone (everything that bounds the work of decoding the body).
pub fn validate_header(h: &WindowHeader, limits: &Limits) -> Result<(), ValidationError> {
    let err = |field, value: &dyn fmt::Display, rule: String| {
        Err(ValidationError::new(h, field, value, rule))
    };
    if !(h.sample_rate_hz.is_finite() && h.sample_rate_hz > 0.0) {
        return err(
            Field::SampleRate,
            &h.sample_rate_hz,
            "must be finite and positive".into(),
        );
    }
    if h.window_len < limits.min_window_len || h.window_len > limits.max_window_len {
        return err(
            Field::WindowLen,
            &h.window_len,
            format!(
                "must be within {}..={}",
                limits.min_window_len, limits.max_window_len
            ),
        );
    }
    if h.hop_len == 0 || h.hop_len > h.window_len {
        return err(
            Field::HopLen,
            &h.hop_len,
            format!("must be within 1..=window_len ({})", h.window_len),
        );
    }
    if !(h.scale.is_finite() && h.scale != 0.0) {
        return err(Field::Scale, &h.scale, "must be finite and non-zero".into());
    }
    if !(1..=24).contains(&h.adc_bits) {
        return err(Field::AdcBits, &h.adc_bits, "must be within 1..=24".into());
    }
    Ok(())
}

/// Checks `1 <= m <= n`.
pub fn check_sample_count(h: &WindowHeader, m: u32) -> Result<(), ValidationError> {
    if m == 0 || m > h.window_len {
        return Err(ValidationError::new(
            h,
            Field::SampleCount,
            m,
            format!("must be within 1..=window_len ({})", h.window_len),
        ));
    }
    Ok(())
}

/// Checks a whole packet. For a seeded index set this regenerates the indices (O(n)) and
/// compares, so hand-built packets cannot claim a seed they do not match.
pub fn validate(p: &Packet, limits: &Limits) -> Result<(), ValidationError> {
    validate_body(p, limits, true)
}

/// As [`validate`]; `check_seeded` is off in the decoder, whose indices come from the seed.
pub(crate) fn validate_body(
    p: &Packet,
    limits: &Limits,
    check_seeded: bool,
) -> Result<(), ValidationError> {
    let h = &p.header;
    validate_header(h, limits)?;
    let m = u32::try_from(p.indices.len()).unwrap_or(u32::MAX);
    check_sample_count(h, m)?;
    if p.raw.len() != p.indices.len() || p.values.len() != p.indices.len() {
        return Err(ValidationError::new(
            h,
            Field::Values,
            format!("{} raw, {} scaled", p.raw.len(), p.values.len()),
            format!("need one value per index ({m})"),
        ));
    }
    for (k, w) in p.indices.windows(2).enumerate() {
        if w[1] <= w[0] {
            return Err(ValidationError::new(
                h,
                Field::Indices,
                format!("{} after {} at position {}", w[1], w[0], k + 1),
                "must be strictly increasing (sorted, no repeats)",
            ));
        }
    }
    if let Some(&last) = p.indices.last() {
        if last >= h.window_len {
            return Err(ValidationError::new(
                h,
                Field::Indices,
                last,
                format!("must be below window_len ({})", h.window_len),
            ));
        }
    }
    if let IndexCoding::Seeded { seed } = p.index_coding {
        if check_seeded && p.indices != indices::sample_indices(seed, h.window_len, m) {
            return Err(ValidationError::new(
                h,
                Field::Indices,
                format!("seed {seed}"),
                "do not match the set the seed generates",
            ));
        }
    }
    match &p.raw {
        RawValues::I16(counts) if h.adc_bits <= 16 => {
            let hi = (1i32 << (h.adc_bits - 1)) - 1;
            let lo = -(1i32 << (h.adc_bits - 1));
            if let Some((k, &c)) = counts
                .iter()
                .enumerate()
                .find(|(_, &c)| !(lo..=hi).contains(&i32::from(c)))
            {
                return Err(ValidationError::new(
                    h,
                    Field::Values,
                    format!("{c} at position {k}"),
                    format!("count outside the {}-bit ADC range {lo}..={hi}", h.adc_bits),
                ));
            }
        }
        RawValues::F32(xs) => {
            if let Some((k, x)) = xs.iter().enumerate().find(|(_, x)| !x.is_finite()) {
                return Err(ValidationError::new(
                    h,
                    Field::Values,
                    format!("{x} at position {k}"),
                    "must be finite",
                ));
            }
        }
        RawValues::I16(_) => {}
    }
    if let Some((k, x)) = p.values.iter().enumerate().find(|(_, x)| !x.is_finite()) {
        return Err(ValidationError::new(
            h,
            Field::Values,
            format!("{x} at position {k} after scaling"),
            "must be finite",
        ));
    }
    Ok(())
}
