//! Timestamps and durations as the catalog writes them.
//!
//! Experiment boundaries are instants (`2026-03-02T00:00:00Z`); windows are durations
//! (`14d`, `36h`). Both are kept as whole seconds in UTC so that the SQL plumb emits is the same
//! on every machine whatever its local time zone. A timestamp without a zone is UTC.

/// Seconds since 1970-01-01T00:00:00Z.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Timestamp(pub i64);

const DAY: i64 = 86_400;

/// Days since the epoch of a civil date (proleptic Gregorian); H. Hinnant's algorithm.
fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = if y >= 0 { y } else { y - 399 } / 400;
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

fn civil_from_days(z: i64) -> (i64, i64, i64) {
    let z = z + 719_468;
    let era = if z >= 0 { z } else { z - 146_096 } / 146_097;
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    (if m <= 2 { y + 1 } else { y }, m, d)
}

fn days_in_month(y: i64, m: i64) -> i64 {
    match m {
        1 | 3 | 5 | 7 | 8 | 10 | 12 => 31,
        4 | 6 | 9 | 11 => 30,
        _ if (y % 4 == 0 && y % 100 != 0) || y % 400 == 0 => 29,
        _ => 28,
    }
}

impl Timestamp {
    /// Parses `YYYY-MM-DD`, `YYYY-MM-DDTHH:MM[:SS]` (space also allowed instead of `T`) with an
    /// optional `Z` or `±HH:MM` offset. Fractions of a second are not accepted: experiment
    /// boundaries are whole seconds.
    pub fn parse(text: &str) -> Result<Timestamp, String> {
        let bad =
            || format!("`{text}` is not a timestamp; write it as 2026-03-02T00:00:00Z (UTC) or 2026-03-02");
        let s = text.trim();
        let num = |part: &str| -> Result<i64, String> {
            if part.is_empty() || !part.bytes().all(|b| b.is_ascii_digit()) {
                return Err(bad());
            }
            part.parse::<i64>().map_err(|_| bad())
        };
        // Every form is ASCII; checking it first makes each byte-index slice below safe.
        if !s.is_ascii() || s.len() < 10 || s.as_bytes()[4] != b'-' || s.as_bytes()[7] != b'-' {
            return Err(bad());
        }
        let (y, m, d) = (num(&s[0..4])?, num(&s[5..7])?, num(&s[8..10])?);
        if !(1..=12).contains(&m) || d < 1 || d > days_in_month(y, m) {
            return Err(bad());
        }
        let mut secs = days_from_civil(y, m, d) * DAY;
        let rest = &s[10..];
        if rest.is_empty() {
            return Ok(Timestamp(secs));
        }
        let rest = rest.strip_prefix(['T', 't', ' ']).ok_or_else(bad)?;
        let (clock, offset) = match rest.find(['Z', 'z', '+', '-']) {
            Some(i) => (&rest[..i], &rest[i..]),
            None => (rest, ""),
        };
        let parts: Vec<&str> = clock.split(':').collect();
        if !(2..=3).contains(&parts.len()) {
            return Err(bad());
        }
        let h = num(parts[0])?;
        let mi = num(parts[1])?;
        let se = if parts.len() == 3 { num(parts[2])? } else { 0 };
        if h > 23 || mi > 59 || se > 59 {
            return Err(bad());
        }
        secs += h * 3600 + mi * 60 + se;
        match offset {
            "" | "Z" | "z" => {}
            o => {
                let sign = if o.starts_with('-') { 1 } else { -1 };
                let hm: Vec<&str> = o[1..].split(':').collect();
                let (oh, om) = match hm.as_slice() {
                    [h] if h.len() == 4 => (num(&h[..2])?, num(&h[2..])?),
                    [h] => (num(h)?, 0),
                    [h, m] => (num(h)?, num(m)?),
                    _ => return Err(bad()),
                };
                secs += sign * (oh * 3600 + om * 60);
            }
        }
        Ok(Timestamp(secs))
    }

    /// `YYYY-MM-DD HH:MM:SS`, UTC: the form every SQL dialect accepts in a timestamp literal.
    pub fn to_sql_string(self) -> String {
        let (y, m, d) = civil_from_days(self.0.div_euclid(DAY));
        let t = self.0.rem_euclid(DAY);
        format!(
            "{y:04}-{m:02}-{d:02} {:02}:{:02}:{:02}",
            t / 3600,
            (t % 3600) / 60,
            t % 60
        )
    }

    /// ISO 8601 with a `Z`, for JSON and reports.
    pub fn to_iso(self) -> String {
        self.to_sql_string().replacen(' ', "T", 1) + "Z"
    }

    pub fn plus(self, seconds: i64) -> Timestamp {
        Timestamp(self.0 + seconds)
    }
}

/// Parses a duration such as `14d`, `36h`, `-7d` or `0` into seconds.
pub fn parse_duration(text: &str) -> Result<i64, String> {
    let s = text.trim();
    let bad =
        || format!("`{text}` is not a duration; write a whole number of days or hours, e.g. `14d` or `36h`");
    if s == "0" {
        return Ok(0);
    }
    // ASCII first, so that splitting off the last byte is a character boundary.
    if !s.is_ascii() {
        return Err(bad());
    }
    let (num, unit) = s.split_at(s.len().saturating_sub(1));
    let n: i64 = num.parse().map_err(|_| bad())?;
    // A duration beyond i64 seconds is a typo, never a wrapped-around number.
    let seconds = match unit {
        "d" => n.checked_mul(DAY),
        "h" => n.checked_mul(3600),
        _ => return Err(bad()),
    };
    seconds.ok_or_else(bad)
}

