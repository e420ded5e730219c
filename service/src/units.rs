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
