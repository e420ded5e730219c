//! Touchstone 1-port and CSV exports: a conversion check value, scikit-rf reading the file back, and
//! clear errors for bad grids.

use henrybook::export::csv::impedance_csv;
use henrybook::export::touchstone::touchstone_1port;
use henrybook::export::{ExportContext, ExportError, log_frequency_grid};
use henrybook::model::{ImpedanceModel, LumpedModel, Section, SectionKind};
use henrybook_tests::run_reference_script;

fn ctx() -> ExportContext {
    ExportContext {
        part_number: Some("CHK-100/22".to_string()),
        fit_id: Some("fit-7f3a".to_string()),
        revision: Some(3),
        sweep_sha256: Some("9c1e".repeat(16)),
        band_hz: [1e3, 1e8],
    }
}

/// Invented model (demo-free test data): a choke with one extra series section.
fn choke() -> LumpedModel {
    LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.02,
        k_ac_ohm_per_sqrt_hz: 2e-5,
        rp_ohm: Some(50e3),
        cp_f: 5e-12,
        ls_h: 2e-9,
        sections: vec![Section {
            kind: SectionKind::Series,
            r_ohm: 3.0,
            l_h: 40e-9,
            c_f: 1e-12,
        }],
        core: None,
    }
}

fn data_lines(text: &str) -> Vec<Vec<f64>> {
    text.lines()
        .filter(|l| !l.starts_with('!') && !l.starts_with('#'))
        .map(|l| l.split_whitespace().map(|t| t.parse().unwrap()).collect())
        .collect()
}

#[test]
fn the_reflection_of_the_check_impedance_is_the_reference_value() {
    // Source (TOOLBOX conversion check, agrees with scikit-rf): Z = 0.5 + j62.8319 Ω, Z0 = 50 Ω
    // gives S11 = 0.222849 + 0.966928j. Z is 0.5 Ω in series with 10 µH at 1 MHz.
    let model = LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.5,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: None,
        cp_f: 0.0,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    };
    let text = touchstone_1port(&model, &[1e6], 50.0, &ctx()).unwrap();
    assert!(text.contains("\n# HZ S RI R 50\n"), "{text}");
    let rows = data_lines(&text);
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0][0], 1e6);
    assert!((rows[0][1] - 0.222849).abs() < 1e-6, "{:?}", rows[0]);
    assert!((rows[0][2] - 0.966928).abs() < 1e-6, "{:?}", rows[0]);
}

#[test]
fn scikit_rf_reads_the_file_back_to_the_model_impedance() {
    // Source: scikit-rf's Touchstone reader and its S→Z conversion (an independent implementation).
    let grid = log_frequency_grid(1e3, 1e8, 201).unwrap();
    let model = choke();
    for z0 in [50.0, 75.0] {
        let text = touchstone_1port(&model, &grid, z0, &ctx()).unwrap();
        let out = run_reference_script("export_touchstone.py", &[], &text);
        let f: Vec<f64> = serde_json::from_value(out["frequency_hz"].clone()).unwrap();
        let zr: Vec<f64> = serde_json::from_value(out["z_real_ohm"].clone()).unwrap();
        let zi: Vec<f64> = serde_json::from_value(out["z_imag_ohm"].clone()).unwrap();
        assert_eq!(out["z0_ohm"].as_f64().unwrap(), z0);
        assert_eq!(f.len(), grid.len());
        for i in 0..grid.len() {
            assert!((f[i] / grid[i] - 1.0).abs() < 1e-12);
            let z = model.impedance(grid[i]);
            let back = num_complex::Complex64::new(zr[i], zi[i]);
            // S11 near ±1 amplifies rounding in (1+S)/(1−S): allow 1e-9 relative.
            assert!(
                (back - z).norm() <= 1e-9 * z.norm(),
                "z0 {z0}, {} Hz: scikit-rf {back} vs model {z}",
                grid[i]
            );
        }
    }
}

#[test]
fn the_csv_has_the_sweep_columns_and_the_model_values() {
    let grid = log_frequency_grid(1e3, 1e8, 51).unwrap();
    let text = impedance_csv(&choke(), &grid).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("frequency_hz,z_real_ohm,z_imag_ohm"));
    let rows: Vec<Vec<f64>> = lines
        .map(|l| l.split(',').map(|t| t.parse().unwrap()).collect())
        .collect();
    assert_eq!(rows.len(), 51);
    for (row, &f) in rows.iter().zip(&grid) {
        let z = choke().impedance(f);
        assert_eq!(row[0], f);
        assert_eq!(
            (row[1], row[2]),
            (z.re, z.im),
            "values are written round-trip"
        );
    }
}

#[test]
fn bad_grids_and_references_are_refused_with_the_position() {
    let m = choke();
    let e = impedance_csv(&m, &[1e3, 2e3, 2e3]).unwrap_err();
    assert!(
        matches!(&e, ExportError::InvalidGrid(s) if s.contains("frequency_hz[2]")),
        "{e}"
    );
    let e = touchstone_1port(&m, &[1e3, f64::NAN], 50.0, &ctx()).unwrap_err();
    assert!(
        matches!(&e, ExportError::InvalidGrid(s) if s.contains("frequency_hz[1]")),
        "{e}"
    );
    let e = touchstone_1port(&m, &[], 50.0, &ctx()).unwrap_err();
    assert!(matches!(e, ExportError::InvalidGrid(_)));
    let e = touchstone_1port(&m, &[1e3], 0.0, &ctx()).unwrap_err();
    assert!(matches!(e, ExportError::InvalidReference(_)));
    assert!(log_frequency_grid(1e3, 1e2, 10).is_err());
    assert!(log_frequency_grid(1e3, 1e6, 1).is_err());
}

#[test]
fn henrybook_reads_its_own_exports_back_as_sweeps() {
    use henrybook::sweep::{ReadOptions, read_sweep};
    let grid = log_frequency_grid(1e3, 1e8, 101).unwrap();
    let model = choke();
    let csv = impedance_csv(&model, &grid).unwrap();
    let ts = touchstone_1port(&model, &grid, 50.0, &ctx()).unwrap();
    for (name, text, tol) in [("model.csv", &csv, 1e-15), ("model.s1p", &ts, 1e-9)] {
        let sweep = read_sweep(name, text.as_bytes(), &ReadOptions::default())
            .unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(sweep.frequency_hz, grid, "{name}");
        for (z, &f) in sweep.impedance_ohm.iter().zip(&grid) {
            let expect = model.impedance(f);
            assert!(
                (z - expect).norm() <= tol * expect.norm(),
                "{name} {f}: {z} vs {expect}"
            );
        }
    }
}
