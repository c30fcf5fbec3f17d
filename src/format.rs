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
    let needs = digits as i64 - v.abs().log10().floor() as i64;
    if is_extreme(v) || needs > 16 {
        // 1e308 as 309 digits, or 5e-324 as "0", would read wrong, and fixed decimals stop at
        // 15 (two values a hair apart would print alike): the power of ten instead.
        let s = format!("{:.*e}", digits.max(1) - 1, v);
        let (mantissa, exp) = s.split_once('e').unwrap_or((&s, "0"));
        let mantissa = if mantissa.contains('.') {
            mantissa.trim_end_matches('0').trim_end_matches('.')
        } else {
            mantissa
        };
        return format!("{mantissa}e{exp}");
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

/// Whether `v` is too large or too small to print in plain decimals: from 1e16 (beyond every
/// whole number a double holds exactly) and below 1e-10 (where fixed decimals run out).
pub fn is_extreme(v: f64) -> bool {
    v.is_finite() && v != 0.0 && !(1e-10..1e16).contains(&v.abs())
}

/// `v` as a person would write it back: the shortest decimals that read back as the same
/// double, in powers of ten when it is extreme (`1e308`, not 309 digits).
pub fn plain(v: f64) -> String {
    if is_extreme(v) {
        format!("{v:e}")
    } else {
        v.to_string()
    }
}

/// The most bytes of a message kept as its raw text in a rejected reading's record.
pub const RAW_BYTES: usize = 200;

/// What arrived, as text for the record: the bytes as received, at most [`RAW_BYTES`] of
/// them (a cut is said, with the full length), bytes that are not UTF-8 written `\xNN` and
/// control characters `\u{..}`. Never the value parsed from them: `1e999` stays `1e999`.
pub fn raw_text(bytes: &[u8]) -> String {
    let cut = bytes.len() > RAW_BYTES;
    let shown = &bytes[..bytes.len().min(RAW_BYTES)];
    let mut out = String::with_capacity(shown.len() + 8);
    for chunk in shown.utf8_chunks() {
        for c in chunk.valid().chars() {
            if c.is_control() {
                out.push_str(&c.escape_unicode().to_string());
            } else {
                out.push(c);
            }
        }
        for b in chunk.invalid() {
            out.push_str(&format!("\\x{b:02x}"));
        }
    }
    if cut {
        out.push_str(&format!("… ({} bytes in all)", bytes.len()));
    }
    out
}

/// A number read from text, refused when the text is a number too large for a double
/// (`1e999`, a 500-digit integer) or names a non-number (`inf`, `NaN`): the error quotes the
/// text as it came. Rust's parser reads those as infinities or NaN without complaint.
pub fn finite_number(text: &str) -> Result<f64, String> {
    let t = text.trim();
    match t.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => Err(format!(
            "\"{}\" is not a finite number (beyond ±1.8e308, or not a number at all)",
            raw_text(t.as_bytes())
        )),
        Err(_) => Err(format!("\"{}\" is not a number", raw_text(t.as_bytes()))),
    }
}

/// [`sig`] with six significant digits, the default for limits and statistics.
pub fn num(v: f64) -> String {
    sig(v, 6)
}

/// `v` with exactly `decimals` decimals, trailing zeros kept (`12.0050`), so that the figures
/// of one characteristic line up and read alike.
pub fn fixed(v: f64, decimals: usize) -> String {
    if !v.is_finite() {
        return v.to_string();
    }
    if v.abs() >= 1e16 {
        // Fixed decimals of 1e308 are 309 digits that no one reads: the power of ten.
        return sig(v, 6);
    }
    let s = format!("{v:.decimals$}");
    // "-0.000" is zero.
    if s.starts_with('-') && s[1..].bytes().all(|c| c == b'0' || c == b'.') {
        s[1..].to_string()
    } else {
        s
    }
}

/// A value and the limit it is compared with, both with `decimals` decimals, or with as many
/// more as it takes for them to differ when they do: a value beyond a limit never prints equal
/// to it (12.00472 against 12.00468, not 12.0047 against 12.0047). Rounding both to the first
/// decimals where they differ keeps their order, so the comparison reads true.
pub fn fixed_pair(value: f64, limit: f64, decimals: usize) -> (String, String) {
    let mut d = decimals;
    loop {
        let (a, b) = (fixed(value, d), fixed(limit, d));
        if a != b || value == limit || d >= 15 {
            return (a, b);
        }
        d += 1;
    }
}

