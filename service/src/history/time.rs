//! Times in history: Unix milliseconds UTC inside, RFC 3339 at the API edge; and the
//! durations (`90s`, `6h`, `2d`) of the command line and the API.

use std::time::{SystemTime, UNIX_EPOCH};

const MS_PER_DAY: i64 = 86_400_000;
/// 0000-01-01T00:00:00.000Z and 9999-12-31T23:59:59.999Z: the years RFC 3339 can write.
const FIRST_MS: i64 = -62_167_219_200_000;
const LAST_MS: i64 = 253_402_300_799_999;

/// The wall clock now, in Unix milliseconds UTC (0 if the clock is before 1970).
pub fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
}

/// `ms` as RFC 3339 UTC with milliseconds, e.g. `2026-12-01T21:40:00.123Z`. Times outside
/// the years 0000 to 9999 are clamped to them, so the text is always valid RFC 3339.
pub fn rfc3339(ms: i64) -> String {
    let ms = ms.clamp(FIRST_MS, LAST_MS);
    let (days, in_day) = (ms.div_euclid(MS_PER_DAY), ms.rem_euclid(MS_PER_DAY));
    let (year, month, day) = civil_from_days(days);
    let (s, milli) = (in_day / 1000, in_day % 1000);
    format!("{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}.{milli:03}Z", s / 3600, s / 60 % 60, s % 60)
}

/// Parses an RFC 3339 time (`2026-12-01T21:40:00Z`, `2026-12-01T22:40:00.5+01:00`) into
/// Unix milliseconds UTC. Digits of the fraction beyond milliseconds are truncated.
pub fn parse_rfc3339(text: &str) -> Result<i64, String> {
    parse(text.as_bytes())
        .map_err(|why| format!("`{text}` is not an RFC 3339 time such as 2026-12-01T21:40:00Z: {why}"))
}

fn parse(b: &[u8]) -> Result<i64, String> {
    let mut p = Cursor { b, i: 0 };
    let year = p.digits(4, "a four-digit year")?;
    p.expect(b'-')?;
    let month = p.digits(2, "a two-digit month")?;
    p.expect(b'-')?;
    let day = p.digits(2, "a two-digit day")?;
    match p.next() {
        Some(b'T' | b't' | b' ') => {}
        _ => return Err("the date must be followed by `T` and a time of day".into()),
    }
    let hour = p.digits(2, "a two-digit hour")?;
    p.expect(b':')?;
    let minute = p.digits(2, "two-digit minutes")?;
    p.expect(b':')?;
    let second = p.digits(2, "two-digit seconds")?;
    let mut milli = 0;
    if p.peek() == Some(b'.') {
        p.i += 1;
        let start = p.i;
        while p.peek().is_some_and(|c| c.is_ascii_digit()) {
            if p.i - start < 3 {
                milli = milli * 10 + i64::from(b[p.i] - b'0');
            }
            p.i += 1;
        }
        match p.i - start {
            0 => return Err("a `.` must be followed by digits".into()),
            n @ 1..=2 => milli *= 10_i64.pow(3 - n as u32),
            _ => {}
        }
    }
    let offset_min = match p.next() {
        Some(b'Z' | b'z') => 0,
        Some(sign @ (b'+' | b'-')) => {
            let h = p.digits(2, "a two-digit offset hour")?;
            p.expect(b':')?;
            let m = p.digits(2, "two-digit offset minutes")?;
            if h > 23 || m > 59 {
                return Err(format!("the offset {h:02}:{m:02} is out of range"));
            }
            if sign == b'+' { h * 60 + m } else { -(h * 60 + m) }
        }
        _ => return Err("the time must end with `Z` or an offset such as `+01:00`".into()),
    };
    if p.i != b.len() {
        return Err("unexpected text after the time".into());
    }
    if !(1..=12).contains(&month) {
        return Err(format!("month {month} is out of range"));
    }
    if day < 1 || day > days_in_month(year, month) {
        return Err(format!("day {day} is out of range for {year:04}-{month:02}"));
    }
    // Second 60 is a leap second (RFC 3339 §5.7); Unix time counts it as the next second.
    if hour > 23 || minute > 59 || second > 60 {
        return Err(format!("the time of day {hour:02}:{minute:02}:{second:02} is out of range"));
    }
    let seconds = days_from_civil(year, month, day) * 86_400 + hour * 3600 + minute * 60 + second;
    Ok((seconds - offset_min * 60) * 1000 + milli)
}

struct Cursor<'a> {
    b: &'a [u8],
    i: usize,
}

impl Cursor<'_> {
    fn peek(&self) -> Option<u8> {
        self.b.get(self.i).copied()
    }

    fn next(&mut self) -> Option<u8> {
        let c = self.peek();
        self.i += usize::from(c.is_some());
        c
    }

    fn digits(&mut self, n: usize, what: &str) -> Result<i64, String> {
        let field = self.b.get(self.i..self.i + n).filter(|d| d.iter().all(u8::is_ascii_digit));
        let field = field.ok_or_else(|| format!("expected {what} at character {}", self.i + 1))?;
        self.i += n;
        Ok(field.iter().fold(0, |v, d| v * 10 + i64::from(d - b'0')))
    }

    fn expect(&mut self, c: u8) -> Result<(), String> {
        if self.next() == Some(c) {
            Ok(())
        } else {
            Err(format!("expected `{}` at character {}", c as char, self.i))
        }
    }
}

fn is_leap(year: i64) -> bool {
    year % 4 == 0 && (year % 100 != 0 || year % 400 == 0)
}

fn days_in_month(year: i64, month: i64) -> i64 {
    match month {
        2 if is_leap(year) => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    }
}

