//! The Touchstone readers against the examples and rules of the open standard.
//!
//! Source throughout: Touchstone File Format Specification, Version 2.0 (IBIS Open Forum, 2009).

use henrybook::sweep::{
    DataFormat, Parameter, ReadOptions, TouchstoneVersion, parse_touchstone, read_sweep,
};
use num_complex::Complex64;

fn close(a: Complex64, b: Complex64, rel: f64) -> bool {
    (a - b).norm() <= rel * b.norm().max(1e-300)
}

// Source: Touchstone 2.0 specification, the 1-port Z-parameter example with "# MHz Z MA R 75" and
// its version 2 equivalent. The first pair (0.99 ∠ −4 normalised, 74.25 ∠ −4 Ω) is as the
// specification lists it; the other rows are from memory of the same example, and each v2 value is
// R · the v1 value, which is the rule under test.
const V1_Z_R75: &str = "!1-port Z-parameter file, multiple frequency points
# MHz Z MA R 75
!freq magZ11 angZ11
100 0.99 -4
200 0.80 -22
300 0.707 -45
400 0.40 -62
500 0.01 -89
";

const V2_Z: &str = "[Version] 2.0
# MHz Z MA
[Number of Ports] 1
[Number of Frequencies] 5
[Reference] 75
[Network Data]
!freq magZ11 angZ11
100 74.25 -4
200 60 -22
300 53.025 -45
400 30 -62
500 0.75 -89
[End]
";

#[test]
fn version_1_z_data_are_normalised_by_r_and_their_version_2_twin_is_not() {
    let v1 = parse_touchstone(V1_Z_R75, Some(1)).unwrap();
    let v2 = parse_touchstone(V2_Z, None).unwrap();
    assert_eq!(v1.version, TouchstoneVersion::V1);
    assert_eq!(v2.version, TouchstoneVersion::V2);
    assert_eq!(
        (v1.parameter, v1.format),
        (Parameter::Z, DataFormat::MagnitudeAngle)
    );
    assert_eq!(v1.frequency_hz, v2.frequency_hz);
    assert_eq!(v1.frequency_hz[0], 100e6);
    assert_eq!(v1.reference_ohm, vec![75.0]);
    for (a, b) in v1.data.iter().zip(&v2.data) {
        assert!(close(a[0], b[0], 1e-12), "{} vs {}", a[0], b[0]);
    }
    let z0 = v2.data[0][0];
    assert!((z0.norm() - 74.25).abs() < 1e-12);
    assert!((z0.arg().to_degrees() + 4.0).abs() < 1e-12);
}

// Source: Touchstone 2.0 specification: version 1 two-port lines are N11 N21 N12 N22; version 2 states
// the order with [Two-Port Data Order] 12_21 or 21_12. The numbers are the spec's 2-port S example
// as far as remembered (from memory); only their positions matter here.
const V1_TWO_PORT: &str = "!2-port S-parameter file, three frequency points
# GHz S MA R 50
!freq magS11 angS11 magS21 angS21 magS12 angS12 magS22 angS22
1.000 0.3926 -150.0 11.9961 93.2 0.0204 38.6 0.5911 -61.4
2.000 0.3735 159.4 6.8858 63.2 0.0362 29.8 0.4045 -87.4
10.000 0.4105 120.8 1.5706 15.6 0.0919 -33.7 0.3892 -126.8
";

const V2_TWO_PORT_12_21: &str = "[Version] 2.0
# GHz S MA R 50
[Number of Ports] 2
[Two-Port Data Order] 12_21
[Number of Frequencies] 3
[Network Data]
1.000 0.3926 -150.0 0.0204 38.6 11.9961 93.2 0.5911 -61.4
2.000 0.3735 159.4 0.0362 29.8 6.8858 63.2 0.4045 -87.4
10.000 0.4105 120.8 0.0919 -33.7 1.5706 15.6 0.3892 -126.8
[End]
";

