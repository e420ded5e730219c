//! The lumped fit on a population of invented parts drawn from the space users produce (see
//! `tests/common/population.rs`: 100 nH–10 mH, SRF inside the band or up to 3× above it, sweeps starting
//! 3–6 decades below the top, log, linear and segmented grids, every method with its noise), read
//! through the real readers. A bounded draw of the population the benchmark (`--example population`)
//! runs in full, with a seed the benchmark does not use.
//!
//! Requirements: the fit reaches the data's best basin (χ² ≤ 1.1 × χ² at the truth + 20) on at least
//! 98 % of the parts and 95 % of each method; every part it misses is reported `poor` or refused,
//! never `ok`; no larger candidate ends with a higher cost than a candidate nested in it; and the
//! honest status calls most found fits `ok` (a found fit may still be `poor` where the method cannot
//! measure the part).

use henrybook_tests::nesting::assert_nested_costs;
use henrybook_tests::population;

use henrybook::fit::lumped::same_cost;
use henrybook::fit::problem::density_weights;
use henrybook::fit::{FindingKind, FitControl, FitOptions, FitStatus, fit};
use population::{METHODS, chi2, draw, found};

#[test]
fn the_lumped_fit_finds_the_best_basin_on_a_drawn_population_and_flags_every_miss() {
    const PARTS: usize = 150;
    const SEED: u64 = 77;
    let mut found_count = 0;
    let mut ok_among_found = 0;
    let mut per_method = [(0usize, 0usize); 4];
    let mut misses = Vec::new();
    for i in 0..PARTS {
        let part = draw(SEED, i);
        let sweep = part.sweep();
        let m = METHODS.iter().position(|&x| x == part.method).unwrap();
        per_method[m].1 += 1;
        let report = match fit(&sweep, &FitOptions::default(), &FitControl::default()) {
            Ok(r) => r,
            Err(e) => {
                // A refusal is an honest answer, never a silent wrong model; it counts as a miss.
                misses.push(format!("{} — refused: {e}", part.describe()));
                continue;
            }
        };
        let (c_fit, c_truth) = (chi2(&report.model, &sweep), chi2(&part.truth, &sweep));
        // No part is drawn with a port error: the constant-reactance finding would be a false alarm,
        // and so would a found fit whose inductance at the bottom the report calls off.
        for f in &report.assessment.findings {
            assert_ne!(
                f.kind,
                FindingKind::PortReactanceOffset,
                "{}: {}",
                part.describe(),
                f.message
            );
        }
        if found(c_fit, c_truth) {
            assert!(
                report
                    .assessment
                    .findings
                    .iter()
                    .all(|f| f.kind != FindingKind::BottomInductance),
                "{}: {}",
                part.describe(),
                report.assessment.summary
            );
            found_count += 1;
            per_method[m].0 += 1;
            ok_among_found += (report.assessment.status == FitStatus::Ok) as usize;
        } else {
            assert_eq!(
                report.assessment.status,
                FitStatus::Poor,
                "{} missed the basin (χ² {c_fit:.4e} against {c_truth:.4e} at the truth) but was \
                 reported ok",
                part.describe()
            );
            misses.push(format!(
                "{} — χ² {c_fit:.4e} against {c_truth:.4e}: {}",
                part.describe(),
                report.assessment.summary
            ));
        }
        // The nesting rule on the candidates of every fit: a larger candidate ends no higher than one
        // it contains, up to rounding (a millionth of the larger cost or of the χ² the stated noise
        // implies, 2·Σg over the points with their density weights g; `same_cost`).
        let floor = 2.0 * density_weights(&sweep.frequency_hz).iter().sum::<f64>();
        assert_nested_costs(&report.candidates, floor, &part.describe());
    }
    let rate = found_count as f64 / PARTS as f64;
    println!(
        "found {found_count}/{PARTS} ({:.1} %), ok among found {ok_among_found}/{found_count}; per \
         method (direct, reflection, series-thru, shunt-thru): {per_method:?}",
        100.0 * rate
    );
    for m in &misses {
        println!("miss: {m}");
    }
    assert!(rate >= 0.98, "found rate {rate}: {misses:#?}");
    for (m, (f, n)) in METHODS.iter().zip(per_method) {
        assert!(
            n == 0 || f as f64 / n as f64 >= 0.95,
            "{}: found {f} of {n}",
            m.as_str()
        );
    }
    assert!(
        ok_among_found as f64 >= 0.95 * found_count as f64,
        "only {ok_among_found} of {found_count} found fits are reported ok"
    );
}

