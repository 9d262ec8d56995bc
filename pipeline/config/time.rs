//! Date-times as written in study files, capture lists and reference logs.
//! An offset from UTC is required: a bare local time cannot be placed on the
//! same axis as an oximeter that logs in another zone.

use chrono::{DateTime, FixedOffset, NaiveDateTime};

use super::ValueError;

/// Parses an ISO 8601 / RFC 3339 date-time with a UTC offset (`Z` allowed),
/// with `T` or a space between date and time and optional fractional seconds.
pub(crate) fn parse_time(text: &str) -> Result<DateTime<FixedOffset>, ValueError> {
    let t = text.trim();
    let normalised = if t.len() > 10 && t.as_bytes()[10] == b' ' {
        let mut s = t.to_string();
        s.replace_range(10..11, "T");
        s
    } else {
        t.to_string()
    };
    if let Ok(v) = DateTime::parse_from_rfc3339(&normalised) {
        return Ok(v);
    }
    // Offsets written without a colon (`+0100`).
    if let Ok(v) = DateTime::parse_from_str(&normalised, "%Y-%m-%dT%H:%M:%S%.f%z") {
        return Ok(v);
    }
    if NaiveDateTime::parse_from_str(&normalised, "%Y-%m-%dT%H:%M:%S%.f").is_ok() {
        return Err(ValueError(format!("`{t}` has no UTC offset")));
    }
    Err(ValueError(format!("`{t}` is not a date-time")))
}

/// Seconds from `a` to `b` (positive when `b` is later), to the microsecond.
pub(crate) fn seconds_between(a: &DateTime<FixedOffset>, b: &DateTime<FixedOffset>) -> f64 {
    let d = b.signed_duration_since(*a);
    d.num_microseconds()
        .map(|us| us as f64 * 1e-6)
        .unwrap_or_else(|| d.num_milliseconds() as f64 * 1e-3)
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;

    #[test]
    fn accepts_offsets_and_separators() {
        let a = parse_time("2026-03-04T09:15:00+01:00").unwrap();
        let b = parse_time("2026-03-04 08:15:00Z").unwrap();
        let c = parse_time("2026-03-04T03:15:00.5-0500").unwrap();
        assert_eq!(seconds_between(&a, &b), 0.0);
        assert_eq!(seconds_between(&a, &c), 0.5);
    }

    #[test]
    fn refuses_times_without_offset() {
        assert_eq!(
            parse_time("2026-03-04T09:15:00"),
            Err(ValueError("`2026-03-04T09:15:00` has no UTC offset".into()))
        );
        assert_eq!(
            parse_time("yesterday"),
            Err(ValueError("`yesterday` is not a date-time".into()))
        );
    }
}
