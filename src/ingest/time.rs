//! CF time units (`UNITS since DATE`) and RFC 3339 formatting, with the calendar arithmetic
//! written out (days from the civil date in the proleptic Gregorian calendar).
//!
//! Pure functions over `&str` and integers: no file access.

/// A parsed CF time-units string: values times `seconds_per_unit`, added to `epoch_seconds`
/// (seconds since 1970-01-01T00:00:00Z), give the instant.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct TimeUnits {
    /// Length of one unit, seconds.
    pub seconds_per_unit: f64,
    /// The reference date, seconds since 1970-01-01T00:00:00Z.
    pub epoch_seconds: i64,
}

impl TimeUnits {
    /// The instant of `value` units after the reference date, seconds since the Unix epoch,
    /// rounded to the nearest second; `None` for a non-finite or out-of-range value.
    pub fn instant(&self, value: f64) -> Option<i64> {
        let offset = value * self.seconds_per_unit;
        if !offset.is_finite() || offset.abs() > 1e15 {
            return None;
        }
        self.epoch_seconds.checked_add(offset.round() as i64)
    }
}

/// Why a time-units string was refused.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum TimeUnitsError {
    /// No ` since ` separator.
    NoSince,
    /// A unit other than seconds, minutes, hours or days (months and years have no fixed
    /// length in CF).
    Unit(String),
    /// The date or time after `since` did not parse.
    Date(String),
}

impl std::fmt::Display for TimeUnitsError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            TimeUnitsError::NoSince => write!(f, "expected 'UNITS since DATE'"),
            TimeUnitsError::Unit(u) => write!(
                f,
                "unit '{u}' is not one of seconds, minutes, hours, days (months and years have no fixed length)"
            ),
            TimeUnitsError::Date(d) => write!(
                f,
                "reference date '{d}' is not 'YYYY-MM-DD[ T]hh:mm:ss[.s][Z|+hh:mm| UTC]'"
            ),
        }
    }
}

/// Parse a CF time-units string such as `hours since 2011-01-10 12:00:00` or
/// `Hour since 2010-10-26T12:00:00+00:00`.
///
/// # Method
/// The unit is matched case-insensitively in singular or plural and common abbreviations
/// (`s`, `sec`, `min`, `h`, `hr`, `d`); the date accepts a space or `T` before the time, an
/// optional time (midnight), optional fractional seconds, and a zone of `Z`, `UTC`, `GMT` or
/// `±hh[:mm]` (subtracted to give UTC).
///
/// # References
/// CF conventions 1.11, §4.4 (time coordinate); UDUNITS-2 time syntax; RFC 3339.
pub fn parse_time_units(units: &str) -> Result<TimeUnits, TimeUnitsError> {
    let trimmed = units.trim();
    let lower = trimmed.to_ascii_lowercase();
    let Some(pos) = lower.find(" since ") else {
        return Err(TimeUnitsError::NoSince);
    };
    let unit = lower.get(..pos).unwrap_or("").trim();
    let date = trimmed.get(pos + " since ".len()..).unwrap_or("").trim();
    let seconds_per_unit = match unit {
        "second" | "seconds" | "s" | "sec" | "secs" => 1.0,
        "minute" | "minutes" | "min" | "mins" => 60.0,
        "hour" | "hours" | "h" | "hr" | "hrs" => 3600.0,
        "day" | "days" | "d" => 86400.0,
        other => return Err(TimeUnitsError::Unit(other.to_string())),
    };
    let epoch_seconds = parse_date_time(date).ok_or_else(|| TimeUnitsError::Date(date.into()))?;
    Ok(TimeUnits {
        seconds_per_unit,
        epoch_seconds,
    })
}

