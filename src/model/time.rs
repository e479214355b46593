//! Reading times: seconds (a JSON number) or RFC 3339 timestamps. Differences between
//! timestamps are taken in whole nanoseconds so that a run split into requests sees
//! exactly the same steps as one run.

use time::format_description::well_known::Rfc3339;
use time::OffsetDateTime;

/// Which form a request's times take (responses echo it).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeMode {
    /// Plain seconds.
    Seconds,
    /// RFC 3339 timestamps; `t` in formulas is Unix time in seconds.
    Stamp,
}

/// One point in time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Instant {
    /// Seconds (plain mode) or Unix seconds (timestamp mode): the value of `t` in formulas.
    pub secs: f64,
    /// Unix nanoseconds in timestamp mode (0 in plain mode).
    pub nanos: i128,
}

impl Instant {
    /// A plain-seconds instant.
    pub fn seconds(secs: f64) -> Self {
        Self { secs, nanos: 0 }
    }

    /// A timestamp instant from Unix nanoseconds.
    pub fn from_nanos(nanos: i128) -> Self {
        Self {
            secs: nanos as f64 * 1e-9,
            nanos,
        }
    }

    /// Parse an RFC 3339 timestamp.
    pub fn parse_rfc3339(s: &str) -> Result<Self, String> {
        OffsetDateTime::parse(s, &Rfc3339)
            .map(|d| Self::from_nanos(d.unix_timestamp_nanos()))
            .map_err(|e| format!("not an RFC 3339 timestamp ({e})"))
    }

    /// Seconds from `self` to `later` (negative when `later` is earlier).
    pub fn until(&self, later: &Instant, mode: TimeMode) -> f64 {
        match mode {
            TimeMode::Seconds => later.secs - self.secs,
            TimeMode::Stamp => (later.nanos - self.nanos) as f64 * 1e-9,
        }
    }

    /// Whether `later` is strictly before `self`.
    pub fn is_after(&self, later: &Instant, mode: TimeMode) -> bool {
        match mode {
            TimeMode::Seconds => later.secs < self.secs,
            TimeMode::Stamp => later.nanos < self.nanos,
        }
    }

    /// Format as RFC 3339 (UTC, nanoseconds when needed).
    pub fn to_rfc3339(&self) -> String {
        OffsetDateTime::from_unix_timestamp_nanos(self.nanos)
            .ok()
            .and_then(|d| d.format(&Rfc3339).ok())
            .unwrap_or_else(|| "1970-01-01T00:00:00Z".to_string())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn timestamp_differences_are_exact_in_nanoseconds() {
        let a = Instant::parse_rfc3339("2026-03-01T10:00:00.1Z").unwrap();
        let b = Instant::parse_rfc3339("2026-03-01T10:00:00.35Z").unwrap();
        assert_eq!(a.until(&b, TimeMode::Stamp), 0.25);
        let c = Instant::parse_rfc3339("2026-03-01T11:00:00.35+01:00").unwrap();
        assert_eq!(b.nanos, c.nanos, "offsets are applied (RFC 3339 §5.6)");
        assert_eq!(
            Instant::from_nanos(b.nanos).to_rfc3339(),
            "2026-03-01T10:00:00.35Z"
        );
    }

    #[test]
    fn bad_timestamp_is_an_error_not_a_panic() {
        assert!(Instant::parse_rfc3339("yesterday").is_err());
        assert!(Instant::parse_rfc3339("2026-13-01T00:00:00Z").is_err());
    }
}
