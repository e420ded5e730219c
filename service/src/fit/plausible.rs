//! Plausible ranges of the lumped model's elements, as soft walls on the log-parameters
//! ([`Wall`]): zero cost inside, a steep quadratic outside. They are wide (decades) and only stop an
//! optimisation from wandering to values no part could have — an L0 in pH for a part that reads 10 µH,
//! a Cp in µF, a section that re-describes the main resonance — which would otherwise fit noise or
//! trade one element against another. The ranges are set from the sweep itself (its band, its |Z| and
//! the inductance it shows at the bottom), not from a catalogue of parts.
//!
//! - L0 within a factor [`L0_RANGE`] of the inductance read off the inductive stretch (or of the one a
//!   low-order rational fit of the whole sweep implies, when the two differ).
//! - The L0–Cp resonance at or above the frequency of that reading (the data are inductive there) and at
//!   most 1000× the top of the sweep; Cp above 1 aF.
//! - Rdc above 1 nΩ and below 100× the largest |Z|; Rp above a tenth of ωL0 at the bottom of the band
//!   (else the part would not look inductive anywhere) and below 10⁶× the largest |Z|; the √f term below
//!   100× the largest |Z| at the top of the band.
//! - ls below half of L0.
//! - A dispersive core: its corner within three decades of the sweep, broadening α and asymmetry
//!   1 − β below 0.95, damping ζ from 0.001 to 1000, the non-dispersing share of L0 below 95 %.
//! - Each extra section: its own resonance 1/(2π√(l·c)) at least 1.2× the L0–Cp resonance (so it
//!   cannot carry the main resonance) and at most 100× the top of the sweep; its inductance below L0.

use super::initial::Guess;
use super::problem::{FitData, Wall};
use crate::model::lumped::Param;
use std::f64::consts::PI;

/// L0 may lie this factor either side of the curve's reading.
pub const L0_RANGE: f64 = 10.0;

fn wall(terms: &[(Param, f64)], bound: f64, label: String) -> Wall {
    Wall {
        terms: terms.to_vec(),
        bound,
        label,
    }
}

/// The walls for a sweep and the curve's reading of it, for sections up to `max_sections`.
pub fn walls(data: &FitData, guess: &Guess, max_sections: usize) -> Vec<Wall> {
    let f = &data.frequency_hz;
    let (f_lo, f_hi) = (f[0], f[f.len() - 1]);
    let z_max = data.z.iter().map(|z| z.norm()).fold(0.0f64, f64::max);
    let mut out = inductance_walls(guess, f_lo, f_hi);
    out.extend(resistance_walls(f_lo, f_hi, z_max));
    out.extend(lead_walls());
    out.extend(core_walls(f_lo, f_hi));
    for i in 0..max_sections {
        out.extend(section_walls(i, f_hi, z_max));
    }
    out
}

fn omega(frequency_hz: f64) -> f64 {
    2.0 * PI * frequency_hz
}

/// L0 around the curve's reading, the L0–Cp resonance within the band's reach, Cp above 1 aF.
fn inductance_walls(guess: &Guess, f_lo: f64, f_hi: f64) -> Vec<Wall> {
    let [l_low, l_high] = guess.l_readings_h;
    use Param::*;
    vec![
        wall(
            &[(L0, 1.0)],
            (l_high * L0_RANGE).ln(),
            format!("L0 at most {L0_RANGE}× the inductance the data show"),
        ),
        wall(
            &[(L0, -1.0)],
            -(l_low / L0_RANGE).ln(),
            format!("L0 at least 1/{L0_RANGE} of the inductance the data show"),
        ),
        wall(
            &[(L0, 1.0), (Cp, 1.0)],
            -2.0 * omega(guess.l_reading_at_hz.max(f_lo)).ln(),
            "the L0–Cp resonance above the frequency where the data are inductive".into(),
        ),
        wall(
            &[(L0, -1.0), (Cp, -1.0)],
            2.0 * omega(1000.0 * f_hi).ln(),
            "the L0–Cp resonance at most 1000× the top of the sweep".into(),
        ),
        wall(&[(Cp, -1.0)], -(1e-18f64).ln(), "Cp above 1 aF".into()),
    ]
}

/// Rdc, Rp and the √f term within what the sweep's |Z| and band allow.
fn resistance_walls(f_lo: f64, f_hi: f64, z_max: f64) -> Vec<Wall> {
    use Param::*;
    vec![
        wall(&[(Rdc, -1.0)], -(1e-9f64).ln(), "Rdc above 1 nΩ".into()),
        wall(
            &[(Rdc, 1.0)],
            (100.0 * z_max).ln(),
            "Rdc below 100× the largest |Z|".into(),
        ),
        wall(
            &[(L0, 1.0), (Rp, -1.0)],
            -(0.1 * omega(f_lo)).ln(),
            "Rp above a tenth of ωL0 at the bottom of the band".into(),
        ),
        wall(
            &[(Rp, 1.0)],
            (1e6 * z_max).ln(),
            "Rp below 10⁶× the largest |Z|".into(),
        ),
        wall(
            &[(KAc, 1.0)],
            (100.0 * z_max / f_hi.sqrt()).ln(),
            "the √f resistance below 100× the largest |Z| at the top of the band".into(),
        ),
        wall(
            &[(KAc, -1.0)],
            -(1e-12 / f_hi.sqrt()).ln(),
            "the √f resistance above 1 pΩ at the top of the band".into(),
        ),
    ]
}