/// Parse `YYYY-MM-DD[( |T)hh[:mm[:ss[.fff]]]][Z| UTC|±hh[:mm]]` to seconds since the Unix
/// epoch (UTC); fractional seconds are rounded to the nearest second. Years are 0000–9999
/// (RFC 3339 dates have four digits), and so is the instant after the zone offset.
pub fn parse_date_time(text: &str) -> Option<i64> {
    let text = text.trim();
    // Split the date from the rest at the first 'T' or space.
    let (date, rest) = match text.find(['T', ' ']) {
        Some(i) => (text.get(..i)?, text.get(i + 1..)?.trim()),
        None => (text, ""),
    };
    let mut parts = date.split('-');
    let (year, month, day) = {
        // A leading minus sign (negative year) is not used by forecast files; refuse it.
        let y: i64 = parts.next()?.parse().ok()?;
        let m: u32 = parts.next()?.parse().ok()?;
        let d: u32 = parts.next()?.parse().ok()?;
        if parts.next().is_some() || !(0..=9999).contains(&y) {
            return None;
        }
        (y, m, d)
    };
    if !(1..=12).contains(&month) || day < 1 || day > days_in_month(year, month) {
        return None;
    }
    // Separate the zone from the clock time.
    let (clock, zone_offset_s) = split_zone(rest)?;
    let clock_s = parse_clock(clock)?;
    let days = days_from_civil(year, month, day);
    let instant = days
        .checked_mul(86_400)?
        .checked_add(clock_s)?
        .checked_sub(zone_offset_s)?;
    // A zone offset may carry the instant out of years 0000-9999; refuse it there too, so
    // that every instant accepted formats back to RFC 3339 and parses to itself.
    let first = days_from_civil(0, 1, 1) * 86_400;
    let end = days_from_civil(10_000, 1, 1) * 86_400;
    (first..end).contains(&instant).then_some(instant)
}

/// Split `hh:mm:ssZ`, `hh:mm:ss+01:00`, `hh:mm:ss UTC` into the clock and the zone offset,
/// seconds east of UTC.
fn split_zone(rest: &str) -> Option<(&str, i64)> {
    let rest = rest.trim();
    for suffix in [" UTC", " utc", " GMT", " gmt", "UTC", "Z", "z"] {
        if let Some(clock) = rest.strip_suffix(suffix) {
            return Some((clock.trim(), 0));
        }
    }
    // A sign after the clock's first character starts a numeric offset.
    if let Some(i) = rest
        .char_indices()
        .skip(1)
        .find(|&(_, c)| c == '+' || c == '-')
        .map(|(i, _)| i)
    {
        let clock = rest.get(..i)?.trim();
        let zone = rest.get(i..)?.trim();
        let sign = if zone.starts_with('-') { -1 } else { 1 };
        let digits = zone.get(1..)?;
        let (hh, mm) = match digits.split_once(':') {
            Some((h, m)) => (h.parse::<i64>().ok()?, m.parse::<i64>().ok()?),
            None if digits.len() == 4 => (
                digits.get(..2)?.parse::<i64>().ok()?,
                digits.get(2..)?.parse::<i64>().ok()?,
            ),
            None => (digits.parse::<i64>().ok()?, 0),
        };
        // Both parts are unsigned: the sign was read above, so a second one ("--05") is
        // refused rather than taken as a negative hour.
        if !(0..=23).contains(&hh) || !(0..=59).contains(&mm) {
            return None;
        }
        return Some((clock, sign * (hh * 3600 + mm * 60)));
    }
    Some((rest, 0))
}

/// `hh[:mm[:ss[.fff]]]` (or empty for midnight) to seconds after midnight.
fn parse_clock(clock: &str) -> Option<i64> {
    if clock.is_empty() {
        return Some(0);
    }
    let mut parts = clock.split(':');
    let h: i64 = parts.next()?.trim().parse().ok()?;
    let m: i64 = match parts.next() {
        Some(m) => m.trim().parse().ok()?,
        None => 0,
    };
    let s: f64 = match parts.next() {
        Some(s) => s.trim().parse().ok()?,
        None => 0.0,
    };
    if parts.next().is_some() || !(0..=23).contains(&h) || !(0..=59).contains(&m) {
        return None;
    }
    if !(0.0..61.0).contains(&s) {
        return None;
    }
    Some(h * 3600 + m * 60 + s.round() as i64)
}

fn is_leap_year(year: i64) -> bool {
    (year % 4 == 0 && year % 100 != 0) || year % 400 == 0
}

fn days_in_month(year: i64, month: u32) -> u32 {
    match month {
        1 | 3 | 5 | 7 | 8 | 10 | 12 => 31,
        4 | 6 | 9 | 11 => 30,
        2 if is_leap_year(year) => 29,
        2 => 28,
        _ => 0,
    }
}