/// [`fixed_pair`] for figures without set decimals: six significant digits, trailing zeros
/// trimmed, and more digits where the two would otherwise print equal.
pub fn sig_pair(value: f64, limit: f64) -> (String, String) {
    sig_pair_at(value, limit, 6)
}

/// [`sig_pair`] starting from `digits` significant digits (Cpk 1.3298 against 1.33 prints
/// `1.3298` and `1.33`, never `1.33` against `1.33`).
pub fn sig_pair_at(value: f64, limit: f64, digits: usize) -> (String, String) {
    let d = pair_digits(value, limit, digits);
    (sig(value, d), sig(limit, d))
}

/// The significant digits, from `digits` up, at which `value` and `limit` print apart (or
/// equal, when they are): what [`sig_pair_at`] prints with, for figures printed beside them.
pub fn pair_digits(value: f64, limit: f64, digits: usize) -> usize {
    let mut d = digits;
    while sig(value, d) == sig(limit, d) && value != limit && d < 17 {
        d += 1;
    }
    d
}

/// An expected nonconforming rate in parts per million: three significant digits, and
/// `< 0.001` below a thousandth of a ppm (a figure like 0.000000000000331 ppm claims a
/// precision no normal model of real parts has).
pub fn ppm(p: f64) -> String {
    if p > 0.0 && p < 0.001 {
        "< 0.001".to_string()
    } else {
        sig(p, 3)
    }
}

/// A p-value: three significant digits, and `< 0.0001` below that (the approximations behind
/// small p-values are not exact, and a printed `p = 0` would claim an impossibility).
/// Written to follow "p": `= 0.0312` or `< 0.0001`.
pub fn p_words(p: f64) -> String {
    if p < 0.0001 {
        "< 0.0001".to_string()
    } else {
        format!("= {}", sig(p, 3))
    }
}

/// Decimals that show the figures of a chart whose plotted points have standard deviation
/// `spread`: one significant digit past the spread's first (a mean with sigma 0.002 mm prints
/// as 12.0043), at most 8. Common practice: show one digit more than the variation resolves.
pub fn decimals_for(spread: f64) -> usize {
    if !(spread.is_finite() && spread > 0.0) {
        return 4;
    }
    (1 - spread.log10().floor() as i64).clamp(0, 8) as usize
}

/// Milliseconds since 1970 as an RFC 3339 time in UTC with milliseconds
/// (`2026-12-02T08:00:00.250Z`), as the archive and the logs write times.
pub fn utc_ms(ms: i64) -> String {
    match jiff::Timestamp::from_millisecond(ms) {
        Ok(t) => format!("{t:.3}"),
        Err(_) => format!("{ms} ms since 1970"),
    }
}

