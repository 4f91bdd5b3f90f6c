//! Axes: linear scales, round tick values and their labels, and times
//! written out in UTC (no time-zone database, no dependency).

/// Maps a domain interval onto a pixel interval.
#[derive(Debug, Clone, Copy)]
pub struct Linear {
    pub d0: f64,
    pub d1: f64,
    pub r0: f64,
    pub r1: f64,
}

impl Linear {
    pub fn new((d0, d1): (f64, f64), (r0, r1): (f64, f64)) -> Self {
        Self { d0, d1, r0, r1 }
    }

    /// The pixel of a value; the middle of the range when the domain is a
    /// point.
    pub fn at(&self, v: f64) -> f64 {
        let span = self.d1 - self.d0;
        if span.abs() < f64::MIN_POSITIVE || !span.is_finite() {
            return (self.r0 + self.r1) / 2.0;
        }
        self.r0 + (v - self.d0) / span * (self.r1 - self.r0)
    }
}

/// A round step (1, 2 or 5 times a power of ten) giving about `count`
/// intervals over `span`.
pub fn round_step(span: f64, count: usize) -> f64 {
    let raw = span.abs() / count.max(1) as f64;
    if raw <= 0.0 || !raw.is_finite() {
        return 1.0;
    }
    let power = 10f64.powf(raw.log10().floor());
    let unit = raw / power;
    let nice = if unit <= 1.0 {
        1.0
    } else if unit <= 2.0 {
        2.0
    } else if unit <= 5.0 {
        5.0
    } else {
        10.0
    };
    nice * power
}

/// A domain widened to round steps around `lo..hi` (padded when it is a
/// point), with its step and ticks.
#[derive(Debug, Clone, PartialEq)]
pub struct Ticks {
    pub lo: f64,
    pub hi: f64,
    pub step: f64,
    pub values: Vec<f64>,
}

pub fn ticks(lo: f64, hi: f64, count: usize) -> Ticks {
    let (mut lo, mut hi) = if lo.is_finite() && hi.is_finite() {
        (lo.min(hi), lo.max(hi))
    } else {
        (0.0, 1.0)
    };
    if hi - lo < 1e-12 * lo.abs().max(1.0) {
        let pad = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
        lo -= pad;
        hi += pad;
    }
    let step = round_step(hi - lo, count);
    let lo = (lo / step).floor() * step;
    let hi = (hi / step).ceil() * step;
    let n = ((hi - lo) / step).round() as usize;
    let values = (0..=n)
        .map(|i| {
            let v = lo + i as f64 * step;
            // -0.0 and 1e-17 both print as 0.
            if v.abs() < step * 1e-9 {
                0.0
            } else {
                v
            }
        })
        .collect();
    Ticks {
        lo,
        hi,
        step,
        values,
    }
}

/// A tick value with as many decimals as its step needs.
pub fn tick_label(v: f64, step: f64) -> String {
    let decimals = if step >= 1.0 {
        0
    } else {
        (-step.log10().floor()) as usize
    };
    let v = if v.abs() < step * 1e-9 { 0.0 } else { v };
    format!("{v:.decimals$}")
}

/// A value to four significant digits, without exponent notation for the
/// sizes scores have; "n/a" when not finite.
pub fn sig(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    if v == 0.0 {
        return "0".into();
    }
    let magnitude = v.abs().log10().floor() as i32;
    if !(-6..=9).contains(&magnitude) {
        return format!("{v:.3e}");
    }
    let decimals = (3 - magnitude).max(0) as usize;
    format!("{v:.decimals$}")
}

/// As [`sig`] with a sign always written.
pub fn signed(v: f64) -> String {
    let s = sig(v);
    if v > 0.0 && v.is_finite() {
        format!("+{s}")
    } else {
        s
    }
}

/// A share as a percentage: one decimal, more below 1% so that a small
/// share does not read as zero.
pub fn percent(share: f64) -> String {
    if !share.is_finite() {
        return "n/a".into();
    }
    let p = 100.0 * share;
    let decimals = match p.abs() {
        a if a == 0.0 || a >= 1.0 => 1,
        a if a >= 0.1 => 2,
        _ => 3,
    };
    format!("{p:.decimals$}%")
}

