//! Event times: RFC 3339 strings or integer Unix seconds in, RFC 3339 out.

use time::format_description::well_known::Rfc3339;
use time::OffsetDateTime;

use crate::event::UnixNanos;

/// Nanoseconds in a millisecond: record timestamps and latencies are in milliseconds.
pub const NANOS_PER_MILLI: i64 = 1_000_000;

/// Nanoseconds in a second.
pub const NANOS_PER_SECOND: i64 = 1_000_000_000;

/// Parses RFC 3339 (`2026-05-01T10:00:00Z`, any offset, optional fraction) or a string of
/// integer Unix seconds. Returns `None` for anything else or for times outside the range
/// a signed 64-bit nanosecond count can hold (years 1678–2261).
pub fn parse_event_time(text: &str) -> Option<UnixNanos> {
    let text = text.trim();
    if !text.is_empty()
        && text
            .bytes()
            .enumerate()
            .all(|(i, b)| b.is_ascii_digit() || (i == 0 && b == b'-'))
    {
        return text.parse::<i64>().ok().and_then(unix_seconds_to_nanos);
    }
    let parsed = OffsetDateTime::parse(text, &Rfc3339).ok()?;
    i64::try_from(parsed.unix_timestamp_nanos()).ok().map(UnixNanos)
}

/// Converts integer Unix seconds, refusing values outside the nanosecond range.
pub fn unix_seconds_to_nanos(seconds: i64) -> Option<UnixNanos> {
    seconds.checked_mul(NANOS_PER_SECOND).map(UnixNanos)
}

/// Formats as RFC 3339 in UTC, e.g. `2026-05-01T10:00:00Z`.
pub fn format_rfc3339(at: UnixNanos) -> String {
    OffsetDateTime::from_unix_timestamp_nanos(i128::from(at.0))
        .ok()
        .and_then(|t| t.format(&Rfc3339).ok())
        .unwrap_or_else(|| format!("@{}ns", at.0))
}

/// Wall-clock now, in the same unit as event times.
pub fn now_nanos() -> UnixNanos {
    UnixNanos(i64::try_from(OffsetDateTime::now_utc().unix_timestamp_nanos()).unwrap_or(i64::MAX))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rfc3339_with_offset_and_fraction() {
        // 2026-05-01T12:00:00+02:00 is 10:00 UTC: 1777629600 s (computed with `date -d`).
        assert_eq!(
            parse_event_time("2026-05-01T12:00:00.5+02:00"),
            Some(UnixNanos(1_777_629_600_500_000_000))
        );
        assert_eq!(
            format_rfc3339(UnixNanos(1_777_629_600_000_000_000)),
            "2026-05-01T10:00:00Z"
        );
    }

    #[test]
    fn integer_seconds_and_garbage() {
        assert_eq!(
            parse_event_time("874965758"),
            Some(UnixNanos(874_965_758_000_000_000))
        );
        assert_eq!(parse_event_time("yesterday"), None);
        assert_eq!(parse_event_time("2026-13-01T00:00:00Z"), None);
        assert_eq!(parse_event_time("99999999999999"), None);
        assert_eq!(parse_event_time(""), None);
    }
}
