//! Tests of timestamp reading and writing (`time.rs`): exact nanosecond differences,
//! offsets echoed as written, offset-less times read in an IANA zone across daylight-saving
//! changes, and the hand-written calendar checked against `jiff`'s.

use super::*;

fn utc(s: &str) -> Instant {
    Instant::parse_stamp(s, &Zone::none()).unwrap_or_else(|e| panic!("{s}: {e}"))
}

fn berlin() -> Zone {
    Zone::named("Europe/Berlin").unwrap()
}

#[test]
fn timestamp_differences_are_exact_in_nanoseconds() {
    let a = utc("2026-03-01T10:00:00.1Z");
    let b = utc("2026-03-01T10:00:00.35Z");
    assert_eq!(a.until(&b, TimeMode::Stamp), 0.25);
    let c = utc("2026-03-01T11:00:00.35+01:00");
    assert_eq!(b.nanos, c.nanos, "offsets are applied (RFC 3339 §5.6)");
    assert_eq!(b, c, "the same instant, whatever its offset");
    assert_eq!(
        Instant::from_nanos(b.nanos).to_rfc3339(),
        "2026-03-01T10:00:00.35Z"
    );
}

#[test]
fn offsets_and_fractions_are_echoed_as_written() {
    // Each time comes back in its own offset and form; fractions in their shortest exact
    // form; a lower-case t or z is written upper-case (RFC 3339 §5.6 allows both).
    for (text, echo) in [
        ("2026-03-01T06:00:10+01:00", "2026-03-01T06:00:10+01:00"),
        ("2026-03-01T06:00:10-05:30", "2026-03-01T06:00:10-05:30"),
        ("2026-03-01T06:00:10Z", "2026-03-01T06:00:10Z"),
        (
            "2026-03-01T06:00:10.250+01:00",
            "2026-03-01T06:00:10.25+01:00",
        ),
        (
            "2026-03-01T06:00:10.000000001Z",
            "2026-03-01T06:00:10.000000001Z",
        ),
        ("2026-03-01T06:00:10.5000Z", "2026-03-01T06:00:10.5Z"),
        ("2026-03-01T06:00:10.000Z", "2026-03-01T06:00:10Z"),
        ("2026-03-01T06:00:10+00:00", "2026-03-01T06:00:10+00:00"),
        // RFC 3339 §4.3: "-00:00" says UTC with the local offset unknown; kept as such.
        ("2026-03-01T06:00:10-00:00", "2026-03-01T06:00:10-00:00"),
        ("2026-03-01 06:00:10Z", "2026-03-01 06:00:10Z"),
        ("2026-03-01t06:00:10z", "2026-03-01T06:00:10Z"),
        // An offset that moves the wall clock across midnight and a year boundary.
        ("2027-01-01T00:30:00+05:45", "2027-01-01T00:30:00+05:45"),
    ] {
        assert_eq!(utc(text).to_rfc3339(), echo, "{text}");
    }
    // The instants behind them (RFC 3339 §5.6: local time minus offset is UTC).
    assert_eq!(
        utc("2026-03-01T06:00:10-05:30").nanos,
        utc("2026-03-01T11:30:10Z").nanos
    );
    // Digits past nanoseconds are dropped, as before.
    assert_eq!(
        utc("2026-03-01T06:00:10.1234567891Z").to_rfc3339(),
        "2026-03-01T06:00:10.123456789Z"
    );
}

#[test]
fn rfc_3339_examples_read_to_their_unix_times() {
    // RFC 3339 §5.8 examples; Unix seconds from memory, checked against jiff below.
    let r = utc("1985-04-12T23:20:50.52Z");
    assert_eq!(r.nanos, 482_196_050_520_000_000);
    let r = utc("1996-12-19T16:39:57-08:00");
    assert_eq!(r.nanos, 851_042_397 * NS);
    assert_eq!(r.to_rfc3339(), "1996-12-19T16:39:57-08:00");
    // The leap second: read as the last nanosecond of the minute (Unix time has none).
    let leap = utc("1990-12-31T23:59:60Z");
    assert_eq!(leap.nanos, utc("1991-01-01T00:00:00Z").nanos - 1);
    assert_eq!(
        utc("1990-12-31T15:59:60-08:00").nanos,
        leap.nanos,
        "the same leap second in Pacific time"
    );
    assert!(Instant::parse_stamp("1990-12-30T23:59:60Z", &Zone::none()).is_err());
    // An old fixed offset with minutes (RFC 3339 §5.8: Netherlands, 1937).
    assert_eq!(
        utc("1937-01-01T12:00:27.87+00:20").to_rfc3339(),
        "1937-01-01T12:00:27.87+00:20"
    );
}

