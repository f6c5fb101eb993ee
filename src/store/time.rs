//! Time formatting shared by the writer, the sink and the index.

use chrono::{DateTime, Utc};

/// Name of the record index in a record folder.
pub const INDEX_FILE: &str = "index.json";

/// Formats Unix nanoseconds as ISO-8601 UTC with microseconds, e.g.
/// `2026-12-01T12:00:00.000000Z`. Out-of-range values format as the Unix epoch.
pub fn iso8601_utc(unix_ns: i64) -> String {
    let dt = DateTime::<Utc>::from_timestamp(
        unix_ns.div_euclid(1_000_000_000),
        unix_ns.rem_euclid(1_000_000_000) as u32,
    )
    .unwrap_or_default();
    dt.format("%Y-%m-%dT%H:%M:%S%.6fZ").to_string()
}

/// Compact UTC timestamp for file names, e.g. `20261201T120000Z`.
pub(crate) fn file_stamp(unix_ns: i64) -> String {
    let dt =
        DateTime::<Utc>::from_timestamp(unix_ns.div_euclid(1_000_000_000), 0).unwrap_or_default();
    dt.format("%Y%m%dT%H%M%SZ").to_string()
}

/// Current time in Unix nanoseconds.
pub(crate) fn now_unix_ns() -> i64 {
    Utc::now().timestamp_nanos_opt().unwrap_or(0)
}

/// Time of grid position `k` samples after `t0_unix_ns` at `sample_rate_hz`, rounded to the
/// nearest nanosecond. Computed from the origin every time, so no rounding accumulates.
pub(crate) fn grid_time(t0_unix_ns: i64, k: u64, sample_rate_hz: f64) -> i64 {
    t0_unix_ns + ((k as f64) * 1e9 / sample_rate_hz).round() as i64
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn iso8601_has_microseconds_and_z() {
        // 2026-12-01T12:00:00Z is 1796126400 s after the epoch (date -u -d ... +%s).
        assert_eq!(
            iso8601_utc(1_796_126_400_000_000_000),
            "2026-12-01T12:00:00.000000Z"
        );
        assert_eq!(iso8601_utc(1_500), "1970-01-01T00:00:00.000001Z");
        assert_eq!(file_stamp(1_796_126_400_000_000_000), "20261201T120000Z");
    }
}
