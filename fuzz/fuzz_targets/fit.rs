//! The whole engine on any sweep a CSV file can carry: read, fit (lumped or rational), the report as
//! the service stores it, and the SPICE netlist as it is downloaded. The first byte picks the method
//! and the family. Beyond "no panic, no abort, no hang" (a fit that overruns its time limit
//! fivefold is a hang), a fit that returns is a report with finite
//! figures that reads back from its JSON to the same value, and its netlist is written or refused with
//! a reason; a refusal is a clear error.
#![no_main]

use henrybook::export::{ExportContext, subcircuit};
use henrybook::fit::{FitControl, FitOptions, FitReport, ModelFamily, fit};
use henrybook::sweep::{ReadOptions, read_sweep};
use henrybook_fuzz::{METHODS, assert_clear, assert_sweep};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Some((&selector, file)) = data.split_first() else {
        return;
    };
    let options = ReadOptions {
        method: METHODS[usize::from(selector & 0x0f) % METHODS.len()],
        ..ReadOptions::default()
    };
    let sweep = match read_sweep("lot.csv", file, &options) {
        Ok(sweep) => sweep,
        Err(e) => return assert_clear(&e, file),
    };
    assert_sweep(&sweep, file);
    if let Err(e) = sweep.check_fittable() {
        return assert_clear(&e, file);
    }
    let family = if selector & 0x10 == 0 {
        ModelFamily::Lumped
    } else {
        ModelFamily::Rational
    };
    // A fit stops at its own time limit (checked between candidate models); 2 s here, so an input
    // that runs into libFuzzer's 10 s hang limit is a fit that overran its limit fivefold.
    let options = FitOptions {
        family,
        time_limit_s: 2.0,
        ..FitOptions::default()
    };
    let report = match fit(&sweep, &options, &FitControl::default()) {
        Ok(report) => report,
        Err(e) => {
            assert!(
                !e.to_string().trim().is_empty(),
                "a fit error without a message"
            );
            return;
        }
    };
    assert!(
        report.band_hz[0] > 0.0 && report.band_hz[0] <= report.band_hz[1],
        "band {:?}",
        report.band_hz
    );
    let stored = serde_json::to_string(&report).expect("a report serialises");
    let back: FitReport = serde_json::from_str(&stored).expect("a stored report reads back");
    assert_eq!(
        serde_json::to_value(&back).unwrap(),
        serde_json::to_value(&report).unwrap(),
        "the stored report reads back to another value"
    );
    let ctx = ExportContext::for_band(report.band_hz[0], report.band_hz[1]);
    match subcircuit(&report.model, &ctx) {
        Ok(netlist) => assert!(netlist.contains(".SUBCKT") || netlist.contains(".subckt")),
        Err(e) => assert!(
            !e.to_string().trim().is_empty(),
            "an export error without a message"
        ),
    }
});
