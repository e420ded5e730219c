//! S ↔ Z for each measurement method, the sensitivity ∂Z/∂S, and 2×2 network-matrix conversions.
//!
//! With a real reference impedance Z0 on both ports (common practice, no source; the textbook
//! relations for a one-port load and for a series or shunt element between matched ports):
//! - reflection: S11 = (Z − Z0)/(Z + Z0), Z = Z0 (1 + S11)/(1 − S11);
//! - series-thru: S21 = 2 Z0/(2 Z0 + Z), Z = 2 Z0 (1 − S21)/S21;
//! - shunt-thru: S21 = 2 Z/(2 Z + Z0), Z = Z0 S21/(2 (1 − S21)).
//!
//! Each map is holomorphic, so circular noise of σ on S becomes circular noise of |∂Z/∂S|·σ on Z.

use super::Method;
use num_complex::Complex64;

/// A 2×2 complex matrix, row-major: `m[i][j]` is N(i+1)(j+1).
pub type Mat2 = [[Complex64; 2]; 2];

/// The DUT impedance the measured S-parameter implies (S11 for reflection, S21 for the thru methods).
/// `Direct` treats `s` as the impedance itself. An open (S11 = 1, S21 = 0 or 1) gives a non-finite
/// value, which the readers report as an error.
pub fn z_from_s(method: Method, s: Complex64, z0_ohm: f64) -> Complex64 {
    let one = Complex64::new(1.0, 0.0);
    match method {
        Method::Reflection => z0_ohm * (one + s) / (one - s),
        Method::SeriesThru => 2.0 * z0_ohm * (one - s) / s,
        Method::ShuntThru => z0_ohm * s / (2.0 * (one - s)),
        Method::Direct => s,
    }
}

/// The S-parameter a DUT of impedance `z` shows in each method (inverse of [`z_from_s`]).
pub fn s_from_z(method: Method, z: Complex64, z0_ohm: f64) -> Complex64 {
    match method {
        Method::Reflection => (z - z0_ohm) / (z + z0_ohm),
        Method::SeriesThru => Complex64::new(2.0 * z0_ohm, 0.0) / (2.0 * z0_ohm + z),
        Method::ShuntThru => 2.0 * z / (2.0 * z + z0_ohm),
        Method::Direct => z,
    }
}

/// ∂Z/∂S of [`z_from_s`] at `s`: how strongly noise on the measured S-parameter shows in Z.
pub fn dz_ds(method: Method, s: Complex64, z0_ohm: f64) -> Complex64 {
    let one = Complex64::new(1.0, 0.0);
    match method {
        Method::Reflection => 2.0 * z0_ohm / ((one - s) * (one - s)),
        Method::SeriesThru => -2.0 * z0_ohm / (s * s),
        Method::ShuntThru => z0_ohm / (2.0 * (one - s) * (one - s)),
        Method::Direct => one,
    }
}

/// The full S-matrix of an ideal element of impedance `z` between two ports of reference `z0_ohm`:
/// in series (S11 = S22 = Z/(Z + 2 Z0), S21 = S12 = 2 Z0/(Z + 2 Z0)) or as a shunt to ground
/// (S11 = S22 = −Z0/(Z0 + 2 Z), S21 = S12 = 2 Z/(2 Z + Z0)). `None` for the 1-port methods.
pub fn two_port_s(method: Method, z: Complex64, z0_ohm: f64) -> Option<Mat2> {
    let (s11, s21) = match method {
        Method::SeriesThru => (z / (z + 2.0 * z0_ohm), s_from_z(method, z, z0_ohm)),
        Method::ShuntThru => (-z0_ohm / (z0_ohm + 2.0 * z), s_from_z(method, z, z0_ohm)),
        Method::Reflection | Method::Direct => return None,
    };
    Some([[s11, s21], [s21, s11]])
}

/// Row-major n×n data (n = 1 or 2) as a 2×2 matrix; a 1-port fills only `[0][0]`.
pub fn mat2(data: &[Complex64]) -> Mat2 {
    let z = Complex64::new(0.0, 0.0);
    match data.len() {
        4 => [[data[0], data[1]], [data[2], data[3]]],
        1 => [[data[0], z], [z, z]],
        _ => [[z, z], [z, z]],
    }
}

pub fn identity() -> Mat2 {
    let (o, z) = (Complex64::new(1.0, 0.0), Complex64::new(0.0, 0.0));
    [[o, z], [z, o]]
}

pub fn add(a: &Mat2, b: &Mat2) -> Mat2 {
    [
        [a[0][0] + b[0][0], a[0][1] + b[0][1]],
        [a[1][0] + b[1][0], a[1][1] + b[1][1]],
    ]
}

pub fn sub(a: &Mat2, b: &Mat2) -> Mat2 {
    [
        [a[0][0] - b[0][0], a[0][1] - b[0][1]],
        [a[1][0] - b[1][0], a[1][1] - b[1][1]],
    ]
}

pub fn scale(a: &Mat2, k: Complex64) -> Mat2 {
    [[a[0][0] * k, a[0][1] * k], [a[1][0] * k, a[1][1] * k]]
}

pub fn mul(a: &Mat2, b: &Mat2) -> Mat2 {
    [
        [
            a[0][0] * b[0][0] + a[0][1] * b[1][0],
            a[0][0] * b[0][1] + a[0][1] * b[1][1],
        ],
        [
            a[1][0] * b[0][0] + a[1][1] * b[1][0],
            a[1][0] * b[0][1] + a[1][1] * b[1][1],
        ],
    ]
}