// Source: Howard Hinnant, "chrono-Compatible Low-Level Date Algorithms"
// (days_from_civil and civil_from_days), proleptic Gregorian calendar.
fn days_from_civil(year: i64, month: i64, day: i64) -> i64 {
    let y = if month <= 2 { year - 1 } else { year };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let doy = (153 * (if month > 2 { month - 3 } else { month + 9 }) + 2) / 5 + day - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

fn civil_from_days(days: i64) -> (i64, i64, i64) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    (yoe + era * 400 + i64::from(month <= 2), month, day)
}

/// Parses `90s`, `45m`, `6h`, `2d` (decimals allowed) into seconds.
pub fn parse_duration_s(text: &str) -> Result<f64, String> {
    let text = text.trim();
    let split = text.find(|c: char| c.is_ascii_alphabetic()).unwrap_or(text.len());
    let (number, unit) = text.split_at(split);
    let scale = match unit {
        "s" => 1.0,
        "m" => 60.0,
        "h" => 3600.0,
        "d" => 86_400.0,
        "" => return Err(format!("`{text}` needs a unit: s, m, h or d (like 90s, 45m, 6h, 2d)")),
        other => return Err(format!("unknown unit `{other}`: use s, m, h or d (like 90s, 45m, 6h, 2d)")),
    };
    match number.parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 && v * scale <= 3.2e9 => Ok(v * scale),
        Ok(_) => Err(format!("`{text}` must be a positive duration of at most 100 years")),
        Err(_) => Err(format!("`{number}` is not a number (like 90s, 45m, 6h, 2d)")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formats_milliseconds_in_utc() {
        assert_eq!(rfc3339(0), "1970-01-01T00:00:00.000Z");
        // Source: `date -u -d @1796161200.123 +%FT%T.%3NZ` (GNU coreutils).
        assert_eq!(rfc3339(1_796_161_200_123), "2026-12-01T21:40:00.123Z");
        assert_eq!(rfc3339(-1), "1969-12-31T23:59:59.999Z");
        assert_eq!(rfc3339(951_782_400_000), "2000-02-29T00:00:00.000Z");
        assert_eq!(rfc3339(i64::MAX), "9999-12-31T23:59:59.999Z");
        assert_eq!(rfc3339(i64::MIN), "0000-01-01T00:00:00.000Z");
    }

    #[test]
    fn parsing_inverts_formatting() {
        for ms in [0, 1, -1, 1_796_161_200_123, 951_782_400_000, FIRST_MS, LAST_MS, 4_102_444_799_999] {
            assert_eq!(parse_rfc3339(&rfc3339(ms)), Ok(ms), "{}", rfc3339(ms));
        }
        for days in (-719_528..2_932_897).step_by(997) {
            let ms = days * MS_PER_DAY + 3_723_456;
            assert_eq!(parse_rfc3339(&rfc3339(ms)), Ok(ms));
        }
    }

    #[test]
    fn parsing_accepts_offsets_fractions_and_lowercase() {
        let t = 1_796_161_200_000;
        assert_eq!(parse_rfc3339("2026-12-01T21:40:00Z"), Ok(t));
        assert_eq!(parse_rfc3339("2026-12-01t21:40:00z"), Ok(t));
        assert_eq!(parse_rfc3339("2026-12-01T22:40:00+01:00"), Ok(t));
        assert_eq!(parse_rfc3339("2026-12-01T16:10:00-05:30"), Ok(t));
        assert_eq!(parse_rfc3339("2026-12-01T21:40:00.5Z"), Ok(t + 500));
        assert_eq!(parse_rfc3339("2026-12-01T21:40:00.12Z"), Ok(t + 120));
        assert_eq!(parse_rfc3339("2026-12-01T21:40:00.123999Z"), Ok(t + 123));
        assert_eq!(parse_rfc3339("2026-12-01T21:39:60Z"), Ok(t));
    }

    #[test]
    fn parsing_explains_what_is_wrong() {
        for (text, why) in [
            ("", "expected a four-digit year"),
            ("yesterday", "expected a four-digit year"),
            ("2026-12-01", "followed by `T`"),
            ("2026-12-01T21:40Z", "expected `:`"),
            ("2026-12-01T21:40:00", "must end with `Z` or an offset"),
            ("2026-13-01T00:00:00Z", "month 13 is out of range"),
            ("2026-02-29T00:00:00Z", "day 29 is out of range for 2026-02"),
            ("2026-12-01T24:00:00Z", "out of range"),
            ("2026-12-01T21:40:00.Z", "followed by digits"),
            ("2026-12-01T21:40:00+1:00", "offset hour"),
            ("2026-12-01T21:40:00Zjunk", "unexpected text"),
            ("1796161200123", "expected `-`"),
        ] {
            let e = parse_rfc3339(text).unwrap_err();
            assert!(e.contains(why) && e.contains(&format!("`{text}`")), "{text}: {e}");
        }
    }

    #[test]
    fn durations_take_seconds_minutes_hours_and_days() {
        assert_eq!(parse_duration_s("90s"), Ok(90.0));
        assert_eq!(parse_duration_s("45m"), Ok(2700.0));
        assert_eq!(parse_duration_s("6h"), Ok(21_600.0));
        assert_eq!(parse_duration_s("2d"), Ok(172_800.0));
        assert_eq!(parse_duration_s("1.5h"), Ok(5400.0));
    }

    #[test]
    fn durations_without_a_known_unit_or_positive_number_are_refused() {
        for bad in ["90", "5w", "h", "-1h", "0s", "nans", "1e300d"] {
            assert!(parse_duration_s(bad).is_err(), "{bad}");
        }
    }
}