/// Days from 1970-01-01 to the given proleptic Gregorian date (negative before 1970).
///
/// # Method
/// Shift the year to start in March so that the leap day ends it, count whole 400-year eras
/// (146 097 days each), then the day of the era from the year of the era and the day of the
/// shifted year (`(153 m + 2) / 5` gives the days before month `m` counted from March).
///
/// # References
/// Hinnant, H. (2013), "chrono-Compatible Low-Level Date Algorithms" (days_from_civil), a
/// public-domain derivation from the Gregorian calendar rules.
pub fn days_from_civil(year: i64, month: u32, day: u32) -> i64 {
    let y = if month <= 2 { year - 1 } else { year };
    let era = y.div_euclid(400);
    let yoe = y - era * 400; // [0, 399]
    let m = i64::from(month);
    let mp = (m + 9) % 12; // March = 0
    let doy = (153 * mp + 2) / 5 + i64::from(day) - 1; // [0, 365]
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy; // [0, 146096]
    era * 146_097 + doe - 719_468
}

/// The civil date of a day count from 1970-01-01: the inverse of [`days_from_civil`].
pub fn civil_from_days(days: i64) -> (i64, u32, u32) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let month = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    let year = yoe + era * 400 + i64::from(month <= 2);
    (year, month, day)
}