#[test]
fn version_1_two_port_order_and_its_version_2_statement_agree() {
    let v1 = parse_touchstone(V1_TWO_PORT, Some(2)).unwrap();
    let v2 = parse_touchstone(V2_TWO_PORT_12_21, None).unwrap();
    assert_eq!(v1.ports, 2);
    assert_eq!(v1.data, v2.data);
    // S21 is the large forward gain in both: row 2, column 1.
    let s21 = v1.data[0][2];
    assert!((s21.norm() - 11.9961).abs() < 1e-12);
    let s12 = v1.data[0][1];
    assert!((s12.norm() - 0.0204).abs() < 1e-12);
    // 21_12 in version 2 is the version 1 order.
    let v2_21_12 = V1_TWO_PORT.replace(
        "# GHz S MA R 50",
        "[Version] 2.0\n# GHz S MA R 50\n[Number of Ports] 2\n[Two-Port Data Order] 21_12\n\
         [Number of Frequencies] 3\n[Network Data]",
    );
    assert_eq!(parse_touchstone(&v2_21_12, None).unwrap().data, v1.data);
}

// Source: Touchstone 2.0 specification: keywords, option tokens and units are case-insensitive, and
// the frequency unit multiplies the frequency column.
#[test]
fn units_and_case_follow_the_specification() {
    for (unit, scale) in [("hz", 1.0), ("KHZ", 1e3), ("MHz", 1e6), ("gHz", 1e9)] {
        let text = format!("# {unit} s ri r 50\n2.5 0.1 0.2\n");
        let net = parse_touchstone(&text, Some(1)).unwrap();
        assert_eq!(net.frequency_hz, vec![2.5 * scale]);
    }
    let v2 = V2_Z
        .replace("[Version]", "[VERSION]")
        .replace("[Number of Ports]", "[number of ports]")
        .replace("[Network Data]", "[NETWORK   DATA]");
    assert_eq!(parse_touchstone(&v2, None).unwrap().data.len(), 5);
}

// Source: Touchstone 2.0 specification: version 1 Y data are normalised by R like Z (from memory: the
// normalised admittance y = Y·R). Here a v1 Y file and a v2 Y file of one 20 mS conductance.
#[test]
fn version_1_y_data_are_normalised_too() {
    let v1 = parse_touchstone("# MHz Y RI R 25\n1 0.5 0\n", Some(1)).unwrap();
    let v2 = parse_touchstone(
        "[Version] 2.0\n# MHz Y RI R 25\n[Number of Ports] 1\n[Number of Frequencies] 1\n\
         [Network Data]\n1 0.02 0\n[End]\n",
        None,
    )
    .unwrap();
    assert!(close(v1.data[0][0], Complex64::new(0.02, 0.0), 1e-12));
    assert!(close(v2.data[0][0], Complex64::new(0.02, 0.0), 1e-12));
}

/// 25 points of a 1-port Z file in version 1 (normalised by 75 Ω) and version 2 (ohms).
#[test]
fn read_sweep_gives_the_same_impedance_for_both_versions() {
    let mut v1 = String::from("# kHz Z RI R 75\n");
    let mut v2 = String::from(
        "[Version] 2.0\n# kHz Z RI R 75\n[Number of Ports] 1\n[Number of Frequencies] 25\n[Network Data]\n",
    );
    for k in 1..=25 {
        let z = Complex64::new(0.3, 0.05 * k as f64 * 75.0);
        v1.push_str(&format!("{k} {} {}\n", z.re / 75.0, z.im / 75.0));
        v2.push_str(&format!("{k} {} {}\n", z.re, z.im));
    }
    v2.push_str("[End]\n");
    let a = read_sweep("one.s1p", v1.as_bytes(), &ReadOptions::default()).unwrap();
    let b = read_sweep("two.ts", v2.as_bytes(), &ReadOptions::default()).unwrap();
    assert_eq!(a.frequency_hz, b.frequency_hz);
    for (x, y) in a.impedance_ohm.iter().zip(&b.impedance_ohm) {
        assert!(close(*x, *y, 1e-12));
    }
    assert_eq!(a.z0_ohm, 75.0);
}
