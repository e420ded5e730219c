//! The lumped fit on real measurements: every sweep in `../shared/real-sweeps/` (genuine 1-port
//! reflection sweeps of hand-wound toroids and a ferrite bead, made by someone outside the project; see
//! its SOURCES.md) is fitted, none is refused, and the status is honest: a fit reported `ok` follows the
//! data where the data are sure of themselves, and a fit that does not is reported `poor` with findings.
//!
//! "Follows the data" uses the issue's own measures: the inductance Im Z/ω at the lowest frequencies
//! where Im Z stands clear of its noise within 5 % of the data's own reading there, and a median |Z|
//! error of at most 2 % below the SRF. The files are read where they lie and never copied into the
//! repository; without that folder the test prints a note and checks nothing.

use henrybook::fit::assess::FindingKind;
use henrybook::fit::problem::density_weights;
use henrybook::fit::{FitControl, FitOptions, FitStatus, fit_lumped};
use henrybook::model::ImpedanceModel;
use henrybook::sweep::{ReadOptions, Sweep, read_sweep};
use henrybook_tests::nesting::assert_nested_costs;
use std::f64::consts::PI;
use std::path::PathBuf;

fn folder() -> Option<PathBuf> {
    henrybook_tests::real_sweeps_dir()
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// Indices of the ten lowest-frequency points where Im Z is inductive and above ten times its σ: where
/// the data state an inductance they are sure of.
fn lowest_sure_points(s: &Sweep) -> Vec<usize> {
    let mut order: Vec<usize> = (0..s.frequency_hz.len()).collect();
    order.sort_by(|&a, &b| s.frequency_hz[a].total_cmp(&s.frequency_hz[b]));
    order
        .into_iter()
        .filter(|&k| s.impedance_ohm[k].im > 10.0 * s.sigma_ohm[k])
        .take(10)
        .collect()
}

#[test]
fn every_real_sweep_is_fitted_and_an_ok_fit_is_true_to_the_data() {
    let Some(dir) = folder() else { return };
    let files = henrybook_tests::real_sweep_files(&dir);
    assert_eq!(files.len(), 13, "SOURCES.md lists 13 files");
    eprintln!("file | status | L data | L model | ΔL | median |Z| error below SRF | summary");
    let mut ok_count = 0;
    let mut l_within_5_percent = 0;
    let mut bottom_reported = 0;
    let mut bottom_undecided = 0;
    let mut port_offsets = 0;
    for file in &files {
        let bytes = std::fs::read(dir.join(file)).unwrap();
        let sweep = read_sweep(file, &bytes, &ReadOptions::default())
            .unwrap_or_else(|e| panic!("{file}: {e}"));
        let report = fit_lumped(&sweep, &FitOptions::default(), &FitControl::default())
            .unwrap_or_else(|e| panic!("{file} refused: {e}"));
        let a = &report.assessment;
        let model = &report.model;
        // The nesting rule where it matters most: real sweeps are where the core laws, which nest in
        // one another, are fitted (up to rounding, as `same_cost` allows).
        let floor = 2.0 * density_weights(&sweep.frequency_hz).iter().sum::<f64>();
        assert_nested_costs(&report.candidates, floor, file);

        let sure = lowest_sure_points(&sweep);
        assert!(sure.len() >= 5, "{file}: the data show an inductance");
        let l_of = |z: f64, k: usize| z / (2.0 * PI * sweep.frequency_hz[k]);
        let l_data = median(
            sure.iter()
                .map(|&k| l_of(sweep.impedance_ohm[k].im, k))
                .collect(),
        );
        let l_model = median(
            sure.iter()
                .map(|&k| l_of(model.impedance(sweep.frequency_hz[k]).im, k))
                .collect(),
        );
        let dl = l_model / l_data - 1.0;
        l_within_5_percent += (dl.abs() <= 0.05) as usize;
        // The reading's own standard uncertainty, relative: the median of n points whose relative σ
        // is σ/Im Z each (1.2533·rms/√n, the median's efficiency for a normal sample; textbook
        // statistics, no source needed beyond that).
        let rel_sq: f64 = sure
            .iter()
            .map(|&k| (sweep.sigma_ohm[k] / sweep.impedance_ohm[k].im).powi(2))
            .sum::<f64>()
            / sure.len() as f64;
        let reading_sigma = 1.2533 * (rel_sq / sure.len() as f64).sqrt() * a.noise_scale.max(1.0);
        // A miss at the bottom is said, not hidden: where this test's own reading (independent code,
        // same points) is more than 5 % and four of the reading's σ off, the report names it, and where
        // it is within 5 % it does not (half a percent of margin each way for the two medians).
        let bottom = a
            .findings
            .iter()
            .find(|f| f.kind == FindingKind::BottomInductance);
        let clear_miss = dl.abs() > 0.05 && dl.abs() > 4.0 * reading_sigma;
        if clear_miss && dl.abs() > 0.055 {
            assert!(
                bottom.is_some(),
                "{file}: L at the bottom is {:+.1} % off and the report does not say so",
                100.0 * dl
            );
        } else if dl.abs() < 0.045 {
            assert!(
                bottom.is_none(),
                "{file}: {bottom:?} at {:+.1} %",
                100.0 * dl
            );
        }
        if dl.abs() > 0.05 {
            match bottom {
                Some(_) => bottom_reported += 1,
                None if !clear_miss => bottom_undecided += 1,
                None => {}
            }
        }
        if let Some(p) = a
            .findings
            .iter()
            .find(|f| f.kind == FindingKind::PortReactanceOffset)
        {
            eprintln!("{file}: {}", p.message);
            port_offsets += 1;
        }
        let srf = report
            .derived
            .srf_hz
            .unwrap_or(report.band_hz[1])
            .min(report.band_hz[1]);
        let below: Vec<f64> = (0..sweep.frequency_hz.len())
            .filter(|&k| sweep.frequency_hz[k] < 0.7 * srf)
            .map(|k| {
                let zd = sweep.impedance_ohm[k];
                (model.impedance(sweep.frequency_hz[k]) - zd).norm() / zd.norm()
            })
            .collect();
        let z_error = if below.is_empty() { 0.0 } else { median(below) };
        eprintln!(
            "{file} | {} | {:.4e} H | {:.4e} H | {:+.1} % | {:.2} % | {}",
            a.status.as_str(),
            l_data,
            l_model,
            100.0 * dl,
            100.0 * z_error,
            a.summary
        );
        match a.status {
            FitStatus::Ok => {
                ok_count += 1;
                assert!(
                    dl.abs() <= 0.05,
                    "{file}: reported ok, but L at the lowest sure points is {:+.1} % off",
                    100.0 * dl
                );
                assert!(
                    z_error <= 0.02,
                    "{file}: reported ok, but the median |Z| error below the SRF is {:.2} %",
                    100.0 * z_error
                );
            }
            FitStatus::Poor => {
                assert!(!a.findings.is_empty(), "{file}: poor without a reason");
                assert!(
                    a.summary.contains("does not describe") || a.summary.contains("cannot"),
                    "{file}: {}",
                    a.summary
                );
            }
        }
    }
    eprintln!(
        "{ok_count} of {} reported ok; L at the lowest sure points within 5 % on {l_within_5_percent}, \
         the miss reported on {bottom_reported}, within the reading's own 4σ on {bottom_undecided}; a \
         constant reactance at the bottom on {port_offsets}",
        files.len()
    );
    assert_eq!(
        l_within_5_percent + bottom_reported + bottom_undecided,
        files.len(),
        "every file is within 5 % at the bottom, or its report says by how much it is not, or the \
         difference lies within four standard deviations of the data's own reading"
    );
    // Every poor fit still owes the user the inductance the data show at the bottom of the band. Not
    // yet met on all 13; the measured count is 8. It was 10 while the fit often stopped in poorer
    // basins: since collapsed elements are revived and the core laws nest (fit/lumped.rs), χ² fell
    // on eight files, by 1.08× to 3.5×, and two of them (9x5x3.44, 13x8x6) went from within 5 % to
    // +6.0 % and +5.2 %. On 9x5x3.44 the data's own Im Z/ω rises from 0.86 µH at 98 kHz to 1.22 µH at
    // 600 kHz, far below the SRF, which no element of the model produces there (a falling
    // permeability only lowers L, and Cp raises it by about (f/SRF)²). Four of the five files that
    // miss carry the constant-reactance finding (X of −0.16 to −0.29 Ω at the bottom, the size a
    // reflection phase error of 0.4–0.7° gives near a short): the reading there is itself in doubt.
    // Removing that X before fitting brought three of them within 5 %, but the author's own LCR
    // readings (SOURCES.md) side with the corrected value on one file and with the raw one on two, so
    // the data are not corrected. This holds the line until the bottom is met.
    assert!(
        l_within_5_percent >= 8,
        "L at the lowest sure points within 5 % on only {l_within_5_percent} of {}",
        files.len()
    );
}

/// A fit must not swing between basins on a change no measurement can make: every file is fitted
/// as read and with every impedance scaled by 1 + 1e-12, and the chosen candidate's χ² must agree within
/// 1 %. Before collapsed elements were revived (fit/lumped.rs, stage D), scaling one start (the
/// curve's resistance reading) by 1 + 1e-12 moved the chosen χ² of three files by 2× to 3.8×. Scaling
/// the data by 1 ± 1e-12, 1 + 3e-12 or 1 ± 1e-9 now moves at most two files by more than 1 % (13x8x6
/// by 28 %, gray by 7 %, 9x5x3.44 by 18 %, one or two at a time); the bound below is 11.
#[test]
fn a_real_sweep_fit_does_not_move_with_a_rounding_level_change() {
    let Some(dir) = folder() else { return };
    let files = henrybook_tests::real_sweep_files(&dir);
    let chosen_cost = |sweep: &Sweep| {
        let report = fit_lumped(sweep, &FitOptions::default(), &FitControl::default()).unwrap();
        let chosen = report
            .candidates
            .iter()
            .find(|c| c.chosen)
            .expect("a chosen candidate");
        (chosen.cost, chosen.label.clone())
    };
    let mut steady = 0;
    for file in &files {
        let bytes = std::fs::read(dir.join(file)).unwrap();
        let sweep = read_sweep(file, &bytes, &ReadOptions::default()).unwrap();
        let mut nudged = sweep.clone();
        for z in nudged.impedance_ohm.iter_mut() {
            *z *= 1.0 + 1e-12;
        }
        let ((a, label_a), (b, label_b)) = (chosen_cost(&sweep), chosen_cost(&nudged));
        let moved = (a - b).abs() / a.min(b);
        eprintln!(
            "{file}: χ² {a:.6e} ({label_a}) and {b:.6e} ({label_b}): {:.2} %",
            100.0 * moved
        );
        steady += (moved <= 0.01) as usize;
    }
    assert!(
        steady >= 11,
        "only {steady} of {} fits stay within 1 % of χ² when the data change by 1e-12",
        files.len()
    );
}

/// (file, turns, [OD, ID, h] in m, the author's LCR reading in H) for every toroid row of SOURCES.md
/// that states turns and dimensions ("2 turns on the same core" takes the row above's core).
fn toroids(dir: &std::path::Path) -> Vec<(String, f64, [f64; 3], Option<f64>)> {
    let text = std::fs::read_to_string(dir.join("SOURCES.md")).unwrap();
    let mut out = Vec::new();
    let mut last_core: Option<[f64; 3]> = None;
    for line in text.lines() {
        let cells: Vec<&str> = line.split('|').map(str::trim).collect();
        if cells.len() != 6 || !cells[1].ends_with(".s1p") {
            continue;
        }
        let part = cells[2];
        let Some((turns, rest)) = part.split_once(" turn") else {
            continue;
        };
        let Ok(turns) = turns.trim().parse::<f64>() else {
            continue;
        };
        let core = if rest.contains("the same core") {
            last_core
        } else {
            // "… on a 9.5 × 4.75 × 3.2 mm …": the three numbers before "mm".
            rest.split(" mm").next().and_then(|dims| {
                let nums: Vec<f64> = dims
                    .split('×')
                    .filter_map(|t| t.split_whitespace().last()?.parse().ok())
                    .collect();
                (nums.len() == 3).then(|| [nums[0] * 1e-3, nums[1] * 1e-3, nums[2] * 1e-3])
            })
        };
        let Some(core) = core else { continue };
        last_core = Some(core);
        let reading = cells[3]
            .split_whitespace()
            .next()
            .and_then(|t| t.parse::<f64>().ok())
            .filter(|_| cells[3].contains("µH"))
            .map(|v| v * 1e-6);
        out.push((cells[1].to_string(), turns, core, reading));
    }
    out
}

#[test]
fn the_material_is_reported_from_turns_and_dimensions() {
    use henrybook::model::material::{Construction, CoreShape};
    let Some(dir) = folder() else { return };
    let rows = toroids(&dir);
    // SOURCES.md: ten rows state turns and a toroid's dimensions (not the first file, the bead, or
    // core4-fixtureA, which is core4_fixtureB's part in clip leads).
    assert_eq!(rows.len(), 10, "{rows:?}");
    eprintln!(
        "file | N | L per μr | μi fitted ± σ | μ from the author's reading | μ from the data"
    );
    for (file, turns, [od, id, h], reading) in rows {
        let bytes = std::fs::read(dir.join(&file)).unwrap();
        let sweep = read_sweep(&file, &bytes, &ReadOptions::default()).unwrap();
        let construction = Construction {
            turns,
            core: CoreShape::Toroid {
                outer_diameter_m: od,
                inner_diameter_m: id,
                height_m: h,
            },
            gap_m: None,
            nominal_initial_permeability: None,
        };
        let options = FitOptions {
            construction: Some(construction),
            ..FitOptions::default()
        };
        let report = fit_lumped(&sweep, &options, &FitControl::default()).unwrap();
        let m = report.material.as_ref().expect("a material report");
        let henrybook::model::FittedModel::Lumped(model) = &report.model else {
            panic!("{file}: lumped")
        };
        // L = μ0·μr·N²·h·ln(OD/ID)/(2π), computed here on its own.
        let l1 = 4e-7 * std::f64::consts::PI * turns * turns * h * (od / id).ln()
            / (2.0 * std::f64::consts::PI);
        assert!(
            (m.inductance_per_permeability_h / l1 - 1.0).abs() < 1e-6,
            "{file}"
        );
        assert!((m.initial_permeability * l1 / model.l0_h - 1.0).abs() < 1e-6);
        assert!(
            m.spectrum
                .iter()
                .all(|p| p.mu_imag >= -1e-9 * m.initial_permeability)
        );
        let sure = lowest_sure_points(&sweep);
        let l_data = median(
            sure.iter()
                .map(|&k| sweep.impedance_ohm[k].im / (2.0 * PI * sweep.frequency_hz[k]))
                .collect(),
        );
        eprintln!(
            "{file} | {turns} | {:.3e} H | {:.0} ± {:.0} | {} | {:.0}",
            l1,
            m.initial_permeability,
            m.initial_permeability_sigma.unwrap_or(f64::NAN),
            reading.map_or("–".into(), |r| format!("{:.0}", r / l1)),
            l_data / l1
        );
        // The two cores of NiZn material 43 (SOURCES.md): its data sheet gives an initial permeability
        // of 800 (Fair-Rite material 43, from memory). The author's own 10 kHz reading with these
        // dimensions must agree within a quarter, which checks the shape formula on outside data.
        if file.contains("43") {
            let mu = reading.expect("a reading") / l1;
            assert!((mu / 800.0 - 1.0).abs() < 0.25, "{file}: μ {mu:.0}");
        }
    }
}

/// The rational family on the same real sweeps: none refused (the bead's data are passive, and a model
/// that needs more than the allowed error increase to become passive is given, with a warning, when it
/// is clearly closer to the data),
/// every model returned is passive, and a `poor` one says why.
#[test]
fn the_rational_family_fits_every_real_sweep_with_a_passive_model() {
    use henrybook::fit::rational::passivity::check_passivity;
    use henrybook::fit::{ModelFamily, fit};
    use henrybook::model::FittedModel;
    let Some(dir) = folder() else { return };
    let files = henrybook_tests::real_sweep_files(&dir);
    let options = FitOptions {
        family: ModelFamily::Rational,
        ..FitOptions::default()
    };
    for file in &files {
        let bytes = std::fs::read(dir.join(file)).unwrap();
        let sweep = read_sweep(file, &bytes, &ReadOptions::default()).unwrap();
        let report = fit(&sweep, &options, &FitControl::default())
            .unwrap_or_else(|e| panic!("{file}: rational fit refused: {e}"));
        let FittedModel::Rational(m) = &report.model else {
            panic!("{file}: not a rational model")
        };
        assert!(check_passivity(m).passive, "{file}: not passive");
        let a = &report.assessment;
        if a.status == FitStatus::Poor {
            assert!(!a.findings.is_empty(), "{file}: poor without a reason");
        }
        eprintln!(
            "{file} | {} | rms_w {:.3} | {} | {}",
            a.status.as_str(),
            report.quality.rms_weighted,
            report.candidates.iter().find(|c| c.chosen).unwrap().label,
            report.warnings.join("; ")
        );
    }
}