/// Seconds since the Unix epoch as RFC 3339 UTC, `YYYY-MM-DDThh:mm:ssZ`.
pub fn format_rfc3339_utc(epoch_seconds: i64) -> String {
    let days = epoch_seconds.div_euclid(86_400);
    let secs = epoch_seconds.rem_euclid(86_400);
    let (y, m, d) = civil_from_days(days);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        secs / 3600,
        (secs / 60) % 60,
        secs % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn days_from_civil_known_dates() {
        // Unix epoch by definition (POSIX.1-2017, §4.16).
        assert_eq!(days_from_civil(1970, 1, 1), 0);
        // 2000-01-01 is 10957 days after the epoch: 30 years of 365 days plus 7 leap days
        // (1972..1996), arithmetic from the Gregorian rules.
        assert_eq!(days_from_civil(2000, 1, 1), 10_957);
        // 2000-03-01: 2000 is a leap year (divisible by 400): Jan 31 + Feb 29 = 60 days later.
        assert_eq!(days_from_civil(2000, 3, 1), 10_957 + 60);
        // 1900 is not a leap year (divisible by 100, not 400): 1900-03-01 minus 1900-02-28 = 1.
        assert_eq!(
            days_from_civil(1900, 3, 1) - days_from_civil(1900, 2, 28),
            1
        );
        // The day before the epoch.
        assert_eq!(days_from_civil(1969, 12, 31), -1);
    }

    #[test]
    fn civil_round_trip_over_centuries() {
        let mut days = days_from_civil(1600, 1, 1);
        let end = days_from_civil(2400, 12, 31);
        let mut prev: Option<(i64, u32, u32)> = None;
        while days <= end {
            let (y, m, d) = civil_from_days(days);
            assert_eq!(days_from_civil(y, m, d), days);
            assert!(d >= 1 && d <= days_in_month(y, m));
            if let Some(p) = prev {
                assert!((y, m, d) > p, "dates increase");
            }
            prev = Some((y, m, d));
            days += 1;
        }
    }

    #[test]
    fn gfs_time_units_forms() {
        // The two spellings in /work/shared/data (GFS_test.nc and the 2.5-degree subset).
        let a = parse_time_units("Hour since 2010-10-26T12:00:00+00:00");
        assert_eq!(
            a.map(|t| format_rfc3339_utc(t.epoch_seconds)),
            Ok("2010-10-26T12:00:00Z".to_string())
        );
        let b = parse_time_units("hours since 2011-01-10 12:00:00");
        let b = b.map(|t| (t.seconds_per_unit, format_rfc3339_utc(t.epoch_seconds)));
        assert_eq!(b, Ok((3600.0, "2011-01-10T12:00:00Z".to_string())));
        // +120 h from 2011-01-10 12Z is 2011-01-15 12Z (PROVENANCE.md of the 2.5-degree file).
        let t = parse_time_units("hours since 2011-01-10 12:00:00").ok();
        let valid = t.and_then(|t| t.instant(120.0)).map(format_rfc3339_utc);
        assert_eq!(valid.as_deref(), Some("2011-01-15T12:00:00Z"));
        // The WRF file's XTIME spelling.
        let w = parse_time_units("minutes since 2005-08-28 00:00:00");
        assert_eq!(w.map(|t| t.seconds_per_unit), Ok(60.0));
    }

    #[test]
    fn zones_dates_and_clocks() {
        let utc = parse_date_time("2011-01-10 12:00:00").unwrap_or(i64::MIN);
        assert_eq!(parse_date_time("2011-01-10T12:00:00Z"), Some(utc));
        assert_eq!(parse_date_time("2011-01-10 12:00:00 UTC"), Some(utc));
        assert_eq!(parse_date_time("2011-01-10T13:00:00+01:00"), Some(utc));
        assert_eq!(parse_date_time("2011-01-10T07:00-05:00"), Some(utc));
        assert_eq!(parse_date_time("2011-01-10T1330+0130"), None);
        assert_eq!(parse_date_time("2011-01-10 12:00:00.4"), Some(utc));
        assert_eq!(parse_date_time("2011-1-10 12:0:0"), Some(utc));
        assert_eq!(parse_date_time("2011-01-10"), Some(utc - 12 * 3600));
        assert_eq!(parse_date_time("2011-01-10 12"), Some(utc));
        for bad in [
            "",
            "2011-13-01",
            "2011-02-29",
            "2011-01-10 25:00",
            "x",
            "2011-01",
        ] {
            assert_eq!(parse_date_time(bad), None, "{bad}");
        }
        assert_eq!(
            parse_date_time("2012-02-29"),
            Some(days_from_civil(2012, 2, 29) * 86400)
        );
    }

    #[test]
    fn refused_units() {
        assert_eq!(parse_time_units("hours"), Err(TimeUnitsError::NoSince));
        assert!(matches!(
            parse_time_units("months since 2000-01-01"),
            Err(TimeUnitsError::Unit(_))
        ));
        assert!(matches!(
            parse_time_units("days since yesterday"),
            Err(TimeUnitsError::Date(_))
        ));
        let msg = TimeUnitsError::Unit("years".into()).to_string();
        assert!(msg.contains("years") && msg.contains("hours"));
    }

    #[test]
    fn instants_refuse_non_finite() {
        let t = TimeUnits {
            seconds_per_unit: 3600.0,
            epoch_seconds: 0,
        };
        assert_eq!(t.instant(f64::NAN), None);
        assert_eq!(t.instant(f64::INFINITY), None);
        assert_eq!(t.instant(1.5), Some(5400));
        assert_eq!(format_rfc3339_utc(-1), "1969-12-31T23:59:59Z");
    }

    proptest::proptest! {
        #[test]
        fn time_parsers_never_panic(text in "\\PC{0,40}") {
            let _ = parse_time_units(&text);
            let _ = parse_date_time(&text);
        }

        #[test]
        fn formatted_instants_parse_back(secs in -5_000_000_000i64..5_000_000_000i64) {
            let text = format_rfc3339_utc(secs);
            proptest::prop_assert_eq!(parse_date_time(&text), Some(secs));
        }

        #[test]
        fn civil_days_round_trip(days in -1_000_000i64..1_000_000i64) {
            let (y, m, d) = civil_from_days(days);
            proptest::prop_assert_eq!(days_from_civil(y, m, d), days);
        }
    }

    /// Regression (found by the `cf_attributes` fuzz target): a second sign before the zone
    /// offset (`--0011303…`) parsed as a negative hour that passed the `hh > 23` check and
    /// overflowed `hh * 3600` (a panic with overflow checks, a wrong date without).
    #[test]
    fn regression_a_doubled_zone_sign_overflowed_the_offset() {
        let units = "hours since 2011-01-10 13333314Td\u{d7}0--00113033333333331000";
        assert!(parse_time_units(units).is_err());
        assert_eq!(parse_date_time("2011-01-10 12:00:00--05:00"), None);
        assert_eq!(parse_date_time("2011-01-10 12:00:00+05:-30"), None);
        // The single-signed forms still parse (RFC 3339, §5.6).
        assert_eq!(
            parse_date_time("2011-01-10 12:00:00-05:00"),
            parse_date_time("2011-01-10T17:00:00Z")
        );
    }

    /// Regression: a year of 19 digits overflowed the era arithmetic of
    /// `days_from_civil`; years are now 0000–9999 and so is the instant after the offset.
    #[test]
    fn regression_a_huge_year_overflowed_the_day_count() {
        assert_eq!(parse_date_time("9223372036854775807-01-01"), None);
        assert_eq!(parse_date_time("10000-01-01"), None);
        assert_eq!(parse_date_time("0000-01-01T00:00:00+01:00"), None);
        assert_eq!(parse_date_time("9999-12-31T23:00:00-05:00"), None);
        let last = parse_date_time("9999-12-31T23:59:59Z").expect("the last second");
        assert_eq!(format_rfc3339_utc(last), "9999-12-31T23:59:59Z");
        let first = parse_date_time("0000-01-01").expect("the first day");
        assert_eq!(format_rfc3339_utc(first), "0000-01-01T00:00:00Z");
    }
}
