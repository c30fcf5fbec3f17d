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

#[cfg(test)]
mod tests {
    use super::*;

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