/// A calendar time in UTC.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Utc {
    pub year: i64,
    pub month: u32,
    pub day: u32,
    pub hour: u32,
    pub minute: u32,
    pub second: u32,
}

/// Milliseconds since the Unix epoch as a UTC calendar time (the proleptic
/// Gregorian calendar; H. Hinnant's days-to-civil algorithm).
pub fn utc(ms: i64) -> Utc {
    let secs = ms.div_euclid(1000);
    let days = secs.div_euclid(86_400);
    let rem = secs.rem_euclid(86_400);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let month = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    let year = yoe + era * 400 + i64::from(month <= 2);
    Utc {
        year,
        month,
        day,
        hour: (rem / 3600) as u32,
        minute: (rem % 3600 / 60) as u32,
        second: (rem % 60) as u32,
    }
}

/// `2026-04-12 08:31:05 UTC`.
pub fn datetime(ms: i64) -> String {
    let t = utc(ms);
    format!(
        "{:04}-{:02}-{:02} {:02}:{:02}:{:02} UTC",
        t.year, t.month, t.day, t.hour, t.minute, t.second
    )
}

/// How long ago, in the largest whole unit: `5 s`, `3 min`, `2 h`, `4 days`.
pub fn ago(ms: i64) -> String {
    let s = (ms / 1000).max(0);
    match s {
        0..=119 => format!("{s} s"),
        120..=7199 => format!("{} min", s / 60),
        7200..=172_799 => format!("{} h", s / 3600),
        _ => format!("{} days", s / 86_400),
    }
}

const SECOND: i64 = 1000;
const MINUTE: i64 = 60 * SECOND;
const HOUR: i64 = 60 * MINUTE;
const DAY: i64 = 24 * HOUR;

/// Round time steps, smallest first.
const TIME_STEPS: [i64; 24] = [
    100,
    200,
    500,
    SECOND,
    2 * SECOND,
    5 * SECOND,
    10 * SECOND,
    15 * SECOND,
    30 * SECOND,
    MINUTE,
    2 * MINUTE,
    5 * MINUTE,
    10 * MINUTE,
    15 * MINUTE,
    30 * MINUTE,
    HOUR,
    2 * HOUR,
    3 * HOUR,
    6 * HOUR,
    12 * HOUR,
    DAY,
    2 * DAY,
    7 * DAY,
    28 * DAY,
];

/// A time domain around `lo..=hi`: widened to at least `min_span_ms`
/// about its middle, then given a margin of 3% on each side so that no
/// mark sits on the frame.
pub fn time_domain(lo: i64, hi: i64, min_span_ms: i64) -> (i64, i64) {
    let (mut lo, mut hi) = (lo.min(hi), lo.max(hi));
    if hi - lo < min_span_ms {
        let pad = (min_span_ms - (hi - lo)) / 2;
        lo -= pad;
        hi += pad;
    }
    let margin = (hi - lo) * 3 / 100;
    (lo - margin, hi + margin)
}