/// The inverse by the adjugate (exact for 2×2); a singular matrix gives non-finite entries.
pub fn inv(a: &Mat2) -> Mat2 {
    let det = a[0][0] * a[1][1] - a[0][1] * a[1][0];
    let d = det.inv();
    [[a[1][1] * d, -a[0][1] * d], [-a[1][0] * d, a[0][0] * d]]
}

/// S = (Z − Z0·I)(Z + Z0·I)⁻¹ with the same real reference on both ports.
pub fn s_from_z_matrix(z: &Mat2, z0_ohm: f64) -> Mat2 {
    let r = scale(&identity(), Complex64::new(z0_ohm, 0.0));
    mul(&sub(z, &r), &inv(&add(z, &r)))
}

/// S = (I − Z0·Y)(I + Z0·Y)⁻¹ with the same real reference on both ports.
pub fn s_from_y_matrix(y: &Mat2, z0_ohm: f64) -> Mat2 {
    let zy = scale(y, Complex64::new(z0_ohm, 0.0));
    mul(&sub(&identity(), &zy), &inv(&add(&identity(), &zy)))
}

/// Y = (1/Z0)(I − S)(I + S)⁻¹ with the same real reference on both ports.
pub fn y_from_s_matrix(s: &Mat2, z0_ohm: f64) -> Mat2 {
    scale(
        &mul(&sub(&identity(), s), &inv(&add(&identity(), s))),
        Complex64::new(1.0 / z0_ohm, 0.0),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: Complex64, b: Complex64, tol: f64) -> bool {
        (a - b).norm() <= tol * (1.0 + b.norm())
    }

    #[test]
    fn conversion_check_values() {
        // Source: the team's gathered check values, computed from the relations above and agreeing
        // with scikit-rf to 5e-15 (tests/sweep/skrf.rs checks scikit-rf live): Z = 0.5 + j62.8319 Ω,
        // Z0 = 50.
        let z = Complex64::new(0.5, 62.8319);
        let s11 = s_from_z(Method::Reflection, z, 50.0);
        assert!(
            close(s11, Complex64::new(0.222849, 0.966928), 2e-6),
            "{s11}"
        );
        let s21 = s_from_z(Method::SeriesThru, z, 50.0);
        assert!(
            close(s21, Complex64::new(0.715400, -0.447263), 2e-6),
            "{s21}"
        );
        let s21 = s_from_z(Method::ShuntThru, z, 50.0);
        assert!(
            close(s21, Complex64::new(0.861356, 0.341619), 2e-6),
            "{s21}"
        );
    }

    #[test]
    fn z_from_s_inverts_s_from_z_for_every_method() {
        for method in [
            Method::Reflection,
            Method::SeriesThru,
            Method::ShuntThru,
            Method::Direct,
        ] {
            for z in [
                Complex64::new(0.01, 0.3),
                Complex64::new(50.0, 0.0),
                Complex64::new(3e3, -2e4),
            ] {
                let back = z_from_s(method, s_from_z(method, z, 50.0), 50.0);
                assert!(close(back, z, 1e-9), "{method:?} {z} -> {back}");
            }
        }
    }

    #[test]
    fn sensitivity_matches_a_finite_difference() {
        for method in [Method::Reflection, Method::SeriesThru, Method::ShuntThru] {
            let s = s_from_z(method, Complex64::new(20.0, 300.0), 50.0);
            let h = Complex64::new(1e-7, 0.0);
            let fd = (z_from_s(method, s + h, 50.0) - z_from_s(method, s - h, 50.0)) / (2.0 * h);
            let an = dz_ds(method, s, 50.0);
            assert!(close(an, fd, 1e-6), "{method:?}: {an} vs {fd}");
        }
    }

    #[test]
    fn the_ideal_two_port_elements_are_lossless_at_a_reactance() {
        // A lossless two-port has a unitary S-matrix: |S11|² + |S21|² = 1.
        for method in [Method::SeriesThru, Method::ShuntThru] {
            let s = two_port_s(method, Complex64::new(0.0, 37.0), 50.0).unwrap();
            assert!((s[0][0].norm_sqr() + s[1][0].norm_sqr() - 1.0).abs() < 1e-12);
        }
        assert!(two_port_s(Method::Reflection, Complex64::new(1.0, 0.0), 50.0).is_none());
    }

    #[test]
    fn matrix_conversions_of_a_series_element_agree_with_the_thru_formula() {
        // A series element Z between the ports has Y = (1/Z)[[1, −1], [−1, 1]].
        let z = Complex64::new(3.0, 40.0);
        let y = z.inv();
        let ym = [[y, -y], [-y, y]];
        let s = s_from_y_matrix(&ym, 50.0);
        assert!(close(s[1][0], s_from_z(Method::SeriesThru, z, 50.0), 1e-12));
        let back = y_from_s_matrix(&s, 50.0);
        assert!(close(back[0][1], -y, 1e-12));
        // A shunt element has Z = Z·[[1, 1], [1, 1]].
        let zm = [[z, z], [z, z]];
        let s = s_from_z_matrix(&zm, 50.0);
        assert!(close(s[1][0], s_from_z(Method::ShuntThru, z, 50.0), 1e-12));
    }
}
