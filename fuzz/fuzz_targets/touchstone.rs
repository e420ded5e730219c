//! Touchstone files through `read_network` and `read_sweep`. The first byte picks the file name (its
//! extension is the port hint) and the method; the rest is the file.
#![no_main]

use henrybook::sweep::{ReadOptions, read_network, read_sweep};
use henrybook_fuzz::{METHODS, assert_clear, assert_network, assert_sweep};
use libfuzzer_sys::fuzz_target;

const NAMES: [&str; 4] = ["part.s1p", "part.s2p", "part.ts", "upload"];

fuzz_target!(|data: &[u8]| {
    let Some((&selector, file)) = data.split_first() else {
        return;
    };
    let name = NAMES[usize::from(selector & 3)];
    let options = ReadOptions {
        method: METHODS[usize::from(selector >> 2) % METHODS.len()],
        ..ReadOptions::default()
    };
    match read_network(name, file) {
        Ok(net) => assert_network(&net, file),
        Err(e) => assert_clear(&e, file),
    }
    match read_sweep(name, file, &options) {
        Ok(sweep) => assert_sweep(&sweep, file),
        Err(e) => assert_clear(&e, file),
    }
});