#[test]
fn the_hand_written_calendar_agrees_with_jiff() {
    // 20,000 instants from 0001 to 9999 (the range jiff covers), seeded: our reader and writer against jiff's
    // (an independent implementation of the same calendar).
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let lo = Timestamp::from_second(-62_135_596_800 + 86_400)
        .unwrap()
        .as_nanosecond();
    let hi = Timestamp::from_second(253_402_207_200 - 2 * 86_400)
        .unwrap()
        .as_nanosecond();
    for k in 0..20_000 {
        let r = next() as i128;
        let mut n = lo + r.rem_euclid(hi - lo);
        if k % 3 == 0 {
            n -= n % NS;
        }
        let ts = Timestamp::from_nanosecond(n).unwrap();
        let text = ts.to_string();
        let ours = Instant::from_nanos(n).to_rfc3339();
        assert_eq!(ours, text, "{n}");
        assert_eq!(utc(&text).nanos, n, "{text}");
        let off = ((next() % (2 * 86_399)) as i32 - 86_399) / 60 * 60;
        let off = off.clamp(-(23 * 3600 + 59 * 60), 23 * 3600 + 59 * 60);
        let wall = TimeZone::fixed(Offset::from_seconds(off).unwrap()).to_datetime(ts);
        let written = Instant {
            offset: off,
            suffix: if off == 0 { Suffix::Z } else { Suffix::Offset },
            ..Instant::from_nanos(n)
        }
        .to_rfc3339();
        assert_eq!(
            &written[..19],
            &wall.to_string()[..19],
            "wall clock of {n} at {off}"
        );
        assert_eq!(utc(&written).nanos, n, "{written}");
    }
}

#[test]
fn an_offset_less_time_without_a_zone_says_what_to_add() {
    let e = Instant::parse_stamp("2026-03-01 06:00:10", &Zone::none()).unwrap_err();
    assert_eq!(
        e,
        "\"2026-03-01 06:00:10\" has no UTC offset: add one to the time, such as \"Z\" (UTC) \
         or \"+01:00\" (\"2026-03-01T06:00:10+01:00\"), or give the request a top-level \
         \"time_zone\" such as \"Europe/Berlin\" to read times without an offset in that zone"
    );
    assert!(Instant::parse_stamp("2026-03-01T06:00:10", &Zone::none()).is_err());
}

#[test]
fn offset_less_times_are_read_in_the_zone_and_echoed_offset_less() {
    let z = berlin();
    // Central European Time is UTC+1 in winter, UTC+2 in summer (IANA tz
    // Europe/Berlin, common practice).
    let winter = Instant::parse_stamp("2026-03-01 06:00:10", &z).unwrap();
    assert_eq!(winter.nanos, utc("2026-03-01T05:00:10Z").nanos);
    assert_eq!(winter.to_rfc3339(), "2026-03-01 06:00:10");
    let summer = Instant::parse_stamp("2026-07-01T06:00:10.5", &z).unwrap();
    assert_eq!(summer.nanos, utc("2026-07-01T04:00:10.5Z").nanos);
    assert_eq!(summer.to_rfc3339(), "2026-07-01T06:00:10.5");
    // A time with an offset keeps it, zone or not.
    let given = Instant::parse_stamp("2026-07-01T06:00:10-05:00", &z).unwrap();
    assert_eq!(given.to_rfc3339(), "2026-07-01T06:00:10-05:00");
}

#[test]
fn the_spring_change_makes_a_local_span_an_hour_shorter() {
    // EU rule (Directive 2000/84/EC, IANA tz Europe/Berlin): on Sunday 2026-03-29 clocks
    // go from 02:00 to 03:00 local (01:00 UTC). 00:30 → 03:30 local is 2 h of filter
    // time, not 3 (common practice).
    let z = berlin();
    let a = Instant::parse_stamp("2026-03-29 00:30:00", &z).unwrap();
    let b = Instant::parse_stamp("2026-03-29 03:30:00", &z).unwrap();
    assert_eq!(a.until(&b, TimeMode::Stamp), 7200.0);
    assert_eq!(
        (a.to_rfc3339().as_str(), b.to_rfc3339().as_str()),
        ("2026-03-29 00:30:00", "2026-03-29 03:30:00")
    );
    // 02:30 that night does not exist.
    let e = Instant::parse_stamp("2026-03-29 02:30:00", &z).unwrap_err();
    assert_eq!(
        e,
        "the local time \"2026-03-29 02:30:00\" does not exist in Europe/Berlin: the clocks \
         skip it when the offset changes from +01:00 to +02:00; give the time with its offset \
         or a time outside the gap"
    );
}

