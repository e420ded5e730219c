//! Values as people read them: an SI prefix and up to five significant digits ("47 µH", "100 kHz").
//! Pure text formatting, shared by the command line, the verdict notes and the demo.

/// Engineering notation with an SI prefix: 4.7e-5, "H" → "47.0 µH".
pub fn eng(value: f64, unit: &str) -> String {
    if !value.is_finite() {
        return format!("{value} {unit}");
    }
    if value == 0.0 {
        return format!("0 {unit}");
    }
    const PREFIXES: [(f64, &str); 11] = [
        (1e12, "T"),
        (1e9, "G"),
        (1e6, "M"),
        (1e3, "k"),
        (1.0, ""),
        (1e-3, "m"),
        (1e-6, "µ"),
        (1e-9, "n"),
        (1e-12, "p"),
        (1e-15, "f"),
        (1e-18, "a"),
    ];
    let a = value.abs();
    let (scale, prefix) = PREFIXES
        .iter()
        .copied()
        .find(|(s, _)| a >= *s * 0.9995)
        .unwrap_or((1e-18, "a"));
    let digits = format!("{:.4}", value / scale);
    let digits = digits.trim_end_matches('0').trim_end_matches('.');
    format!("{digits} {prefix}{unit}")
}

/// Reads a number as people write it: an optional SI prefix (p, n, u/µ, m, k, M, G, T) and an optional
/// unit (Hz, Ω, ohm), with or without a space: "100k", "46.35m", "1.5 MHz", "2.2µ", "1e5". The
/// prefix is case-sensitive as in SI ("m" milli, "M" mega).
pub fn parse_si(text: &str) -> Result<f64, String> {
    let t = text.trim();
    let t = ["Hz", "hz", "ohms", "ohm", "Ω"]
        .iter()
        .find_map(|u| t.strip_suffix(u))
        .unwrap_or(t)
        .trim_end();
    let scale = |c: char| match c {
        'p' => Some(1e-12),
        'n' => Some(1e-9),
        'u' | 'µ' | 'μ' => Some(1e-6),
        'm' => Some(1e-3),
        'k' => Some(1e3),
        'M' => Some(1e6),
        'G' => Some(1e9),
        'T' => Some(1e12),
        _ => None,
    };
    let (number, factor) = match t.chars().last().and_then(|c| scale(c).map(|s| (c, s))) {
        Some((c, s)) => (t[..t.len() - c.len_utf8()].trim_end(), s),
        None => (t, 1.0),
    };
    match number.parse::<f64>() {
        Ok(x) if x.is_finite() => Ok(x * factor),
        _ => Err(format!(
            "{text:?} is not a number (SI prefixes p, n, u, m, k, M, G, T are understood)"
        )),
    }
}

/// [`parse_si`] for a quantity that must be finite and above zero (a frequency, a resistance, a length).
pub fn parse_positive_si(text: &str) -> Result<f64, String> {
    match parse_si(text) {
        Ok(x) if x > 0.0 => Ok(x),
        Ok(x) => Err(format!("{x} is not a positive number")),
        Err(e) => Err(e),
    }
}

/// [`parse_si`] for a whole count such as a number of bytes: "32M" is 32 000 000 (SI prefixes are
/// powers of ten, not of two).
pub fn parse_si_count(text: &str) -> Result<usize, String> {
    let x = parse_si(text)?;
    if x < 0.0 || x.fract() != 0.0 || x > usize::MAX as f64 {
        return Err(format!("{text:?} is not a whole number of at least 0"));
    }
    Ok(x as usize)
}

#[cfg(test)]
mod parse_tests {
    use super::parse_si;

    #[test]
    fn numbers_with_si_prefixes_and_units() {
        for (text, want) in [
            ("100k", 1e5),
            ("46.35m", 0.04635),
            ("1.5 MHz", 1.5e6),
            ("2.2µ", 2.2e-6),
            ("2.2u", 2.2e-6),
            ("10kHz", 1e4),
            ("50", 50.0),
            ("1e5", 1e5),
            ("47 Ω", 47.0),
            ("3G", 3e9),
            ("10p", 1e-11),
        ] {
            let got = parse_si(text).unwrap();
            assert!((got / want - 1.0).abs() < 1e-12, "{text}: {got}");
        }
        for bad in ["", "k", "abc", "1x", "1.2.3", "inf", "NaN"] {
            assert!(parse_si(bad).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn positive_values_and_counts() {
        use super::{parse_positive_si, parse_si_count};
        assert_eq!(parse_positive_si("500m"), Ok(0.5));
        assert!(
            parse_positive_si("0")
                .unwrap_err()
                .contains("not a positive number")
        );
        assert!(parse_positive_si("-3k").is_err());
        assert_eq!(parse_si_count("32M"), Ok(32_000_000));
        assert_eq!(parse_si_count("1.5k"), Ok(1500));
        assert_eq!(parse_si_count("4096"), Ok(4096));
        for bad in ["1.5", "-1", "2.5m", "x"] {
            assert!(parse_si_count(bad).is_err(), "{bad:?}");
        }
    }
}
