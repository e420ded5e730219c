//! The upload's text fields and fit options, as the upload operation parses them: `number` for the numeric
//! fields, then `check_upload_fields`. The first byte says which fixture files came with the upload;
//! the rest is the fields in form order separated by NUL bytes (fixture_topology, part_number, lot,
//! method, z0_ohm, dcr_ohm, temperature_c, operator, options).
#![no_main]

use henrybook::ops::sweeps::{UploadInput, check_upload_fields, number, parse_options};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Some((&flags, rest)) = data.split_first() else {
        return;
    };
    let text = String::from_utf8_lossy(rest);
    let mut fields = text.split('\0');
    let mut next = || fields.next().unwrap_or("").to_string();
    let (topology, part_number, lot, method) = (next(), next(), next(), next());
    let (z0, dcr, temperature) = (next(), next(), next());
    let (operator, options) = (next(), next());
    let numbers = [
        number("z0_ohm", &z0),
        number("dcr_ohm", &dcr),
        number("temperature_c", &temperature),
    ];
    let mut values = [None; 3];
    for (v, n) in values.iter_mut().zip(numbers) {
        match n {
            Ok(x) => {
                assert!(x.is_none_or(f64::is_finite));
                *v = x;
            }
            Err(p) => {
                assert!(!p.detail.is_empty());
                return;
            }
        }
    }
    let input = UploadInput {
        fixture_topology: topology,
        part_number,
        lot,
        method,
        z0_ohm: values[0],
        dcr_ohm: values[1],
        temperature_c: values[2],
        operator,
        options,
        ..UploadInput::default()
    };
    match check_upload_fields(&input, flags & 1 != 0, flags & 2 != 0) {
        Ok(f) => {
            let (part_number, lot) = (f.part_number.as_str(), f.lot.as_str());
            assert!(!part_number.is_empty() && part_number.len() <= 64);
            assert!(!lot.is_empty() && lot == lot.trim());
            assert!(lot.chars().count() <= 64 && !lot.chars().any(char::is_control));
            assert!(f.z0_ohm.is_none_or(|z| z > 0.0));
            assert!(f.dcr_ohm.is_none_or(|r| r > 0.0));
            // What is stored must read back as the same options (the worker parses it again).
            let back = parse_options(&f.options_json)
                .unwrap_or_else(|p| panic!("stored options do not parse back: {}", p.detail));
            assert_eq!(serde_json::to_string(&back).unwrap(), f.options_json);
        }
        Err(p) => assert!(!p.detail.is_empty()),
    }
});
