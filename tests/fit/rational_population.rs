//! The rational family on the invented population (`tests/common/population.rs`: 100 nH–10 mH, SRF in
//! the band or up to 3× above it, sweeps starting 3–6 decades below the top, log, linear and segmented
//! grids, every method with its noise, read through the real readers), measured with the causal form of
//! the √f term (`population::CausalSkin`: the skin-effect resistance together with its equal internal
//! reactance). The rational model is causal by construction, so it is checked on sweeps a causal part
//! could produce: automatic order selection must reach the noise (weighted RMS ≤ 1.2) on nearly every
//! part, and every part where it does not is reported `poor`, never `ok`.
//!
//! For contrast the same parts are also fitted as measured with the lumped model's resistance-only √f
//! term, which no causal model can follow: the rates of both are printed. Invented data, not measurements.

use henrybook::fit::{FitControl, FitOptions, FitStatus, ModelFamily, fit};
use henrybook_tests::population::{draw, draw_causal};

const SEED: u64 = 5151;
const PARTS: usize = 120;
/// Weighted RMS at or below this is at the noise (the stated σ holds the measurement's noise).
const AT_NOISE: f64 = 1.2;

/// (parts at the noise, parts fitted, worst weighted RMS), asserting the status is honest on each.
fn run(causal: bool) -> (usize, usize, f64) {
    let options = FitOptions {
        family: ModelFamily::Rational,
        ..FitOptions::default()
    };
    let (mut at_noise, mut fitted, mut worst) = (0, 0, 0.0f64);
    for index in 0..PARTS {
        let part = if causal {
            draw_causal(SEED, index)
        } else {
            draw(SEED, index)
        };
        let report = fit(&part.sweep(), &options, &FitControl::default())
            .unwrap_or_else(|e| panic!("{}: refused: {e}", part.describe()));
        fitted += 1;
        let rms = report.quality.rms_weighted;
        worst = worst.max(rms);
        if rms <= AT_NOISE {
            at_noise += 1;
        } else {
            assert_eq!(
                report.assessment.status,
                FitStatus::Poor,
                "{}: weighted RMS {rms:.3} yet reported ok",
                part.describe()
            );
            if causal {
                eprintln!("causal miss: {} rms {rms:.3}", part.describe());
            }
        }
    }
    (at_noise, fitted, worst)
}

#[test]
fn the_rational_fit_reaches_the_noise_on_causal_invented_sweeps_and_is_honest_where_it_does_not() {
    let (causal_ok, n, causal_worst) = run(true);
    let (plain_ok, _, plain_worst) = run(false);
    eprintln!(
        "rational family, {n} parts: at the noise on {causal_ok} with the causal √f term (worst RMS \
         {causal_worst:.2}), on {plain_ok} with the resistance-only √f term (worst {plain_worst:.2})"
    );
    assert!(
        causal_ok * 100 >= 95 * n,
        "at the noise on only {causal_ok} of {n} causal sweeps"
    );
}
