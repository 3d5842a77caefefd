//! How numbers are written, in one place for every crate: exactly (for
//! data a program reads back: CSV, TOML, environment variables, messages
//! that quote a value) or briefly (for tables people read).

/// The shortest text that reads back as exactly `x` (Rust's round-trip
/// formatting), in exponent notation below 1e-6 and from 1e15 on, so that
/// every language's number parser reads it: `0.05`, `3`, `-2.25e-9`, `1e300`.
pub fn exact(x: f64) -> String {
    let a = x.abs();
    if a == 0.0 || !a.is_finite() || (1e-6..1e15).contains(&a) {
        format!("{x}")
    } else {
        format!("{x:e}")
    }
}

/// Four significant digits, trailing zeros dropped; exponent notation below
/// 1e-4 and from 1e6 on: `9.612`, `50`, `0.0001234`, `1.500e9`.
pub fn short(x: f64) -> String {
    significant(x, 4)
}

/// `digits` significant digits (at least 1), trailing zeros dropped;
/// exponent notation below 1e-4 and from 10^(digits + 2) on.
pub fn significant(x: f64, digits: usize) -> String {
    let digits = digits.max(1);
    if x == 0.0 || !x.is_finite() {
        return format!("{x}");
    }
    let mag = x.abs().log10().floor() as i32;
    if !(-4..digits as i32 + 2).contains(&mag) {
        return format!("{x:.prec$e}", prec = digits - 1);
    }
    let decimals = (digits as i32 - 1 - mag).max(0) as usize;
    let s = format!("{x:.decimals$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// A value of a parameter: whole numbers of integer parameters without a
/// decimal point, others [`exact`].
pub fn value(x: f64, integer: bool) -> String {
    if integer && x.is_finite() && x.abs() < 9.007_199_254_740_992e15 {
        format!("{}", x.round() as i64)
    } else {
        exact(x)
    }
}

/// A decimal number as TOML writes it: whole numbers keep a `.0` so that
/// they read as decimals (`20.0`), others [`exact`].
pub fn toml_decimal(x: f64) -> String {
    if x.fract() == 0.0 && x.abs() < 1e15 {
        format!("{x:.1}")
    } else {
        exact(x)
    }
}

/// `text` followed by its unit, if it has one: `12.5 um`.
pub fn with_unit(text: impl Into<String>, unit: &str) -> String {
    let mut s = text.into();
    if !unit.is_empty() {
        s.push(' ');
        s.push_str(unit);
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exact_reads_back_exactly() {
        for x in [
            0.1,
            1.0 / 3.0,
            6.02e23,
            -1e-12,
            25854.295647428462,
            5e-324,
            1e308,
        ] {
            assert_eq!(exact(x).parse::<f64>().ok(), Some(x), "{x:e}");
        }
        assert_eq!(exact(0.5), "0.5");
        assert_eq!(exact(3.0), "3");
        assert_eq!(exact(-2.25e-9), "-2.25e-9");
        assert_eq!(exact(1e300), "1e300");
        assert_eq!(exact(-0.0), "-0");
    }

    #[test]
    fn short_numbers() {
        assert_eq!(short(9.6123), "9.612");
        assert_eq!(short(-4.6), "-4.6");
        assert_eq!(short(50.0), "50");
        assert_eq!(short(0.0001234), "0.0001234");
        assert_eq!(short(1.5e9), "1.500e9");
        assert_eq!(significant(0.397887357, 6), "0.397887");
        assert_eq!(significant(14794.4, 6), "14794.4");
        assert_eq!(significant(-1e-7, 6), "-1.00000e-7");
    }

    #[test]
    fn values_toml_and_units() {
        assert_eq!(value(6.0, true), "6");
        assert_eq!(value(6.25, false), "6.25");
        assert_eq!(toml_decimal(20.0), "20.0");
        assert_eq!(toml_decimal(0.125), "0.125");
        assert_eq!(with_unit("3", "um"), "3 um");
        assert_eq!(with_unit("3", ""), "3");
    }
}
