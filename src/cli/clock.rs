//! Times on the command line: one printed form for every table
//! (`2026-12-04 16:59:23Z`, UTC), and the forms `--since` / `--until`
//! accept: RFC 3339 (`2026-12-04T16:59:23Z`, `...+01:00`, fractions of a
//! second), the printed form itself so a time copied from a table can be
//! pasted back, a bare date (midnight UTC), and an age such as `90s`,
//! `30m`, `2h`, `7d` or `2w` before now.

/// Milliseconds since the Unix epoch now (0 if the clock is before 1970).
pub fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}

/// Days since 1970-01-01 of a civil date (Howard Hinnant's algorithm).
fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// The civil date of a day count since 1970-01-01 (the inverse).
fn civil_from_days(days: i64) -> (i64, i64, i64) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    (yoe + era * 400 + i64::from(m <= 2), m, d)
}

/// Unix milliseconds as the tables print them; "-" for none (0).
pub fn ms_to_text(ms: i64) -> String {
    if ms <= 0 {
        return "-".into();
    }
    let secs = ms / 1000;
    let (days, rem) = (secs / 86_400, secs % 86_400);
    let (y, m, d) = civil_from_days(days);
    format!(
        "{y:04}-{m:02}-{d:02} {:02}:{:02}:{:02}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

fn digits(s: &str, what: &str, text: &str) -> Result<i64, String> {
    if s.is_empty() || !s.bytes().all(|b| b.is_ascii_digit()) {
        return Err(format!("{text:?}: the {what} {s:?} is not a number"));
    }
    s.parse::<i64>()
        .map_err(|_| format!("{text:?}: the {what} {s:?} is too large"))
}

/// An age before `now_ms` (`2h`), or `None` when `text` is not one.
fn age(text: &str, now_ms: i64) -> Option<Result<i64, String>> {
    let unit = text.chars().last()?;
    let ms_per = match unit {
        's' => 1_000,
        'm' => 60_000,
        'h' => 3_600_000,
        'd' => 86_400_000,
        'w' => 7 * 86_400_000,
        _ => return None,
    };
    let n = &text[..text.len() - 1];
    if n.is_empty() || !n.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    Some(
        n.parse::<i64>()
            .ok()
            .and_then(|n| n.checked_mul(ms_per))
            .map(|back| now_ms.saturating_sub(back))
            .ok_or_else(|| format!("{text:?}: too far back")),
    )
}

/// Parses a time given on the command line into Unix milliseconds.
pub fn parse_time(text: &str, now_ms: i64) -> Result<i64, String> {
    let text = text.trim();
    if let Some(t) = age(text, now_ms) {
        return t;
    }
    let usage = || {
        format!(
            "{text:?} is not a time: use RFC 3339 (2026-12-04T16:00:00Z), a date \
             (2026-12-04) or an age (90s, 30m, 2h, 7d, 2w)"
        )
    };
    let b = text.as_bytes();
    if b.len() < 10 || b[4] != b'-' || b[7] != b'-' {
        return Err(usage());
    }
    let (y, m, d) = (
        digits(&text[0..4], "year", text)?,
        digits(&text[5..7], "month", text)?,
        digits(&text[8..10], "day", text)?,
    );
    if !(1..=12).contains(&m) || !(1..=31).contains(&d) {
        return Err(format!("{text:?}: no such date"));
    }
    let day_ms = days_from_civil(y, m, d) * 86_400_000;
    if b.len() == 10 {
        return Ok(day_ms);
    }
    if !matches!(b[10], b'T' | b't' | b' ') || b.len() < 19 || b[13] != b':' || b[16] != b':' {
        return Err(usage());
    }
    let (hh, mm, ss) = (
        digits(&text[11..13], "hour", text)?,
        digits(&text[14..16], "minute", text)?,
        digits(&text[17..19], "second", text)?,
    );
    if hh > 23 || mm > 59 || ss > 60 {
        return Err(format!("{text:?}: no such time of day"));
    }
    let mut rest = &text[19..];
    let mut frac_ms = 0;
    if let Some(f) = rest.strip_prefix('.') {
        let n = f.bytes().take_while(u8::is_ascii_digit).count();
        if n == 0 {
            return Err(usage());
        }
        let mut first3: String = f[..n].chars().take(3).collect();
        while first3.len() < 3 {
            first3.push('0');
        }
        frac_ms = digits(&first3, "fraction", text)?;
        rest = &f[n..];
    }
    let offset_ms = match rest {
        "Z" | "z" => 0,
        _ if rest.len() == 6
            && matches!(rest.as_bytes()[0], b'+' | b'-')
            && rest.as_bytes()[3] == b':' =>
        {
            let sign = if rest.starts_with('-') { -1 } else { 1 };
            let (oh, om) = (
                digits(&rest[1..3], "offset hour", text)?,
                digits(&rest[4..6], "offset minute", text)?,
            );
            sign * (oh * 3_600_000 + om * 60_000)
        }
        "" => {
            return Err(format!(
                "{text:?}: say which zone (a final Z for UTC, or an offset such as +01:00)"
            ))
        }
        _ => return Err(usage()),
    };
    Ok(day_ms + ((hh * 60 + mm) * 60 + ss) * 1000 + frac_ms - offset_ms)
}

#[cfg(test)]
mod tests {
    use super::*;

    const NOW: i64 = 1_796_400_000_000;

    #[test]
    fn rfc_3339_and_the_printed_form_read_back_to_the_same_instant() {
        let t = parse_time("2026-12-04T16:59:23Z", NOW).expect("rfc 3339");
        assert_eq!(ms_to_text(t), "2026-12-04 16:59:23Z");
        assert_eq!(parse_time("2026-12-04 16:59:23Z", NOW), Ok(t));
        assert_eq!(parse_time("2026-12-04T17:59:23+01:00", NOW), Ok(t));
        assert_eq!(parse_time("2026-12-04T16:59:23.250Z", NOW), Ok(t + 250));
        assert_eq!(
            parse_time("2026-12-04", NOW),
            Ok(t - ((16 * 60 + 59) * 60 + 23) * 1000)
        );
        // 2000-03-01 is day 11,017 since the epoch (a leap century).
        assert_eq!(
            parse_time("2000-03-01T00:00:00Z", NOW),
            Ok(11_017 * 86_400_000)
        );
    }

    #[test]
    fn ages_count_back_from_now() {
        assert_eq!(parse_time("2h", NOW), Ok(NOW - 7_200_000));
        assert_eq!(parse_time("7d", NOW), Ok(NOW - 7 * 86_400_000));
        assert_eq!(parse_time("90s", NOW), Ok(NOW - 90_000));
    }

    #[test]
    fn what_is_not_a_time_says_what_to_write() {
        for bad in [
            "yesterday",
            "2026-13-01",
            "2026-12-04T16:59:23",
            "h",
            "2026-12-04T25:00:00Z",
        ] {
            let e = parse_time(bad, NOW).expect_err(bad);
            assert!(e.contains(bad), "{e}");
        }
    }
}
