//! Property tests: no input makes the readers panic, and every refusal is a clear error that points
//! at a line inside the file (or at the file as a whole).
//!
//! The valid starting files are synthetic (a known model, made here for this test only).

use henrybook::model::{ImpedanceModel, LumpedModel};
use henrybook::sweep::assemble::LISTED_MERGES;
use henrybook::sweep::convert::{s_from_z, two_port_s};
use henrybook::sweep::{
    DataFormat, Method, Network, Parameter, ReadOptions, SweepError, TouchstoneVersion,
    TwoPortOrder, read_sweep, write_touchstone,
};
use proptest::prelude::*;

fn model_z() -> (Vec<f64>, Vec<num_complex::Complex64>) {
    let m = LumpedModel {
        l0_h: 4.7e-6,
        rdc_ohm: 0.03,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: Some(5e3),
        cp_f: 3e-12,
        ls_h: 0.0,
        sections: vec![],
        core: None,
    };
    let f: Vec<f64> = (0..30).map(|k| 1e4 * 1.3f64.powi(k)).collect();
    let z = f.iter().map(|&f| m.impedance(f)).collect();
    (f, z)
}

/// Valid files to mutate: (name, text, options that read them).
fn valid_files() -> Vec<(&'static str, String, ReadOptions)> {
    let (f, z) = model_z();
    let one_port = Network {
        version: TouchstoneVersion::V1,
        ports: 1,
        parameter: Parameter::S,
        format: DataFormat::MagnitudeAngle,
        frequency_unit_hz: 1e3,
        reference_ohm: vec![50.0],
        two_port_order: None,
        frequency_hz: f.clone(),
        data: z
            .iter()
            .map(|&z| vec![s_from_z(Method::Reflection, z, 50.0)])
            .collect(),
        line: vec![0; f.len()],
    };
    let two_port = Network {
        version: TouchstoneVersion::V2,
        ports: 2,
        parameter: Parameter::S,
        format: DataFormat::DecibelAngle,
        frequency_unit_hz: 1e6,
        reference_ohm: vec![50.0, 50.0],
        two_port_order: Some(TwoPortOrder::N12First),
        frequency_hz: f.clone(),
        data: z
            .iter()
            .map(|&z| {
                let m = two_port_s(Method::SeriesThru, z, 50.0).unwrap();
                vec![m[0][0], m[0][1], m[1][0], m[1][1]]
            })
            .collect(),
        line: vec![0; f.len()],
    };
    let mut csv = String::from("frequency_hz,z_mag_ohm,z_phase_deg\n");
    for (f, z) in f.iter().zip(&z) {
        csv.push_str(&format!("{f},{},{}\n", z.norm(), z.arg().to_degrees()));
    }
    let series = ReadOptions {
        method: Some(Method::SeriesThru),
        ..ReadOptions::default()
    };
    vec![
        (
            "part.s1p",
            write_touchstone(&one_port, &["v1 reflection"]),
            ReadOptions::default(),
        ),
        (
            "part.s2p",
            write_touchstone(&two_port, &["v2 series-thru"]),
            series,
        ),
        ("part.csv", csv, ReadOptions::default()),
    ]
}

/// The error is clear: a message, and a line that exists in the file.
fn assert_clear(err: &SweepError, text: &[u8]) {
    assert!(!err.message.trim().is_empty(), "empty error message");
    let lines = text.split(|&b| b == b'\n').count();
    if let Some(l) = err.line {
        assert!(
            l >= 1 && l <= lines,
            "line {l} outside a file of {lines} lines: {err}"
        );
    }
}

fn read(name: &str, bytes: &[u8], options: &ReadOptions) {
    match read_sweep(name, bytes, options) {
        Ok(s) => {
            // Any length reads (the fit's minimum is its callers' check); the result is a valid sweep.
            assert!(!s.frequency_hz.is_empty());
            assert!(s.frequency_hz.windows(2).all(|w| w[0] < w[1]));
            assert!(s.frequency_hz.iter().all(|f| f.is_finite() && *f > 0.0));
            assert!(
                s.impedance_ohm
                    .iter()
                    .all(|z| z.re.is_finite() && z.im.is_finite())
            );
            assert!(s.sigma_ohm.iter().all(|s| *s > 0.0));
            s.validate().unwrap();
            // Listed merges, one summary of the rest, one about the 0 Hz row: never more.
            assert!(s.warnings.len() <= LISTED_MERGES + 2, "{:?}", s.warnings);
            if let Some(dc) = s.dc_reading {
                let lines = bytes.split(|&b| b == b'\n').count();
                assert!(dc.line >= 1 && dc.line <= lines, "{dc:?}");
            }
        }
        Err(e) => assert_clear(&e, bytes),
    }
}

const JUNK: &[&str] = &[
    "nan",
    "inf",
    "-inf",
    "-1",
    "0",
    "1e400",
    "abc",
    "",
    "#",
    "# GHz Z RI",
    "!",
    "[End]",
    "[Network Data]",
    "[Version] 2.0",
    "[Number of Ports] 7",
    "1,2",
    ";",
    "\"",
    "R",
    "\u{fffd}",
    "1 2 3 4 5",
    "frequency_hz",
    "0x10",
    "1e-400",
    "  ",
    "\t",
];

#[derive(Debug, Clone)]
enum Mutation {
    DeleteLine(usize),
    DuplicateLine(usize),
    SwapLines(usize, usize),
    ReplaceToken(usize, usize, usize),
    InsertLine(usize, usize),
    Truncate(usize),
    FlipByte(usize, u8),
}

