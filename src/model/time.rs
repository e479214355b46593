//! Reading times: seconds (a JSON number) or timestamps: RFC 3339 strings with their UTC
//! offset, or wall-clock times without one, read in the request's `time_zone` (the usual
//! historian export). Differences between timestamps are taken in whole nanoseconds so
//! that a run split into requests sees exactly the same steps as one run. Each timestamp
//! keeps the offset and the form it was written in, so answers echo every time the way
//! the request wrote it.
//!
//! The reader and writer of timestamps are plain byte code (a stream reads about a
//! million lines a second, each with a time): no allocation, dates by the days-from-civil
//! algorithm (H. Hinnant, "chrono-Compatible Low-Level Date Algorithms", common
//! practice). Zone rules come from the IANA tz database compiled into `jiff`, so an
//! answer does not depend on the machine's own zone files.

use jiff::civil::DateTime;
use jiff::tz::{AmbiguousOffset, Offset, TimeZone};
use jiff::Timestamp;

/// Nanoseconds per second.
const NS: i128 = 1_000_000_000;
/// Nanoseconds per day (no leap seconds: Unix time, RFC 3339 §5.6 aside).
const DAY_NS: i128 = 86_400 * NS;

/// Which form a request's times take (responses echo it).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeMode {
    /// Plain seconds.
    Seconds,
    /// Timestamps (strings); `t` in formulas is Unix time in seconds.
    Stamp,
}

/// How a timestamp's offset was written, so that the answer writes it the same way.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Suffix {
    /// `Z` (or `z`): UTC.
    Z,
    /// A numeric offset `+hh:mm` or `-hh:mm` (held in [`Instant::offset`]).
    Offset,
    /// `-00:00`: the time is in UTC and the local offset is unknown (RFC 3339 §4.3).
    UnknownOffset,
    /// No offset: a wall-clock time read in the request's `time_zone`;
    /// [`Instant::offset`] is that zone's offset at this instant.
    Local,
}

/// One point in time, with the form it was written in.
///
/// Small and `Copy`: every parsed line holds one. Two instants are equal when they are
/// the same point in time, whatever offset or form each was written with
/// (`06:00:10+01:00` equals `05:00:10Z`).
#[derive(Debug, Clone, Copy)]
pub struct Instant {
    /// Seconds (plain mode) or Unix seconds (timestamp mode): the value of `t` in formulas.
    pub secs: f64,
    /// Unix nanoseconds in timestamp mode (0 in plain mode).
    pub nanos: i128,
    /// Seconds east of UTC of the wall clock the time was written in (0 for `Z`).
    pub offset: i32,
    /// How the offset was written.
    pub suffix: Suffix,
    /// Whether a space rather than `T` separated date and time (RFC 3339 §5.6, note).
    pub spaced: bool,
}

// An `Instant` sits in every parsed line and every stored estimate: the offset and the
// form must fit in the padding beside the 16-byte-aligned nanoseconds.
const _: () = assert!(std::mem::size_of::<Instant>() <= 32);

impl PartialEq for Instant {
    fn eq(&self, other: &Self) -> bool {
        // As the derived comparison was before offsets were kept: the same seconds (0.0
        // and -0.0 alike) and the same nanoseconds.
        self.nanos == other.nanos && self.secs == other.secs
    }
}

impl Instant {
    /// A plain-seconds instant.
    pub fn seconds(secs: f64) -> Self {
        Self {
            secs,
            nanos: 0,
            offset: 0,
            suffix: Suffix::Z,
            spaced: false,
        }
    }

    /// A timestamp instant from Unix nanoseconds, written in UTC (`Z`).
    pub fn from_nanos(nanos: i128) -> Self {
        Self {
            secs: nanos as f64 * 1e-9,
            nanos,
            offset: 0,
            suffix: Suffix::Z,
            spaced: false,
        }
    }

    /// The timestamp `nanos` (Unix nanoseconds) written like `self`: the same offset and
    /// separator, or for a wall-clock time, `zone`'s offset at that instant (a grid of
    /// times may cross a daylight-saving change).
    pub fn written_like(&self, nanos: i128, zone: &Zone) -> Self {
        let offset = match self.suffix {
            Suffix::Local => zone.offset_at(nanos).unwrap_or(self.offset),
            _ => self.offset,
        };
        Self { offset, ..*self }.with_nanos(nanos)
    }

    fn with_nanos(self, nanos: i128) -> Self {
        Self {
            secs: nanos as f64 * 1e-9,
            nanos,
            ..self
        }
    }