/// A part the measurement cannot resolve below its self-resonance (an 8.2 mH part with 2.4 kΩ of Rdc,
/// measured shunt-thru, whose impedance there is far above the 50 Ω reference) is an inductor the method
/// cannot show as one: it is fitted, never refused as "not an inductor", and reported `poor` with the
/// reason (no inductive data under L0), whatever its residuals. Part 56 of the benchmark's population
/// (seed 2026).
#[test]
fn a_part_the_method_cannot_resolve_is_fitted_and_reported_poor_with_that_reason() {
    use henrybook::fit::FindingKind;
    let part = draw(2026, 56);
    assert_eq!(part.method, henrybook::sweep::Method::ShuntThru);
    let sweep = part.sweep();
    let report = fit(&sweep, &FitOptions::default(), &FitControl::default())
        .unwrap_or_else(|e| panic!("{}: refused: {e}", part.describe()));
    assert_eq!(
        report.assessment.status,
        FitStatus::Poor,
        "{}",
        part.describe()
    );
    let finding = report
        .assessment
        .findings
        .iter()
        .find(|f| f.kind == FindingKind::InductanceUnresolved)
        .unwrap_or_else(|| panic!("no unresolved-inductance finding: {:?}", report.assessment));
    for phrase in [
        "the shunt-thru measurement does not resolve",
        "against a reference impedance of 50 Ω",
        "L0 rests on the resonance",
    ] {
        assert!(finding.message.contains(phrase), "{}", finding.message);
    }
    assert!(
        report.assessment.summary.contains("does not resolve"),
        "{}",
        report.assessment.summary
    );
    let (c_fit, c_truth) = (chi2(&report.model, &sweep), chi2(&part.truth, &sweep));
    println!(
        "{}: χ² {c_fit:.4e} against {c_truth:.4e} at the truth, found: {}",
        part.describe(),
        found(c_fit, c_truth)
    );
}

/// A structure fit never ends above its own start: fitted from the truth (the structure the truth
/// has), LM ends no higher than the truth's cost on the full data (up to rounding). The thinned stages that start a
/// long sweep can lead into another basin than the full data's (seed 2, part 397: a shunt-thru
/// part whose informative points near its resonance the thinning drops, from the truth's 2.2e3 to
/// 2.8e3); the full data then decide from the start itself.
#[test]
fn a_structure_fit_never_ends_above_its_start() {
    use henrybook::fit::lumped::{fit_structure, prepare};
    use henrybook::fit::problem::LumpedProblem;
    use henrybook::fit::{initial, plausible};
    use henrybook::model::lumped::Structure;
    let mut parts: Vec<(u64, usize)> = vec![(2, 397)];
    parts.extend((0..40).map(|i| (5, i)));
    for (seed, i) in parts {
        let part = draw(seed, i);
        let sweep = part.sweep();
        let Ok(mut data) = prepare(&sweep, &FitOptions::default()) else {
            continue;
        };
        let (guess, _) = initial::read_curve(&data);
        data.walls = plausible::walls(&data, &guess, FitOptions::default().max_sections);
        let structure = Structure::of(&part.truth);
        let at_truth = LumpedProblem::new(&data, &structure).cost_at(&structure.pack(&part.truth));
        let f = fit_structure(
            &data,
            &structure,
            &part.truth,
            200,
            std::time::Duration::from_secs(60),
            &FitControl::default(),
        )
        .unwrap_or_else(|e| panic!("{}: {e}", part.describe()));
        // Up to rounding: a millionth of the χ² the noise implies, as the fit itself counts costs.
        assert!(
            f.cost <= at_truth || same_cost(f.cost, at_truth, data.effective_residuals()),
            "{}: started at cost {at_truth:.6e}, ended at {:.6e}",
            part.describe(),
            f.cost
        );
    }
}