/// Ticks at round UTC times inside `lo..=hi`, at most about `count`, each
/// with a label: tenths of a second under a second, seconds when the step
/// is under a minute, hours and
/// minutes under a day, else the date. A tick that starts a new day (and
/// the first) carries the date too.
pub fn time_ticks(lo: i64, hi: i64, count: usize) -> Vec<(i64, String)> {
    let span = (hi - lo).max(1);
    let step = TIME_STEPS
        .iter()
        .copied()
        .find(|s| span / s <= count.max(1) as i64)
        .unwrap_or(TIME_STEPS[TIME_STEPS.len() - 1]);
    let first = lo.div_euclid(step) * step + if lo.rem_euclid(step) == 0 { 0 } else { step };
    let mut out = Vec::new();
    let mut last_day = None;
    let mut t = first;
    while t <= hi {
        let c = utc(t);
        let day = (c.year, c.month, c.day);
        let new_day = last_day != Some(day);
        last_day = Some(day);
        let date = format!("{:02}-{:02}", c.month, c.day);
        let label = if step >= DAY {
            date
        } else {
            let clock = if step < SECOND {
                format!(
                    "{:02}:{:02}:{:02}.{}",
                    c.hour,
                    c.minute,
                    c.second,
                    t.rem_euclid(SECOND) / 100
                )
            } else if step < MINUTE {
                format!("{:02}:{:02}:{:02}", c.hour, c.minute, c.second)
            } else {
                format!("{:02}:{:02}", c.hour, c.minute)
            };
            if new_day && step >= HOUR {
                format!("{date} {clock}")
            } else {
                clock
            }
        };
        out.push((t, label));
        t += step;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_and_cover_the_values() {
        let t = ticks(-0.137, 0.42, 6);
        assert_eq!(t.step, 0.1);
        assert!(t.lo <= -0.137 && t.hi >= 0.42);
        assert_eq!(t.values.len(), 8);
        assert!(t.values.contains(&0.0));
        assert_eq!(tick_label(t.values[0], t.step), "-0.2");
        assert_eq!(tick_label(0.30000000000000004, 0.1), "0.3");
        let p = ticks(2.0, 2.0, 5);
        assert!(p.lo < 2.0 && p.hi > 2.0, "a point is padded: {p:?}");
        let z = ticks(0.0, 0.0, 5);
        assert!(z.lo < 0.0 && z.hi > 0.0);
        assert_eq!(ticks(f64::NAN, 1.0, 4).lo, 0.0);
    }

    #[test]
    fn numbers_keep_four_significant_digits() {
        assert_eq!(sig(0.012345), "0.01235");
        assert_eq!(sig(1234.5), "1234");
        assert_eq!(sig(-3.0), "-3.000");
        assert_eq!(signed(0.5), "+0.5000");
        assert_eq!(sig(f64::NAN), "n/a");
        assert_eq!(percent(0.1234), "12.3%");
        assert_eq!(percent(0.0), "0.0%");
        assert_eq!(percent(0.00234), "0.23%");
        assert_eq!(percent(0.0001234), "0.012%");
    }

    #[test]
    fn utc_calendar_matches_known_dates() {
        assert_eq!(datetime(0), "1970-01-01 00:00:00 UTC");
        // 2024-02-29 12:34:56 UTC, a leap day.
        assert_eq!(datetime(1_709_210_096_000), "2024-02-29 12:34:56 UTC");
        assert_eq!(datetime(1_767_225_599_000), "2025-12-31 23:59:59 UTC");
        assert_eq!(datetime(-1000), "1969-12-31 23:59:59 UTC");
    }

    #[test]
    fn time_ticks_pick_round_steps_and_readable_labels() {
        let t0 = 1_709_210_096_000;
        let seconds = time_ticks(t0, t0 + 20_000, 6);
        assert!(seconds.len() >= 3 && seconds.len() <= 7, "{seconds:?}");
        assert!(seconds[0].1.matches(':').count() == 2, "{seconds:?}");
        let tenths = time_ticks(t0, t0 + 1500, 6);
        assert!(tenths.iter().all(|(_, l)| l.len() == 10), "{tenths:?}");
        let hours = time_ticks(t0, t0 + 30 * HOUR, 6);
        assert!(hours[0].0 % (6 * HOUR) == 0, "{hours:?}");
        assert!(hours[0].1.starts_with("02-29 "), "{hours:?}");
        assert!(
            hours.iter().any(|(_, l)| l.starts_with("03-01 ")),
            "{hours:?}"
        );
        let days = time_ticks(t0, t0 + 20 * DAY, 6);
        assert!(days.iter().all(|(_, l)| l.len() == 5), "{days:?}");
        assert_eq!(time_domain(10, 10, 100), (-43, 63));
        assert_eq!(time_domain(0, 1000, 100), (-30, 1030));
        assert_eq!(ago(5_000), "5 s");
        assert_eq!(ago(3 * HOUR), "3 h");
    }
}