    /// Parse a timestamp: RFC 3339 (`2026-03-01T06:00:10.25+01:00`, a space instead of
    /// `T` allowed, RFC 3339 §5.6 note), or without an offset (`2026-03-01 06:00:10`)
    /// when `zone` names a time zone to read it in. In a daylight-saving gap the local
    /// time does not exist (an error); in a fold (the repeated hour in autumn) the
    /// earlier of the two instants is taken. A leap second (`23:59:60` at the end of a
    /// UTC month) is read as the nanosecond before the next minute. Digits beyond
    /// nanoseconds are dropped.
    pub fn parse_stamp(s: &str, zone: &Zone) -> Result<Self, String> {
        let f = Fields::read(s.as_bytes()).map_err(|what| malformed(s, what))?;
        let leap = f.second == 60;
        let second = if leap { 59 } else { f.second };
        let frac = if leap { 999_999_999 } else { f.frac };
        let wall = days_from_civil(f.year, f.month, f.day) as i128 * DAY_NS
            + (f.hour as i128 * 3600 + f.minute as i128 * 60 + second as i128) * NS
            + frac as i128;
        let offset = match f.suffix {
            Suffix::Local => zone.local_offset(s, &f, second, frac)?,
            _ => f.offset,
        };
        let nanos = wall - offset as i128 * NS;
        if leap {
            let utc = nanos.rem_euclid(DAY_NS);
            let (y, m, d) = civil_from_days(nanos.div_euclid(DAY_NS) as i64);
            if utc != DAY_NS - 1 || d != days_in_month(y, m) {
                return Err(malformed(
                    s,
                    "a leap second (:60) falls only at 23:59:60 UTC on the last day of a month",
                ));
            }
        }
        Ok(Self {
            secs: 0.0,
            nanos: 0,
            offset,
            suffix: f.suffix,
            spaced: f.spaced,
        }
        .with_nanos(nanos))
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

    /// The timestamp as written: its own offset and separator, the shortest exact
    /// fraction of a second (none when whole).
    pub fn to_rfc3339(&self) -> String {
        let mut buf = Vec::with_capacity(40);
        self.write_stamp(&mut buf);
        String::from_utf8(buf).unwrap_or_default()
    }

    /// Append the timestamp as [`Instant::to_rfc3339`] writes it (no quotes), without
    /// allocating. Years outside 0000–9999 (only reachable by arithmetic, never read) get
    /// a sign and six digits, as ISO 8601's expanded form.
    pub fn write_stamp(&self, buf: &mut Vec<u8>) {
        let wall = self.nanos.saturating_add(self.offset as i128 * NS);
        // Days beyond about ±2.7 million years are clamped: the text stays a date.
        let days = wall.div_euclid(DAY_NS).clamp(-1_000_000_000, 1_000_000_000) as i64;
        let in_day = wall.rem_euclid(DAY_NS);
        let (y, m, d) = civil_from_days(days);
        if (0..=9999).contains(&y) {
            digits(buf, y as u64, 4);
        } else {
            buf.push(if y < 0 { b'-' } else { b'+' });
            digits(buf, y.unsigned_abs(), 6);
        }
        buf.push(b'-');
        digits(buf, m as u64, 2);
        buf.push(b'-');
        digits(buf, d as u64, 2);
        buf.push(if self.spaced { b' ' } else { b'T' });
        let secs = (in_day / NS) as u64;
        digits(buf, secs / 3600, 2);
        buf.push(b':');
        digits(buf, secs / 60 % 60, 2);
        buf.push(b':');
        digits(buf, secs % 60, 2);
        let mut frac = (in_day % NS) as u64;
        if frac != 0 {
            let mut width = 9;
            while frac % 10 == 0 {
                frac /= 10;
                width -= 1;
            }
            buf.push(b'.');
            digits(buf, frac, width);
        }
        match self.suffix {
            Suffix::Z => buf.push(b'Z'),
            Suffix::UnknownOffset => buf.extend_from_slice(b"-00:00"),
            Suffix::Offset => write_offset(buf, self.offset),
            Suffix::Local => {}
        }
    }
}

/// `+hh:mm` or `-hh:mm` (and `:ss` for the odd historical zone offset with seconds).
fn write_offset(buf: &mut Vec<u8>, offset: i32) {
    buf.push(if offset < 0 { b'-' } else { b'+' });
    let a = offset.unsigned_abs() as u64;
    digits(buf, a / 3600, 2);
    buf.push(b':');
    digits(buf, a / 60 % 60, 2);
    if a % 60 != 0 {
        buf.push(b':');
        digits(buf, a % 60, 2);
    }
}

/// `x` in decimal, zero-padded to at least `width` digits.
fn digits(buf: &mut Vec<u8>, x: u64, width: usize) {
    let mut tmp = [b'0'; 20];
    let mut i = tmp.len();
    let mut v = x;
    while v > 0 || tmp.len() - i < width {
        i -= 1;
        tmp[i] = b'0' + (v % 10) as u8;
        v /= 10;
    }
    buf.extend_from_slice(&tmp[i..]);
}

/// The request-level `time_zone`: where offset-less timestamps are read. None by default,
/// and then such a timestamp is refused with what to add.
#[derive(Debug, Clone, Default)]
pub struct Zone {
    tz: Option<TimeZone>,
}

impl Zone {
    /// No zone: every timestamp must carry its offset.
    pub fn none() -> Self {
        Self::default()
    }

