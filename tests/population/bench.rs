//! The full population benchmark: draws parts (see `mod.rs`), fits each with the whole lumped fit
//! (model selection included) and reports the found rate overall, per method and per spacing, how many
//! of the misses were reported `poor`, and the fit times.
//!
//! `cargo run --release -p henrybook-tests --example population -- [--parts N] [--seed S]
//! [--write DIR] [--show-misses] [--show-poor] [--only INDEX] [--family lumped|rational]`. With `--write DIR` it also writes each
//! part's file and a `truth.jsonl` (one line per part) for the scipy peer,
//! `tests/bench/population_scipy.py`. `--show-misses` prints every part whose fit missed the basin,
//! `--show-poor` every found part reported poor, and `--only INDEX` fits one part and prints what
//! the fit saw (the truth's own assessment, the curve's reading and starts, the candidates).

use henrybook_tests::population;

use henrybook::fit::{FitControl, FitOptions, fit};
use population::{chi2, chi2_weighted, draw, found};
use std::collections::BTreeMap;
use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let value = |name: &str| {
        args.iter()
            .position(|a| a == name)
            .and_then(|i| args.get(i + 1))
            .cloned()
    };
    let parts: usize = value("--parts").map_or(500, |v| v.parse().expect("--parts N"));
    let seed: u64 = value("--seed").map_or(2026, |v| v.parse().expect("--seed S"));
    let write = value("--write").map(std::path::PathBuf::from);
    let show = args.iter().any(|a| a == "--show-misses");
    let show_poor = args.iter().any(|a| a == "--show-poor");
    let only: Option<usize> = value("--only").map(|v| v.parse().expect("--only INDEX"));
    let options = FitOptions {
        family: match value("--family").as_deref() {
            None | Some("lumped") => henrybook::fit::ModelFamily::Lumped,
            Some("rational") => henrybook::fit::ModelFamily::Rational,
            Some(other) => panic!("--family {other}: lumped or rational"),
        },
        ..FitOptions::default()
    };
    if let Some(dir) = &write {
        std::fs::create_dir_all(dir).expect("create the output folder");
    }
    let mut truth_lines = String::new();
    // (found, total, poor among misses, misses, ok among found)
    let mut by: BTreeMap<String, [usize; 5]> = BTreeMap::new();
    let mut times = Vec::new();
    let mut failed = 0;
    // Misses reported ok, and how many of them the density-weighted χ² (the fit's own objective)
    // counts as found.
    let mut ok_misses = (0usize, 0usize);
    let mut port_offsets = 0;
    let mut reflection_parts = 0;
    for i in 0..parts {
        if only.is_some_and(|o| o != i) {
            continue;
        }
        let part = draw(seed, i);
        reflection_parts += (part.method == henrybook::sweep::Method::Reflection) as usize;
        if let Some(dir) = &write {
            std::fs::write(dir.join(&part.file_name), &part.file_text).expect("write a part");
            truth_lines.push_str(
                &serde_json::json!({
                    "file": part.file_name,
                    "method": part.method.as_str(),
                    "spacing": part.spacing.name(),
                    "truth": part.truth,
                })
                .to_string(),
            );
            truth_lines.push('\n');
        }
        let sweep = part.sweep();
        let t = Instant::now();
        let result = fit(&sweep, &options, &FitControl::default());
        times.push(t.elapsed().as_secs_f64());
        let c_truth = chi2(&part.truth, &sweep);
        let (is_found, poor, detail) = match &result {
            Ok(r) => {
                let c = chi2(&r.model, &sweep);
                let poor = r.assessment.status != henrybook::fit::FitStatus::Ok;
                // No part is drawn with a port error: each report of one is a false alarm.
                port_offsets += r
                    .assessment
                    .findings
                    .iter()
                    .any(|f| f.kind == henrybook::fit::FindingKind::PortReactanceOffset)
                    as usize;
                let (w_fit, w_truth) = (
                    chi2_weighted(&r.model, &sweep),
                    chi2_weighted(&part.truth, &sweep),
                );
                if !found(c, c_truth) && !poor {
                    ok_misses.0 += 1;
                    ok_misses.1 += found(w_fit, w_truth) as usize;
                }
                (
                    found(c, c_truth),
                    poor,
                    format!(
                        "χ² {c:.4e} vs truth {c_truth:.4e} (density-weighted {w_fit:.4e} vs \
                         {w_truth:.4e}), rms {:.3}, {}: {}",
                        r.quality.rms_weighted,
                        r.assessment.status.as_str(),
                        r.assessment.summary
                    ),
                )
            }
            Err(e) => {
                failed += 1;
                (false, true, format!("error: {e}"))
            }
        };
        for key in [
            "all".to_string(),
            format!("method {}", part.method.as_str()),
            format!("spacing {}", part.spacing.name()),
        ] {
            let e = by.entry(key).or_default();
            e[1] += 1;
            if is_found {
                e[0] += 1;
                e[4] += (!poor) as usize;
            } else {
                e[3] += 1;
                e[2] += poor as usize;
            }
        }
        if show && !is_found {
            println!("MISS {}\n     {detail}", part.describe());
        }
        if only.is_some() {
            let a = henrybook::fit::assess::assess(&part.truth, &sweep, 6);
            println!(
                "TRUTH {}\n  truth assessment: {} — {}",
                part.describe(),
                a.status.as_str(),
                a.summary
            );
            for b in &a.bands {
                println!(
                    "    band {:.3e}–{:.3e} Hz: {} points, rms {:.3}, median rel {:.4}",
                    b.band_hz[0], b.band_hz[1], b.points, b.rms_weighted, b.median_relative_error
                );
            }
            if let Ok(data) = henrybook::fit::lumped::prepare(&sweep, &FitOptions::default()) {
                let st = henrybook::model::lumped::Structure::of(&part.truth);
                let p = henrybook::fit::problem::LumpedProblem::new(&data, &st);
                println!(
                    "  weighted cost at the truth (no walls): {:.6e}",
                    p.cost_at(&st.pack(&part.truth))
                );
                let (g, starts) = henrybook::fit::initial::read_curve(&data);
                println!(
                    "  guess: {:?} srf {:?} reading {:e} at {:e}",
                    g.base, g.srf_hz, g.l_reading_h, g.l_reading_at_hz
                );
                for st in starts {
                    println!("  start: {st:?}");
                }
            }
            if let Ok(r) = &result {
                println!("  fit: {}", serde_json::to_string(&r.model).unwrap());
                println!(
                    "  candidates: {}",
                    serde_json::to_string(&r.candidates).unwrap()
                );
                for b in &r.assessment.bands {
                    println!(
                        "    band {:.3e}–{:.3e} Hz: {} points, rms {:.3}, median rel {:.4}",
                        b.band_hz[0],
                        b.band_hz[1],
                        b.points,
                        b.rms_weighted,
                        b.median_relative_error
                    );
                }
                println!("  findings: {:#?}", r.assessment.findings);
            }
        }
        if show_poor && is_found && poor {
            println!("FOUND BUT POOR {}\n     {detail}", part.describe());
        }
    }
    if let Some(dir) = &write {
        std::fs::write(dir.join("truth.jsonl"), truth_lines).expect("write truth.jsonl");
    }
    println!("population seed {seed}: {parts} parts, {failed} refused or failed");
    println!(
        "{:<22} {:>7} {:>7} {:>8} {:>14} {:>12}",
        "group", "parts", "found", "rate", "misses→poor", "found→ok"
    );
    for (k, [f, n, p, m, ok]) in &by {
        println!(
            "{k:<22} {n:>7} {f:>7} {:>7.1}% {:>9}/{:<4} {:>7}/{:<4}",
            100.0 * *f as f64 / *n as f64,
            p,
            m,
            ok,
            f
        );
    }
    println!(
        "misses reported ok: {} ({} of them found by the density-weighted χ² the fit minimises, \
         see tests/common/population.rs chi2_weighted)",
        ok_misses.0, ok_misses.1
    );
    println!(
        "constant port reactance reported (none drawn, so each is a false alarm): {port_offsets} of \
         {reflection_parts} reflection parts"
    );
    times.sort_by(f64::total_cmp);
    let q = |p: f64| times[((times.len() - 1) as f64 * p) as usize] * 1e3;
    println!(
        "fit time per part (whole lumped fit with model selection): median {:.2} ms, p90 {:.2} ms, max {:.2} ms",
        q(0.5),
        q(0.9),
        q(1.0)
    );
}
