//! Number formatting shared by reports, messages and files.

/// Formats `v` with up to `digits` significant digits, trimming trailing zeros, so that reports
/// show 12.0043 rather than 12.004300000000001 and 0.000815 rather than 0.001.
pub fn sig(v: f64, digits: usize) -> String {
    if !v.is_finite() {
        return v.to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let magnitude = v.abs().log10().floor() as i64;
    let decimals = (digits as i64 - 1 - magnitude).clamp(0, 15) as usize;
    let mut s = format!("{v:.decimals$}");
    if s.contains('.') {
        while s.ends_with('0') {
            s.pop();
        }
        if s.ends_with('.') {
            s.pop();
        }
    }
    if s == "-0" { "0".to_string() } else { s }
}

/// [`sig`] with six significant digits, the default for limits and statistics.
pub fn num(v: f64) -> String {
    sig(v, 6)
}

/// Milliseconds since 1970 as an RFC 3339 time in UTC with milliseconds
/// (`2026-12-02T08:00:00.250Z`), as the archive and the logs write times.
pub fn utc_ms(ms: i64) -> String {
    match jiff::Timestamp::from_millisecond(ms) {
        Ok(t) => format!("{t:.3}"),
        Err(_) => format!("{ms} ms since 1970"),
    }
}

/// Reads an RFC 3339 time (RFC 3339 §5.6: `T` or `t`, and as the section's note allows a
/// space, between date and time; `Z`, `z` or a numeric offset `+01:00` / `-05:00`; any number
/// of fraction digits, of which milliseconds are kept) as milliseconds since 1970 UTC.
pub fn parse_rfc3339(text: &str) -> Result<i64, String> {
    let t = text.trim();
    // The grammar: full-date ("T" / "t" / " ") partial-time time-offset.
    let b = t.as_bytes();
    let shape_ok = t.is_ascii()
        && b.len() >= 20
        && b[4] == b'-'
        && b[7] == b'-'
        && matches!(b[10], b'T' | b't' | b' ')
        && b[13] == b':'
        && b[16] == b':';
    if !shape_ok {
        return Err("expected a date and time with an offset, such as 2026-12-02T08:00:00+01:00 or 2026-12-02T07:00:00Z".into());
    }
    let offset_at = t[19..]
        .find(['Z', 'z', '+', '-'])
        .map(|i| i + 19)
        .ok_or("the time has no offset (Z or +hh:mm / -hh:mm)")?;
    let offset = &t[offset_at..];
    let offset_ok = offset.eq_ignore_ascii_case("z")
        || (offset.len() == 6
            && offset.as_bytes()[3] == b':'
            && offset[1..3].bytes().all(|c| c.is_ascii_digit())
            && offset[4..6].bytes().all(|c| c.is_ascii_digit()));
    if !offset_ok {
        return Err(format!(
            "\"{offset}\" is not an offset (Z, +hh:mm or -hh:mm)"
        ));
    }
    // Fraction digits past nanoseconds carry nothing a reading needs; keep nine.
    let mut main = t[..offset_at].to_string();
    if let Some(dot) = main.find('.') {
        let digits = &main[dot + 1..];
        if digits.is_empty() || !digits.bytes().all(|c| c.is_ascii_digit()) {
            return Err("the fraction of a second is not digits".into());
        }
        main.truncate(dot + 1 + digits.len().min(9));
    } else if main.len() != 19 {
        return Err("the time of day is not hh:mm:ss".into());
    }
    main.replace_range(10..11, "T");
    let mut normal = main;
    normal.push_str(if offset.eq_ignore_ascii_case("z") {
        "Z"
    } else {
        offset
    });
    normal
        .parse::<jiff::Timestamp>()
        .map(|ts| ts.as_millisecond())
        .map_err(|e| e.to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rfc3339_times_with_any_offset_are_read() {
        // RFC 3339 §5.8 gives these examples; the figures below are the same instants in ms.
        let utc = parse_rfc3339("1985-04-12T23:20:50.52Z").unwrap();
        assert_eq!(utc, 482_196_050_520);
        assert_eq!(
            parse_rfc3339("1996-12-19T16:39:57-08:00").unwrap(),
            parse_rfc3339("1996-12-20T00:39:57Z").unwrap()
        );
        assert_eq!(
            parse_rfc3339("2026-12-02T09:00:00+01:00").unwrap(),
            parse_rfc3339("2026-12-02T08:00:00Z").unwrap()
        );
        assert_eq!(
            parse_rfc3339("2026-12-02t08:00:00.250z").unwrap(),
            1_796_198_400_250
        );
        assert_eq!(
            parse_rfc3339("2026-12-02 08:00:00.250123456789Z").unwrap(),
            1_796_198_400_250
        );
        // RFC 3339 §5.8: a leap second, here at the end of 1990 in UTC.
        assert!(parse_rfc3339("1990-12-31T23:59:60Z").is_ok());
        for bad in [
            "2026-12-02",
            "2026-12-02T08:00:00",
            "2026-12-02T08:00Z",
            "2026-12-02T08:00:00+0100",
            "2026-13-02T08:00:00Z",
            "yesterday",
            "2026-12-02T08:00:00.Z",
        ] {
            assert!(parse_rfc3339(bad).is_err(), "{bad} was read");
        }
        assert_eq!(utc_ms(1_796_198_400_250), "2026-12-02T08:00:00.250Z");
    }

    #[test]
    fn trims_and_rounds() {
        assert_eq!(num(12.0043 + 1e-15), "12.0043");
        assert_eq!(num(0.000815), "0.000815");
        assert_eq!(num(-0.0000001), "-0.0000001");
        assert_eq!(num(370.398), "370.398");
        assert_eq!(sig(1.0 / 3.0, 3), "0.333");
        assert_eq!(num(0.0), "0");
        assert_eq!(num(1500.0), "1500");
    }
}
