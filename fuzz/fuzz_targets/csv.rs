//! Impedance CSV files through `read_sweep`. The first byte picks the method, whether the name says
//! `.csv` or the content must tell, and a zero relative floor (σ from the absolute floor alone).
#![no_main]

use henrybook::sweep::{ReadOptions, read_sweep};
use henrybook_fuzz::{METHODS, assert_clear, assert_sweep};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Some((&selector, file)) = data.split_first() else {
        return;
    };
    let name = if selector & 0x20 == 0 {
        "lot.csv"
    } else {
        "upload"
    };
    let options = ReadOptions {
        method: METHODS[usize::from(selector & 0x1f) % METHODS.len()],
        relative_floor: (selector & 0x40 != 0).then_some(0.0),
        ..ReadOptions::default()
    };
    match read_sweep(name, file, &options) {
        Ok(sweep) => assert_sweep(&sweep, file),
        Err(e) => assert_clear(&e, file),
    }
});