/// The lead inductance ls below half of L0 and above 0.1 fH.
fn lead_walls() -> Vec<Wall> {
    use Param::*;
    vec![
        wall(
            &[(Ls, 1.0), (L0, -1.0)],
            (0.5f64).ln(),
            "ls below half of L0".into(),
        ),
        wall(&[(Ls, -1.0)], -(1e-16f64).ln(), "ls above 0.1 fH".into()),
    ]
}

/// A dispersive core's frequencies within three decades of the sweep, its shape parameters and
/// shares inside their ranges.
fn core_walls(f_lo: f64, f_hi: f64) -> Vec<Wall> {
    use Param::*;
    vec![
        wall(
            &[(CoreCorner, 1.0)],
            (1e3 * f_hi).ln(),
            "the core's corner at most 1000× the top of the sweep".into(),
        ),
        wall(
            &[(CoreCorner, -1.0)],
            -(f_lo / 1e3).ln(),
            "the core's corner at least 1/1000 of the bottom of the sweep".into(),
        ),
        wall(
            &[(CoreAlpha, 1.0)],
            (0.95f64).ln(),
            "core broadening α below 0.95".into(),
        ),
        wall(
            &[(CoreAlpha, -1.0)],
            -(1e-9f64).ln(),
            "core broadening α above 1e-9".into(),
        ),
        wall(
            &[(CoreBeta, 1.0)],
            (0.95f64).ln(),
            "core asymmetry β above 0.05".into(),
        ),
        wall(
            &[(CoreBeta, -1.0)],
            -(1e-9f64).ln(),
            "core asymmetry β below 1 − 1e-9".into(),
        ),
        wall(
            &[(CoreDamping, 1.0)],
            (1e3f64).ln(),
            "core damping ζ below 1000".into(),
        ),
        wall(
            &[(CoreDamping, -1.0)],
            -(1e-3f64).ln(),
            "core damping ζ above 0.001".into(),
        ),
        wall(
            &[(CoreResonance, 1.0)],
            (1e3 * f_hi).ln(),
            "the core's resonance at most 1000× the top of the sweep".into(),
        ),
        wall(
            &[(CoreResonance, -1.0)],
            -(f_lo / 1e3).ln(),
            "the core's resonance at least 1/1000 of the bottom of the sweep".into(),
        ),
        wall(
            &[(CoreResonanceShare, 1.0)],
            (0.95f64).ln(),
            "the resonant share below 95 %".into(),
        ),
        wall(
            &[(CoreResonanceShare, -1.0)],
            -(1e-9f64).ln(),
            "the resonant share above 1e-9".into(),
        ),
        wall(
            &[(AirFraction, 1.0)],
            (0.95f64).ln(),
            "the non-dispersing share of L0 below 95 %".into(),
        ),
        wall(
            &[(AirFraction, -1.0)],
            -(1e-9f64).ln(),
            "the non-dispersing share of L0 above 1e-9".into(),
        ),
    ]
}

/// Section `i` (0-based): its resonance above the L0–Cp one and below 100× the top of the sweep,
/// its inductance below L0, its resistance within bounds.
fn section_walls(i: usize, f_hi: f64, z_max: f64) -> [Wall; 5] {
    use Param::*;
    [
        wall(
            &[
                (SectionL(i), 1.0),
                (SectionC(i), 1.0),
                (L0, -1.0),
                (Cp, -1.0),
            ],
            -2.0 * (1.2f64).ln(),
            format!("section {i} resonating at least 1.2× above the L0–Cp resonance"),
        ),
        wall(
            &[(SectionL(i), -1.0), (SectionC(i), -1.0)],
            2.0 * omega(100.0 * f_hi).ln(),
            format!("section {i} resonating below 100× the top of the sweep"),
        ),
        wall(
            &[(SectionL(i), 1.0), (L0, -1.0)],
            0.0,
            format!("section {i} inductance below L0"),
        ),
        wall(
            &[(SectionR(i), -1.0)],
            -(1e-9f64).ln(),
            format!("section {i} resistance above 1 nΩ"),
        ),
        wall(
            &[(SectionR(i), 1.0)],
            (1e9 * z_max).ln(),
            format!("section {i} resistance below 10⁹× the largest |Z|"),
        ),
    ]
}