    /// The IANA zone `name` (`Europe/Berlin`), from the compiled-in tz database; the error
    /// says what was wrong.
    pub fn named(name: &str) -> Result<Self, String> {
        // The database also knows lower-case spellings; the name must be the zone's own.
        match TimeZone::get(name) {
            Ok(tz) if tz.iana_name() == Some(name) => Ok(Self { tz: Some(tz) }),
            Ok(tz) => Err(format!(
                "unknown time zone '{name}'; did you mean '{}'? Give an IANA name such as \"Europe/Berlin\" or \"UTC\"",
                tz.iana_name().unwrap_or("UTC")
            )),
            Err(_) => Err(format!(
                "unknown time zone '{name}'; give an IANA name such as \"Europe/Berlin\", \"America/Chicago\" or \"UTC\""
            )),
        }
    }

    /// The zone's IANA name, if one was given.
    pub fn name(&self) -> Option<&str> {
        self.tz.as_ref().and_then(|tz| tz.iana_name())
    }

    /// The zone's offset (seconds east of UTC) at Unix nanoseconds `nanos`; `None` without
    /// a zone or outside the range of dates the database covers.
    pub fn offset_at(&self, nanos: i128) -> Option<i32> {
        let tz = self.tz.as_ref()?;
        let ts = Timestamp::from_nanosecond(nanos).ok()?;
        Some(tz.to_offset(ts).seconds())
    }

