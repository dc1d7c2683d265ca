//! Times on the command line: read as RFC 3339 dates and times, a plain date (midnight UTC), a span back from now
//! (`7d`, `12h`), or milliseconds since the Unix epoch; printed as ISO 8601 in UTC.

use time::format_description::well_known::Rfc3339;
use time::macros::format_description;
use time::{Date, OffsetDateTime, UtcOffset};

/// Reads an instant for `--from` / `--to`: `2026-12-01T08:30:00Z` (any RFC 3339 offset), `2026-12-01` (midnight
/// UTC), or milliseconds since the Unix epoch. Returns milliseconds since the Unix epoch.
pub fn instant(text: &str) -> Result<i64, String> {
    let text = text.trim();
    if !text.is_empty() && text.bytes().all(|b| b.is_ascii_digit()) {
        return text
            .parse()
            .map_err(|_| format!("`{text}` is too large for milliseconds since the Unix epoch"));
    }
    if let Ok(t) = OffsetDateTime::parse(text, &Rfc3339) {
        return Ok(millis(t));
    }
    if let Ok(d) = Date::parse(text, format_description!("[year]-[month]-[day]")) {
        return Ok(millis(d.midnight().assume_utc()));
    }
    Err(format!(
        "`{text}` is not a time: give an RFC 3339 time such as 2026-12-01T08:30:00Z, a date such as 2026-12-01 \
         (midnight UTC), or milliseconds since the Unix epoch"
    ))
}

/// Reads a span back from now for `--since`: a whole number and a unit (`ms`, `s`, `m`, `h`, `d`), such as `7d`.
pub fn span_ms(text: &str) -> Result<i64, String> {
    probity::store::config::parse_duration(text)
        .and_then(|d| i64::try_from(d.as_millis()).ok())
        .ok_or_else(|| format!("`{text}` is not a span: give a whole number and a unit (ms, s, m, h, d) such as 7d"))
}

/// The start of a range from `--from` or `--since` (given `now_ms`); clap keeps the two apart.
pub fn range_start(from: Option<i64>, since: Option<i64>, now_ms: i64) -> Option<i64> {
    from.or(since.map(|s| now_ms.saturating_sub(s)))
}

/// Milliseconds since the Unix epoch, now.
pub fn now_ms() -> i64 {
    millis(OffsetDateTime::now_utc())
}

fn millis(t: OffsetDateTime) -> i64 {
    i64::try_from(t.unix_timestamp_nanos() / 1_000_000).unwrap_or(i64::MAX)
}

/// `2026-12-01T08:30:00.123Z`: ISO 8601 in UTC, to the millisecond; the raw number where it is out of range.
pub fn iso(ms: i64) -> String {
    let format =
        format_description!("[year]-[month]-[day]T[hour]:[minute]:[second].[subsecond digits:3]Z");
    OffsetDateTime::from_unix_timestamp_nanos(i128::from(ms) * 1_000_000)
        .ok()
        .map(|t| t.to_offset(UtcOffset::UTC))
        .and_then(|t| t.format(&format).ok())
        .unwrap_or_else(|| ms.to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reads_rfc3339_dates_spans_and_milliseconds() {
        // 2026-12-01T00:00:00Z is 1,796,083,200 s after the epoch (20,423 days of 86,400 s; date arithmetic).
        assert_eq!(instant("2026-12-01"), Ok(1_796_083_200_000));
        assert_eq!(instant("2026-12-01T00:00:00Z"), Ok(1_796_083_200_000));
        assert_eq!(instant("2026-12-01T01:00:00+01:00"), Ok(1_796_083_200_000));
        assert_eq!(instant("2026-12-01T00:00:00.250Z"), Ok(1_796_083_200_250));
        assert_eq!(instant("1796083200000"), Ok(1_796_083_200_000));
        assert!(instant("yesterday").unwrap_err().contains("RFC 3339"));
        assert!(instant("2026-13-01").is_err());
        assert_eq!(span_ms("7d"), Ok(7 * 86_400_000));
        assert!(span_ms("7 days").unwrap_err().contains("7d"));
        assert_eq!(range_start(None, Some(1_000), 5_000), Some(4_000));
        assert_eq!(range_start(Some(7), None, 5_000), Some(7));
    }

    #[test]
    fn prints_iso_8601_utc() {
        assert_eq!(iso(1_796_083_200_250), "2026-12-01T00:00:00.250Z");
        assert_eq!(iso(0), "1970-01-01T00:00:00.000Z");
        assert_eq!(instant(&iso(1_796_307_786_681)), Ok(1_796_307_786_681));
    }
}
