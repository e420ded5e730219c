//! What the fuzz targets assert about every answer, beyond "no panic, no abort, no hang": a refusal
//! is a clear error with a line inside the input, and an accepted file gives a sweep (or network) the
//! rest of henrybook can rely on.

use henrybook::sweep::assemble::LISTED_MERGES;
use henrybook::sweep::{Method, Network, Sweep, SweepError};

/// The methods a target picks from with one selector byte.
pub const METHODS: [Option<Method>; 5] = [
    None,
    Some(Method::Reflection),
    Some(Method::SeriesThru),
    Some(Method::ShuntThru),
    Some(Method::Direct),
];

fn line_count(bytes: &[u8]) -> usize {
    bytes.split(|&b| b == b'\n').count()
}

/// A refusal: a message, and a line that exists in the input.
pub fn assert_clear(err: &SweepError, bytes: &[u8]) {
    assert!(!err.message.trim().is_empty(), "empty error message");
    if let Some(l) = err.line {
        let lines = line_count(bytes);
        assert!(
            l >= 1 && l <= lines,
            "line {l} outside an input of {lines} lines: {err}"
        );
    }
}

/// An accepted file: a valid sweep (strictly increasing finite grid above 0 Hz, finite impedance,
/// positive σ, a sane DC reading), bounded warnings, lines inside the input.
pub fn assert_sweep(s: &Sweep, bytes: &[u8]) {
    if let Err(e) = s.validate() {
        panic!("the reader returned an invalid sweep: {e}");
    }
    assert!(
        s.warnings.len() <= LISTED_MERGES + 2,
        "{} warnings",
        s.warnings.len()
    );
    if let Some(dc) = &s.dc_reading {
        let lines = line_count(bytes);
        assert!(dc.line >= 1 && dc.line <= lines, "{dc:?}");
    }
}

/// An accepted Touchstone network: 1 or 2 ports, one full matrix per frequency, a never decreasing
/// finite grid, lines increasing and inside the input.
pub fn assert_network(n: &Network, bytes: &[u8]) {
    assert!(n.ports == 1 || n.ports == 2, "{} ports", n.ports);
    assert_eq!(n.reference_ohm.len(), n.ports);
    assert_eq!(n.data.len(), n.frequency_hz.len());
    assert_eq!(n.line.len(), n.frequency_hz.len());
    assert!(!n.frequency_hz.is_empty());
    for m in &n.data {
        assert_eq!(m.len(), n.ports * n.ports);
        assert!(m.iter().all(|c| c.re.is_finite() && c.im.is_finite()));
    }
    assert!(n.frequency_hz.iter().all(|f| f.is_finite() && *f >= 0.0));
    assert!(n.frequency_hz.windows(2).all(|w| w[0] <= w[1]));
    let lines = line_count(bytes);
    assert!(n.line.windows(2).all(|w| w[0] < w[1]));
    assert!(n.line.iter().all(|&l| l >= 1 && l <= lines));
}