    /// The offset of the wall-clock time `f` (with `second` and `frac` after leap-second
    /// handling) in this zone; errors say what to add or why the time does not exist.
    fn local_offset(&self, s: &str, f: &Fields, second: u32, frac: u32) -> Result<i32, String> {
        let Some(tz) = &self.tz else {
            return Err(format!(
                "\"{}\" has no UTC offset: add one to the time, such as \"Z\" (UTC) or \"+01:00\" (\"2026-03-01T06:00:10+01:00\"), or give the request a top-level \"time_zone\" such as \"Europe/Berlin\" to read times without an offset in that zone",
                clip(s)
            ));
        };
        let dt = DateTime::new(
            f.year as i16,
            f.month as i8,
            f.day as i8,
            f.hour as i8,
            f.minute as i8,
            second as i8,
            frac as i32,
        )
        .map_err(|e| malformed(s, &e.to_string()))?;
        match tz.to_ambiguous_timestamp(dt).offset() {
            AmbiguousOffset::Unambiguous { offset } => Ok(offset.seconds()),
            // The repeated hour when clocks go back: the earlier instant, the one still on
            // the offset from before the change.
            AmbiguousOffset::Fold { before, .. } => Ok(before.seconds()),
            AmbiguousOffset::Gap { before, after } => Err(format!(
                "the local time \"{}\" does not exist in {}: the clocks skip it when the offset changes from {} to {}; give the time with its offset or a time outside the gap",
                clip(s),
                self.name().unwrap_or("the request's time_zone"),
                offset_text(before),
                offset_text(after),
            )),
        }
    }
}

fn offset_text(o: Offset) -> String {
    let mut buf = Vec::with_capacity(9);
    write_offset(&mut buf, o.seconds());
    String::from_utf8(buf).unwrap_or_default()
}

/// At most 40 characters of a client's text for a message.
fn clip(s: &str) -> &str {
    match s.char_indices().nth(40) {
        Some((i, _)) => &s[..i],
        None => s,
    }
}

fn malformed(s: &str, what: &str) -> String {
    format!(
        "\"{}\" is not an RFC 3339 timestamp (YYYY-MM-DDThh:mm:ss[.fraction] then Z or an offset such as +01:00): {what}",
        clip(s)
    )
}

/// The fields of a timestamp's text, checked for range (the calendar too).
struct Fields {
    year: i32,
    month: u32,
    day: u32,
    hour: u32,
    minute: u32,
    second: u32,
    /// Nanoseconds.
    frac: u32,
    /// Seconds east of UTC as written (0 for `Z` and local times).
    offset: i32,
    suffix: Suffix,
    spaced: bool,
}

impl Fields {
    /// `YYYY-MM-DD(T|t| )hh:mm:ss(.d+)?(Z|z|(+|-)hh:mm)?` (RFC 3339 §5.6, the offset
    /// optional for local times), by fixed positions.
    fn read(b: &[u8]) -> Result<Self, &'static str> {
        let num = |from: usize, len: usize| -> Option<u32> {
            let mut v = 0u32;
            for &c in b.get(from..from + len)? {
                if !c.is_ascii_digit() {
                    return None;
                }
                v = v * 10 + (c - b'0') as u32;
            }
            Some(v)
        };
        let at = |i: usize, c: u8| b.get(i) == Some(&c);
        let (Some(year), true, Some(month), true, Some(day)) =
            (num(0, 4), at(4, b'-'), num(5, 2), at(7, b'-'), num(8, 2))
        else {
            return Err("the date is not YYYY-MM-DD");
        };
        let spaced = match b.get(10) {
            Some(b'T' | b't') => false,
            Some(b' ') => true,
            _ => return Err("date and time are separated by 'T' or a space"),
        };
        let (Some(hour), true, Some(minute), true, Some(second)) = (
            num(11, 2),
            at(13, b':'),
            num(14, 2),
            at(16, b':'),
            num(17, 2),
        ) else {
            return Err("the time of day is not hh:mm:ss");
        };
        if !(1..=12).contains(&month) {
            return Err("the month is not 01 to 12");
        }
        if day == 0 || day > days_in_month(year as i64, month) {
            return Err("that day does not exist in that month");
        }
        if hour > 23 || minute > 59 || second > 60 {
            return Err("the time of day is out of range (hours 00-23, minutes and seconds 00-59)");
        }
        let mut i = 19;
        let mut frac = 0u32;
        if at(i, b'.') {
            i += 1;
            let from = i;
            while let Some(c) = b.get(i).filter(|c| c.is_ascii_digit()) {
                if i - from < 9 {
                    frac = frac * 10 + (c - b'0') as u32;
                }
                i += 1;
            }
            if i == from {
                return Err("the fraction after '.' has no digits");
            }
            for _ in (i - from)..9 {
                frac *= 10;
            }
        }
        let (suffix, offset) = match b.get(i) {
            None => (Suffix::Local, 0),
            Some(b'Z' | b'z') => {
                i += 1;
                (Suffix::Z, 0)
            }
            Some(&sign @ (b'+' | b'-')) => {
                let (Some(h), true, Some(m)) = (num(i + 1, 2), at(i + 3, b':'), num(i + 4, 2))
                else {
                    return Err("the offset is not +hh:mm or -hh:mm");
                };
                if h > 23 || m > 59 {
                    return Err("the offset is out of range (hours 00-23, minutes 00-59)");
                }
                i += 6;
                let secs = (h * 3600 + m * 60) as i32;
                match (sign, secs) {
                    (b'-', 0) => (Suffix::UnknownOffset, 0),
                    (b'-', _) => (Suffix::Offset, -secs),
                    _ => (Suffix::Offset, secs),
                }
            }
            Some(_) => return Err("the time is followed by something other than Z or an offset"),
        };
        if i != b.len() {
            return Err("text follows the offset");
        }
        Ok(Self {
            year: year as i32,
            month,
            day,
            hour,
            minute,
            second,
            frac,
            offset,
            suffix,
            spaced,
        })
    }
}

fn is_leap(y: i64) -> bool {
    y % 4 == 0 && (y % 100 != 0 || y % 400 == 0)
}

fn days_in_month(y: i64, m: u32) -> u32 {
    match m {
        2 if is_leap(y) => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    }
}

/// Days since 1970-01-01 of a proleptic Gregorian date (Hinnant's `days_from_civil`).
fn days_from_civil(y: i32, m: u32, d: u32) -> i64 {
    let y = y as i64 - (m <= 2) as i64;
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let mp = (m as i64 + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d as i64 - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// The proleptic Gregorian date of a day count since 1970-01-01 (Hinnant's
/// `civil_from_days`).
fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (yoe + era * 400 + (m <= 2) as i64, m, d)
}

#[cfg(test)]
#[path = "time_tests.rs"]
mod tests;