fn mutation() -> impl Strategy<Value = Mutation> {
    let i = 0usize..1000;
    prop_oneof![
        i.clone().prop_map(Mutation::DeleteLine),
        i.clone().prop_map(Mutation::DuplicateLine),
        (i.clone(), i.clone()).prop_map(|(a, b)| Mutation::SwapLines(a, b)),
        (i.clone(), 0usize..20, 0..JUNK.len())
            .prop_map(|(l, t, j)| Mutation::ReplaceToken(l, t, j)),
        (i.clone(), 0..JUNK.len()).prop_map(|(l, j)| Mutation::InsertLine(l, j)),
        (0usize..100_000).prop_map(Mutation::Truncate),
        (0usize..100_000, any::<u8>()).prop_map(|(p, b)| Mutation::FlipByte(p, b)),
    ]
}

fn apply(text: &str, m: &Mutation) -> Vec<u8> {
    let mut lines: Vec<String> = text.split('\n').map(str::to_string).collect();
    let n = lines.len();
    match *m {
        Mutation::DeleteLine(i) => {
            lines.remove(i % n);
        }
        Mutation::DuplicateLine(i) => {
            let l = lines[i % n].clone();
            lines.insert(i % n, l);
        }
        Mutation::SwapLines(a, b) => lines.swap(a % n, b % n),
        Mutation::ReplaceToken(l, t, j) => {
            let line = &lines[l % n];
            let sep = if line.contains(',') { ',' } else { ' ' };
            let mut toks: Vec<String> = line.split(sep).map(str::to_string).collect();
            let k = t % toks.len();
            toks[k] = JUNK[j].to_string();
            lines[l % n] = toks.join(&sep.to_string());
        }
        Mutation::InsertLine(l, j) => lines.insert(l % (n + 1), JUNK[j].to_string()),
        Mutation::Truncate(p) => {
            let mut b = text.as_bytes().to_vec();
            b.truncate(p % (b.len() + 1));
            return b;
        }
        Mutation::FlipByte(p, v) => {
            let mut b = text.as_bytes().to_vec();
            if b.is_empty() {
                // An earlier mutation may have truncated the file to nothing: no byte to flip.
                return b;
            }
            let k = p % b.len();
            b[k] = v;
            return b;
        }
    }
    lines.join("\n").into_bytes()
}

const NAMES: &[&str] = &[
    "x.s1p", "x.s2p", "x.s0p", "x.s9p", "x.ts", "x.csv", "x.txt", "x", "",
];
const METHODS: &[Option<Method>] = &[
    None,
    Some(Method::Reflection),
    Some(Method::SeriesThru),
    Some(Method::ShuntThru),
    Some(Method::Direct),
];

#[test]
fn the_valid_files_read() {
    for (name, text, options) in valid_files() {
        let sweep =
            read_sweep(name, text.as_bytes(), &options).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(sweep.frequency_hz.len(), 30, "{name}");
        // The mutations can leave a file valid (so the property test sees both outcomes): dropping
        // the last data line still reads, with one point fewer.
        let lines: Vec<&str> = text.split('\n').collect();
        let last_data = lines
            .iter()
            .rposition(|l| l.starts_with(|c: char| c.is_ascii_digit()))
            .unwrap();
        let fewer = apply(&text, &Mutation::DeleteLine(last_data));
        let fewer_text = String::from_utf8(fewer.clone()).unwrap();
        let result = read_sweep(name, &fewer, &options);
        if fewer_text.contains("[Number of Frequencies]") {
            // Version 2 counts its frequencies: the same deletion is a clear error there.
            let err = result.unwrap_err();
            assert!(
                err.message.contains("Number of Frequencies"),
                "{name}: {err}"
            );
        } else {
            assert_eq!(result.unwrap().frequency_hz.len(), 29, "{name}");
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn random_bytes_never_panic(
        bytes in proptest::collection::vec(any::<u8>(), 0..2000),
        name in 0..NAMES.len(),
        method in 0..METHODS.len(),
    ) {
        let options = ReadOptions { method: METHODS[method], ..ReadOptions::default() };
        read(NAMES[name], &bytes, &options);
    }

    #[test]
    fn random_text_lines_never_panic(
        lines in proptest::collection::vec(
            prop_oneof![
                proptest::sample::select(JUNK).prop_map(str::to_string),
                "[ -~]{0,40}",
                "[0-9. e+-]{0,40}",
            ],
            0..60,
        ),
        name in 0..NAMES.len(),
        method in 0..METHODS.len(),
    ) {
        let text = lines.join("\n");
        let options = ReadOptions { method: METHODS[method], ..ReadOptions::default() };
        read(NAMES[name], text.as_bytes(), &options);
    }

    #[test]
    fn mutated_valid_files_never_panic(
        which in 0usize..3,
        mutations in proptest::collection::vec(mutation(), 1..4),
        method in 0..METHODS.len(),
        swap_name in any::<bool>(),
    ) {
        let (name, text, options) = valid_files().swap_remove(which);
        let mut bytes = text.into_bytes();
        for m in &mutations {
            bytes = apply(&String::from_utf8_lossy(&bytes), m);
        }
        let options = if swap_name { ReadOptions { method: METHODS[method], ..options } } else { options };
        read(name, &bytes, &options);
    }
}
