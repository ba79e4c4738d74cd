//! Time stamps of monitor exports.

/// Days from 1970-01-01 to a civil date (Hinnant's `days_from_civil` algorithm).
pub fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = if y >= 0 { y } else { y - 399 } / 400;
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// Parse an ISO 8601 date-time (`YYYY-MM-DDTHH:MM:SS[.f][Z|+HH:MM]`, `T` or space) to
/// seconds since 1970-01-01 UTC. No offset means UTC.
pub fn parse_iso8601(s: &str) -> Option<f64> {
    let s = s.trim();
    let b = s.as_bytes();
    if b.len() < 19 || b[4] != b'-' || b[7] != b'-' || (b[10] != b'T' && b[10] != b' ') {
        return None;
    }
    if b[13] != b':' || b[16] != b':' {
        return None;
    }
    let num = |r: std::ops::Range<usize>| -> Option<i64> {
        let t = s.get(r)?;
        if t.bytes().all(|c| c.is_ascii_digit()) {
            t.parse().ok()
        } else {
            None
        }
    };
    let (y, mo, d) = (num(0..4)?, num(5..7)?, num(8..10)?);
    let (h, mi, se) = (num(11..13)?, num(14..16)?, num(17..19)?);
    if !(1..=12).contains(&mo) || !(1..=31).contains(&d) || h > 23 || mi > 59 || se > 60 {
        return None;
    }
    let mut rest = &s[19..];
    let mut frac = 0.0;
    if let Some(r) = rest.strip_prefix('.') {
        let n = r.bytes().take_while(|c| c.is_ascii_digit()).count();
        if n == 0 {
            return None;
        }
        frac = format!("0.{}", &r[..n]).parse().ok()?;
        rest = &r[n..];
    }
    let offset = match rest {
        "" | "Z" | "z" => 0,
        o if o.len() == 6 && (o.starts_with('+') || o.starts_with('-')) && &o[3..4] == ":" => {
            let hh: i64 = o[1..3].parse().ok()?;
            let mm: i64 = o[4..6].parse().ok()?;
            let sign = if o.starts_with('-') { -1 } else { 1 };
            sign * (hh * 3600 + mm * 60)
        }
        _ => return None,
    };
    let days = days_from_civil(y, mo, d);
    Some((days * 86_400 + h * 3600 + mi * 60 + se - offset) as f64 + frac)
}

/// Parse a date (`18/09/2026`, `09-18-2026`, `2026.09.18`: any of `/`, `-`, `.` between
/// day, month and a four-digit year in `order`) and a time of day (`09:00:03[.f]`, UTC) to
/// seconds since 1970-01-01 UTC.
pub fn parse_date_time(
    date: &str,
    time: &str,
    order: crate::ingest::settings::DateOrder,
) -> Option<f64> {
    use crate::ingest::settings::DateOrder;
    let parts: Vec<&str> = date.trim().split(['/', '-', '.']).collect();
    if parts.len() != 3
        || parts
            .iter()
            .any(|p| p.is_empty() || !p.bytes().all(|c| c.is_ascii_digit()))
    {
        return None;
    }
    let (y, m, d) = match order {
        DateOrder::Dmy => (parts[2], parts[1], parts[0]),
        DateOrder::Mdy => (parts[2], parts[0], parts[1]),
        DateOrder::Ymd => (parts[0], parts[1], parts[2]),
    };
    if y.len() != 4 || m.len() > 2 || d.len() > 2 {
        return None;
    }
    let t = time.trim();
    // hh:mm:ss with an optional fraction; a one-digit hour is allowed.
    let t = if t.find(':') == Some(1) {
        format!("0{t}")
    } else {
        t.to_string()
    };
    parse_iso8601(&format!("{y}-{m:0>2}-{d:0>2}T{t}Z"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn separate_date_and_time_columns() {
        use crate::ingest::settings::DateOrder::*;
        let want = Some(946_684_801.5);
        assert_eq!(parse_date_time("01/01/2000", "00:00:01.5", Dmy), want);
        assert_eq!(parse_date_time("1-1-2000", "0:00:01.5", Mdy), want);
        assert_eq!(parse_date_time("2000.01.01", "00:00:01.5", Ymd), want);
        // 18 September 2026 09:00:00 UTC (1 789 722 000 s, as the simulator writes it).
        assert_eq!(
            parse_date_time("18/09/2026", "09:00:00", Dmy),
            Some(1_789_722_000.0)
        );
        assert_eq!(parse_date_time("18/09/2026", "09:00:00", Mdy), None);
        assert_eq!(parse_date_time("18/09/26", "09:00:00", Dmy), None);
        assert_eq!(parse_date_time("18/09/2026", "9h00", Dmy), None);
    }

    #[test]
    fn iso8601_by_hand() {
        // 2000-01-01T00:00:00Z is 946 684 800 s after the epoch (known constant).
        assert_eq!(parse_iso8601("2000-01-01T00:00:00Z"), Some(946_684_800.0));
        assert_eq!(parse_iso8601("2000-01-01 00:00:01.5"), Some(946_684_801.5));
        assert_eq!(
            parse_iso8601("2000-01-01T02:00:00+02:00"),
            Some(946_684_800.0)
        );
        assert_eq!(parse_iso8601("1970-01-01T00:00:00Z"), Some(0.0));
        assert_eq!(parse_iso8601("2000-13-01T00:00:00Z"), None);
        assert_eq!(parse_iso8601("yesterday"), None);
    }
}
