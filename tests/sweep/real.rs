//! The readers against real instrument files: every sweep in `../shared/real-sweeps/` (genuine 1-port
//! reflection measurements of hand-wound toroids and a ferrite bead; see its SOURCES.md for where they
//! come from) reads without error, with the point counts SOURCES.md states, and a segment boundary
//! that repeats a frequency is merged with a warning. The files are read where they lie and never
//! copied into the repository; without that folder the tests print a note and check nothing.

use henrybook::sweep::convert::z_from_s;
use henrybook::sweep::{Method, ReadOptions, Sweep, read_sweep};
use num_complex::Complex64;
use std::path::PathBuf;

fn folder() -> Option<PathBuf> {
    henrybook_tests::real_sweeps_dir()
}

/// (file, points) from SOURCES.md's table: the sweep column ends in "<n> pts".
fn table(dir: &std::path::Path) -> Vec<(String, usize)> {
    let text = std::fs::read_to_string(dir.join("SOURCES.md")).unwrap();
    let mut rows = Vec::new();
    for line in text.lines() {
        let cells: Vec<&str> = line.split('|').map(str::trim).collect();
        // "| file | part | reading | sweep |" splits into 6 cells, the outer two empty.
        if cells.len() != 6 || !cells[1].ends_with(".s1p") {
            continue;
        }
        let points = cells[4]
            .split(',')
            .map(str::trim)
            .find_map(|part| part.strip_suffix(" pts"))
            .and_then(|n| n.trim().parse::<usize>().ok())
            .unwrap_or_else(|| panic!("no point count in {line:?}"));
        rows.push((cells[1].to_string(), points));
    }
    rows
}

/// The file's data rows as plain text: (line, frequency, S11), read here independently of henrybook's
/// reader (these files have one option line, `# HZ S RI R 50`, and three numbers per row).
fn raw_rows(text: &str) -> Vec<(usize, f64, Complex64)> {
    text.lines()
        .enumerate()
        .filter_map(|(i, l)| {
            let l = l.split('!').next().unwrap().trim();
            if l.is_empty() || l.starts_with('#') {
                return None;
            }
            let v: Vec<f64> = l.split_whitespace().map(|t| t.parse().unwrap()).collect();
            assert_eq!(v.len(), 3, "line {}: {l}", i + 1);
            Some((i + 1, v[0], Complex64::new(v[1], v[2])))
        })
        .collect()
}

fn read(dir: &std::path::Path, file: &str) -> (String, Sweep) {
    let bytes = std::fs::read(dir.join(file)).unwrap();
    let sweep =
        read_sweep(file, &bytes, &ReadOptions::default()).unwrap_or_else(|e| panic!("{file}: {e}"));
    (String::from_utf8(bytes).unwrap(), sweep)
}

#[test]
fn every_real_sweep_reads_with_the_point_count_its_sources_state() {
    let Some(dir) = folder() else { return };
    let rows = table(&dir);
    assert_eq!(rows.len(), 13, "SOURCES.md lists 13 files: {rows:?}");
    let on_disk = henrybook_tests::real_sweep_files(&dir);
    let mut listed: Vec<String> = rows.iter().map(|(f, _)| f.clone()).collect();
    listed.sort();
    assert_eq!(
        on_disk, listed,
        "the folder and SOURCES.md name the same files"
    );

    let mut merged_anywhere = 0;
    for (file, points) in &rows {
        let (text, sweep) = read(&dir, file);
        let raw = raw_rows(&text);
        // Source: ../shared/real-sweeps/SOURCES.md, the table's "sweep" column (rows in the file).
        assert_eq!(raw.len(), *points, "{file}: rows in the file");
        // Every repeated frequency in the file becomes one point and one warning.
        let repeats: Vec<(usize, usize)> = raw
            .windows(2)
            .filter(|w| w[0].1 == w[1].1)
            .map(|w| (w[0].0, w[1].0))
            .collect();
        assert_eq!(
            sweep.frequency_hz.len(),
            points - repeats.len(),
            "{file}: points after merging"
        );
        let merges: Vec<&String> = sweep
            .warnings
            .iter()
            .filter(|w| w.contains("(a segment boundary)"))
            .collect();
        assert_eq!(merges.len(), repeats.len(), "{file}: {:?}", sweep.warnings);
        for ((a, b), w) in repeats.iter().zip(&merges) {
            assert!(
                w.starts_with(&format!("lines {a} and {b} repeat")),
                "{file}: {w}"
            );
        }
        merged_anywhere += repeats.len();
        assert_eq!(sweep.method, Method::Reflection);
        assert_eq!(
            sweep.dc_reading, None,
            "{file}: no 0 Hz rows in these files"
        );
        sweep.validate().unwrap_or_else(|e| panic!("{file}: {e}"));
        sweep
            .check_fittable()
            .unwrap_or_else(|e| panic!("{file}: {e}"));
    }
    // Source: SOURCES.md, "unknown-torroid-9x5x3.44.s1p … two segments sharing one frequency".
    assert_eq!(merged_anywhere, 1);
}

#[test]
fn the_shared_boundary_frequency_is_one_point_with_the_readings_spread_in_its_sigma() {
    let Some(dir) = folder() else { return };
    let file = "unknown-torroid-9x5x3.44.s1p";
    let (text, sweep) = read(&dir, file);
    let raw = raw_rows(&text);
    let k = raw
        .windows(2)
        .position(|w| w[0].1 == w[1].1)
        .expect("the file repeats one frequency");
    let (line_a, f, s_a) = raw[k];
    let (line_b, _, s_b) = raw[k + 1];
    // The two readings as impedance, by the reflection formula Z = Z0 (1 + S11)/(1 − S11), Z0 = 50 Ω
    // (the file's option line).
    let (z_a, z_b) = (
        z_from_s(Method::Reflection, s_a, 50.0),
        z_from_s(Method::Reflection, s_b, 50.0),
    );
    let p = sweep
        .frequency_hz
        .iter()
        .position(|&x| x == f)
        .expect("the boundary frequency is a point");
    assert_eq!(sweep.frequency_hz.iter().filter(|&&x| x == f).count(), 1);
    assert!((sweep.impedance_ohm[p] - (z_a + z_b) / 2.0).norm() < 1e-12 * z_a.norm());
    assert!(
        sweep.sigma_ohm[p] >= (z_a - z_b).norm(),
        "σ {} below the spread {}",
        sweep.sigma_ohm[p],
        (z_a - z_b).norm()
    );
    let w = &sweep.warnings[0];
    assert!(
        w.starts_with(&format!("lines {line_a} and {line_b} repeat {f} Hz")),
        "{w}"
    );
}