/// Writes seconds back in the unit a person would use (`14d`, `36h`, `90s`).
pub fn format_duration(seconds: i64) -> String {
    if seconds % DAY == 0 {
        format!("{}d", seconds / DAY)
    } else if seconds % 3600 == 0 {
        format!("{}h", seconds / 3600)
    } else {
        format!("{seconds}s")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Text that is not ASCII (or too long a number) is an error, never a panic: these once
    /// sliced a string inside a character or overflowed.
    #[test]
    fn hostile_timestamps_and_durations_are_errors() {
        for text in [
            "2026-03-1é",
            "2026-03-01Té0:00",
            "2026-03-01T00:00+0é",
            "é026-03-01",
            "2026-03-01 ００:00",
        ] {
            assert!(Timestamp::parse(text).is_err(), "{text}");
        }
        for text in [
            "14é",
            "é",
            "1ád",
            "99999999999999999999d",
            "9223372036854775807d",
            "-9223372036854775807h",
        ] {
            assert!(parse_duration(text).is_err(), "{text}");
        }
        assert_eq!(parse_duration("14d"), Ok(14 * DAY));
    }

    #[test]
    fn parses_and_formats_utc() {
        let t = Timestamp::parse("2026-03-02T00:00:00Z").unwrap();
        assert_eq!(t.0, 1_772_409_600);
        assert_eq!(t.to_sql_string(), "2026-03-02 00:00:00");
        assert_eq!(Timestamp::parse("2026-03-02").unwrap(), t);
        assert_eq!(
            Timestamp::parse("2026-03-02T01:30:00+01:30").unwrap(),
            t,
            "offsets convert to UTC"
        );
        assert_eq!(
            Timestamp::parse("2024-02-29 12:00").unwrap().to_iso(),
            "2024-02-29T12:00:00Z"
        );
        assert!(Timestamp::parse("2025-02-29").is_err());
        assert!(Timestamp::parse("yesterday").is_err());
        assert_eq!(Timestamp(-1).to_sql_string(), "1969-12-31 23:59:59");
    }

    #[test]
    fn durations() {
        assert_eq!(parse_duration("14d").unwrap(), 14 * 86_400);
        assert_eq!(parse_duration("-7d").unwrap(), -7 * 86_400);
        assert_eq!(parse_duration("36h").unwrap(), 36 * 3600);
        assert_eq!(parse_duration("0").unwrap(), 0);
        assert!(parse_duration("2w").is_err());
        assert_eq!(format_duration(36 * 3600), "36h");
    }
}

/// A reporting period length.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Grain {
    Hour,
    Day,
    /// Weeks start on Monday (ISO 8601).
    Week,
    Month,
}

impl Grain {
    pub fn as_str(self) -> &'static str {
        match self {
            Grain::Hour => "hour",
            Grain::Day => "day",
            Grain::Week => "week",
            Grain::Month => "month",
        }
    }

    /// The start of the period holding `t`.
    pub fn truncate(self, t: Timestamp) -> Timestamp {
        let day = t.0.div_euclid(DAY);
        match self {
            Grain::Hour => Timestamp(t.0.div_euclid(3600) * 3600),
            Grain::Day => Timestamp(day * DAY),
            // 1970-01-01 was a Thursday: Monday-based weeks start 3 days earlier.
            Grain::Week => Timestamp(((day + 3).div_euclid(7) * 7 - 3) * DAY),
            Grain::Month => {
                let (y, m, _) = civil_from_days(day);
                Timestamp(days_from_civil(y, m, 1) * DAY)
            }
        }
    }

    /// The start of the period after the one starting at `t`.
    pub fn next(self, t: Timestamp) -> Timestamp {
        match self {
            Grain::Hour => Timestamp(t.0 + 3600),
            Grain::Day => Timestamp(t.0 + DAY),
            Grain::Week => Timestamp(t.0 + 7 * DAY),
            Grain::Month => {
                let (y, m, _) = civil_from_days(t.0.div_euclid(DAY));
                let (y, m) = if m == 12 { (y + 1, 1) } else { (y, m + 1) };
                Timestamp(days_from_civil(y, m, 1) * DAY)
            }
        }
    }

    /// Every period start from the period holding `from` up to (excluding) `to`.
    pub fn periods(self, from: Timestamp, to: Timestamp) -> Vec<Timestamp> {
        let mut out = Vec::new();
        let mut t = self.truncate(from);
        while t < to {
            out.push(t);
            t = self.next(t);
        }
        out
    }
}

#[cfg(test)]
mod grain_tests {
    use super::*;

    #[test]
    fn truncates_to_calendar_periods() {
        let t = Timestamp::parse("2026-03-04T15:42:00Z").unwrap(); // a Wednesday
        assert_eq!(Grain::Hour.truncate(t).to_iso(), "2026-03-04T15:00:00Z");
        assert_eq!(Grain::Day.truncate(t).to_iso(), "2026-03-04T00:00:00Z");
        assert_eq!(Grain::Week.truncate(t).to_iso(), "2026-03-02T00:00:00Z");
        assert_eq!(Grain::Month.truncate(t).to_iso(), "2026-03-01T00:00:00Z");
        assert_eq!(
            Grain::Month
                .next(Timestamp::parse("2026-12-01").unwrap())
                .to_iso(),
            "2027-01-01T00:00:00Z"
        );
        let weeks = Grain::Week.periods(t, Timestamp::parse("2026-03-20").unwrap());
        assert_eq!(weeks.len(), 3);
    }
}