/// Milliseconds since 1970 as the plant's local time with its offset
/// (`2026-12-02 09:14:03 +01:00`), for people; the archive stays in UTC.
pub fn local_ms(ms: i64, tz: &jiff::tz::TimeZone) -> String {
    match jiff::Timestamp::from_millisecond(ms) {
        Ok(t) => t
            .to_zoned_datetime(tz.clone())
            .strftime("%Y-%m-%d %H:%M:%S %:z")
            .to_string(),
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

/// Text made safe for HTML and SVG, in element content and in quoted attributes.
pub fn html(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            _ => o.push(c),
        }
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    /// What broke: a count of 1e308 was printed as 309 digits in a rejection's reason, and
    /// 5e-324 as "0" (a non-zero figure printed as zero reads false).
    #[test]
    fn extreme_numbers_print_in_powers_of_ten() {
        assert_eq!(sig(1e308, 6), "1e308");
        assert_eq!(sig(-f64::MAX, 6), "-1.79769e308");
        assert_eq!(sig(5e-324, 6), "4.94066e-324");
        assert_eq!(sig(1.5e-11, 6), "1.5e-11");
        assert_eq!(num(9_007_199_254_740_992.0), "9007199254740992");
        assert_eq!(num(12.0043), "12.0043");
        assert_eq!(num(0.000815), "0.000815");
        assert_eq!(fixed(1e308, 4), "1e308");
        assert_eq!(plain(1e308), "1e308");
        assert_eq!(plain(12.5), "12.5");
        assert_eq!(plain(12.0), "12");
        for v in [1e16, 1e-11, f64::MAX, f64::MIN_POSITIVE, 5e-324, -3.3e200] {
            assert_eq!(plain(v).parse::<f64>().unwrap(), v, "{v}");
        }
    }

    /// What broke: `1e999` was archived as "inf", a 500-digit number likewise, `0x14` with the
    /// topic before it. The text is what came, bounded and escaped.
    #[test]
    fn raw_text_is_what_arrived_bounded_and_escaped() {
        assert_eq!(raw_text(b"1e999"), "1e999");
        assert_eq!(raw_text(b"0x14"), "0x14");
        assert_eq!(raw_text(b"12.5\x07"), "12.5\\u{7}");
        assert_eq!(raw_text(b"\xff12"), "\\xff12");
        let long = "9".repeat(500);
        assert_eq!(
            raw_text(long.as_bytes()),
            format!("{}… (500 bytes in all)", "9".repeat(200))
        );
        // Cut inside a character: the partial bytes are written as bytes.
        let s = format!("{}é", "a".repeat(199));
        assert_eq!(
            raw_text(s.as_bytes()),
            format!("{}\\xc3… (201 bytes in all)", "a".repeat(199))
        );
        for t in [
            "1e999",
            "-1E400",
            "inf",
            "Infinity",
            "NaN",
            &"9".repeat(400),
        ] {
            let why = finite_number(t).unwrap_err();
            assert!(why.contains("not a finite number"), "{t}: {why}");
        }
        assert_eq!(finite_number(" 12.5 "), Ok(12.5));
        assert!(
            finite_number("0x14")
                .unwrap_err()
                .contains("\"0x14\" is not a number")
        );
    }

    /// The regression: `subgroup mean 12.0047 mm is above the upper control limit 12.0047 mm`.
    #[test]
    fn a_value_beyond_a_limit_never_prints_equal_to_it() {
        assert_eq!(fixed(12.0, 4), "12.0000");
        assert_eq!(fixed(-0.00001, 3), "0.000");
        assert_eq!(
            fixed_pair(12.00472, 12.00468, 4),
            ("12.00472".into(), "12.00468".into())
        );
        assert_eq!(
            fixed_pair(21.4643, 21.4642, 4),
            ("21.4643".into(), "21.4642".into())
        );
        assert_eq!(
            fixed_pair(12.0, 12.0, 3),
            ("12.000".into(), "12.000".into())
        );
        // A sweep: for values just past a limit, the printed pair always differs and keeps
        // its order.
        for k in 1..2000 {
            let limit = 12.0 + k as f64 * 1e-5;
            for gap in [1e-9, 1e-7, 3e-6, 1e-4] {
                let (a, b) = fixed_pair(limit + gap, limit, 4);
                assert_ne!(a, b, "{limit} + {gap}");
                assert!(a.parse::<f64>().unwrap() > b.parse::<f64>().unwrap());
                let (a, b) = fixed_pair(limit - gap, limit, 4);
                assert!(a.parse::<f64>().unwrap() < b.parse::<f64>().unwrap());
            }
        }
        let (a, b) = sig_pair(12.0047201, 12.0047199);
        assert!(a != b && a > b, "{a} {b}");
        assert_eq!(sig_pair(12.016, 12.015), ("12.016".into(), "12.015".into()));
        assert_eq!(decimals_for(0.002), 4);
        assert_eq!(decimals_for(0.02), 3);
        assert_eq!(decimals_for(3.0), 1);
    }

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
        let berlin = jiff::tz::TimeZone::get("Europe/Berlin").unwrap();
        assert_eq!(
            local_ms(1_796_198_400_250, &berlin),
            "2026-12-02 09:00:00 +01:00"
        );
        // Summer time (CEST, UTC+2) in July.
        let july = parse_rfc3339("2026-07-01T08:00:00Z").unwrap();
        assert_eq!(local_ms(july, &berlin), "2026-07-01 10:00:00 +02:00");
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