#[test]
fn the_repeated_autumn_hour_reads_as_the_earlier_instant() {
    // On Sunday 2026-10-25 clocks go back from 03:00 to 02:00 local (01:00 UTC): 02:30
    // local happens twice; the first (still UTC+2) is taken, as documented.
    let z = berlin();
    let t = Instant::parse_stamp("2026-10-25 02:30:00", &z).unwrap();
    assert_eq!(t.nanos, utc("2026-10-25T00:30:00Z").nanos);
    assert_eq!(t.to_rfc3339(), "2026-10-25 02:30:00");
    let after = Instant::parse_stamp("2026-10-25 03:30:00", &z).unwrap();
    assert_eq!(t.until(&after, TimeMode::Stamp), 7200.0);
}

#[test]
fn a_grid_of_local_times_follows_the_zone_across_a_change() {
    // Hourly from 00:00 local on the spring change: the wall clock jumps 01:00 → 03:00.
    let z = berlin();
    let start = Instant::parse_stamp("2026-03-29 00:00:00", &z).unwrap();
    let text: Vec<String> = (0..3)
        .map(|k| {
            start
                .written_like(start.nanos + k * 3600 * NS, &z)
                .to_rfc3339()
        })
        .collect();
    assert_eq!(
        text,
        [
            "2026-03-29 00:00:00",
            "2026-03-29 01:00:00",
            "2026-03-29 03:00:00"
        ]
    );
    // A grid written with an offset keeps that offset.
    let fixed = utc("2026-03-29T00:00:00+01:00");
    assert_eq!(
        fixed
            .written_like(fixed.nanos + 3 * 3600 * NS, &z)
            .to_rfc3339(),
        "2026-03-29T03:00:00+01:00"
    );
}

#[test]
fn zone_names_are_iana_names() {
    assert_eq!(berlin().name(), Some("Europe/Berlin"));
    assert_eq!(Zone::named("UTC").unwrap().name(), Some("UTC"));
    assert_eq!(
        Zone::named("Europe/Berln").unwrap_err(),
        "unknown time zone 'Europe/Berln'; give an IANA name such as \"Europe/Berlin\", \
         \"America/Chicago\" or \"UTC\""
    );
    assert!(
        Zone::named("europe/berlin").is_err(),
        "the zone's own spelling"
    );
    assert!(Zone::named("").is_err());
}

#[test]
fn bad_timestamps_are_errors_that_name_the_part() {
    for (text, part) in [
        ("yesterday", "the date is not YYYY-MM-DD"),
        ("2026-13-01T00:00:00Z", "the month is not 01 to 12"),
        (
            "2026-02-29T00:00:00Z",
            "that day does not exist in that month",
        ),
        (
            "2026-03-01_06:00:00Z",
            "date and time are separated by 'T' or a space",
        ),
        ("2026-03-01T6:00:00Z", "the time of day is not hh:mm:ss"),
        ("2026-03-01T24:00:00Z", "the time of day is out of range"),
        (
            "2026-03-01T06:00:00.Z",
            "the fraction after '.' has no digits",
        ),
        (
            "2026-03-01T06:00:00+1:00",
            "the offset is not +hh:mm or -hh:mm",
        ),
        ("2026-03-01T06:00:00+24:00", "the offset is out of range"),
        (
            "2026-03-01T06:00:00 Z",
            "followed by something other than Z",
        ),
        ("2026-03-01T06:00:00Zx", "text follows the offset"),
        ("2026-03-01T06:00:00+01:00x", "text follows the offset"),
    ] {
        let e = Instant::parse_stamp(text, &berlin()).unwrap_err();
        assert!(e.contains(part), "{text}: {e}");
        assert!(e.contains("is not an RFC 3339 timestamp"), "{text}: {e}");
    }
    // 2024 is a leap year (Gregorian rule, common practice); 2100 is not.
    assert!(Instant::parse_stamp("2024-02-29T00:00:00Z", &Zone::none()).is_ok());
    assert!(Instant::parse_stamp("2100-02-29T00:00:00Z", &Zone::none()).is_err());
    // Non-ASCII text is refused, not sliced through.
    assert!(Instant::parse_stamp("2026-03-01T06:00:00é", &Zone::none()).is_err());
}
