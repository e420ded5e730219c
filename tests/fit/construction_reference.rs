//! Construction-based estimates against handbook tables and published values.

use henrybook::model::construction::{
    COPPER_RESISTIVITY_20C_OHM_M, Winding, awg_diameter_m, copper_resistivity_ohm_m, dowell_factor,
    gapped_permeability, inductance_from_al, inductance_from_core, round_wire_delta, skin_depth_m,
    wire_resistance_ohm,
};

fn close(got: f64, expect: f64, rel: f64, what: &str) {
    assert!(
        (got / expect - 1.0).abs() <= rel,
        "{what}: got {got}, expected {expect} (±{rel:e} relative)"
    );
}

#[test]
fn annealed_copper_is_58_ms_per_m_at_20_c() {
    // Source: NBS Handbook 100, Copper Wire Tables (1966): 100 % IACS = 58 MS/m, ρ = 1.72414e-8 Ω·m.
    close(COPPER_RESISTIVITY_20C_OHM_M, 1.72414e-8, 3e-6, "ρ20");
    close(
        copper_resistivity_ohm_m(20.0).unwrap(),
        1.72414e-8,
        3e-6,
        "ρ(20 °C)",
    );
    // Source: same handbook, α20 = 0.00393 /K: ρ(75 °C) = ρ20·(1 + 0.00393·55).
    close(
        copper_resistivity_ohm_m(75.0).unwrap(),
        1.72414e-8 * 1.216_15,
        1e-5,
        "ρ(75 °C)",
    );
}

#[test]
fn awg_diameters_and_resistances_match_the_wire_table() {
    // Source: ASTM B258 diameters with IACS resistivity, as tabulated in NBS Handbook 100
    // (values in TOOLBOX.md): AWG, diameter mm, Ω/km at 20 °C.
    let table = [
        (20, 0.8118, 33.31),
        (24, 0.5106, 84.22),
        (28, 0.3211, 212.9),
        (30, 0.2546, 338.6),
        (36, 0.1270, 1361.0),
    ];
    for (awg, d_mm, ohm_per_km) in table {
        let d = awg_diameter_m(awg).unwrap();
        // Four significant figures in the table: half a unit of the last digit.
        assert!(
            (d * 1e3 - d_mm).abs() <= 0.000_05 + 1e-12,
            "AWG {awg}: {} mm",
            d * 1e3
        );
        let r = wire_resistance_ohm(d, 1000.0, 20.0).unwrap();
        close(r, ohm_per_km, 2e-4, &format!("AWG {awg} Ω/km"));
    }
    // Source: ASTM B258 definition: AWG 36 is exactly 0.005 in, 4/0 (gauge −3) exactly 0.46 in.
    close(awg_diameter_m(36).unwrap(), 0.005 * 0.0254, 1e-12, "AWG 36");
    close(awg_diameter_m(-3).unwrap(), 0.46 * 0.0254, 1e-12, "AWG 4/0");
}

#[test]
fn skin_depth_of_copper_matches_the_handbook_values() {
    // Source: δ = √(ρ/(π f μ0 μr)) with IACS copper (TOOLBOX.md): 660.9 µm at 10 kHz, 209.0 µm at
    // 100 kHz, 66.09 µm at 1 MHz, 20.90 µm at 10 MHz.
    let rho = copper_resistivity_ohm_m(20.0).unwrap();
    for (f, um) in [(1e4, 660.9), (1e5, 209.0), (1e6, 66.09), (1e7, 20.90)] {
        close(
            skin_depth_m(rho, f, 1.0).unwrap() * 1e6,
            um,
            2.5e-4,
            &format!("δ at {f} Hz"),
        );
    }
}

#[test]
fn dowell_factor_at_delta_one_matches_the_published_values() {
    // Source: Dowell, Proc. IEE 113(8), 1966, round-wire AC factor F_R at Δ = 1 (TOOLBOX.md):
    // m = 1: 1.0856, m = 2: 1.4060, m = 3: 1.9400, m = 5: 3.6486. Checked numerically: the form
    // Δ[ς1 + (2/3)(m²−1)ς2] with ς2 = (sinh Δ − sin Δ)/(cosh Δ + cos Δ) reproduces all four.
    for (m, expect) in [(1, 1.0856), (2, 1.4060), (3, 1.9400), (5, 3.6486)] {
        let got = dowell_factor(1.0, m).unwrap();
        assert!((got - expect).abs() < 6e-5, "m = {m}: {got} vs {expect}");
    }
}

#[test]
fn a_winding_estimate_combines_table_resistance_and_dowell() {
    // 100 turns of AWG 30, 20 mm mean turn: 2 m of wire. Source: AWG 30 = 338.6 Ω/km at 20 °C (NBS
    // Handbook 100), so Rdc = 0.6772 Ω; at 100 °C ×(1 + 0.00393·80).
    let w = Winding {
        awg: 30,
        turns: 100.0,
        mean_turn_length_m: 0.020,
        layers: 2,
        pitch_m: None,
        temperature_c: 20.0,
    };
    close(w.rdc_ohm().unwrap(), 0.6772, 2e-4, "Rdc 20 °C");
    let hot = Winding {
        temperature_c: 100.0,
        ..w
    };
    close(hot.rdc_ohm().unwrap(), 0.6772 * 1.3144, 2e-4, "Rdc 100 °C");
    // The frequency at which Δ = 1 for touching turns: δ = (π/4)^(3/4)·d. There Rac/Rdc must be
    // Dowell's 1.4060 for two layers (source as above).
    let d = awg_diameter_m(30).unwrap();
    let delta_wanted = (std::f64::consts::PI / 4.0).powf(0.75) * d;
    let rho = copper_resistivity_ohm_m(20.0).unwrap();
    let f = rho / (std::f64::consts::PI * 4e-7 * std::f64::consts::PI * delta_wanted.powi(2));
    close(
        round_wire_delta(d, d, skin_depth_m(rho, f, 1.0).unwrap()).unwrap(),
        1.0,
        1e-6,
        "Δ",
    );
    let ratio = w.rac_ohm(f).unwrap() / w.rdc_ohm().unwrap();
    assert!((ratio - 1.4060).abs() < 1e-4, "Rac/Rdc = {ratio}");
    // Below 1 kHz the factor is 1 to 1e-6 (common practice, no source: AWG 30 is far thinner than δ).
    close(
        w.rac_ohm(100.0).unwrap(),
        w.rdc_ohm().unwrap(),
        1e-6,
        "Rac at 100 Hz",
    );
}

#[test]
fn a_gapped_core_has_the_textbook_effective_permeability() {
    // Source: μe = μr/(1 + μr·lg/le), worked value (TOOLBOX.md): μr = 2000, lg = 1 mm, le = 100 mm
    // -> 95.238.
    let mu_e = gapped_permeability(2000.0, 1e-3, 0.1).unwrap();
    assert!((mu_e - 95.238).abs() < 5e-4, "{mu_e}");
    assert_eq!(gapped_permeability(2000.0, 0.0, 0.1).unwrap(), 2000.0);
    // Common practice (no source): A_L = μ0·μe·A/le, and L = N²·A_L gives the same inductance.
    let (area, le, n) = (100e-6, 0.1, 20.0);
    let l_core = inductance_from_core(mu_e, area, le, n).unwrap();
    let al = inductance_from_core(mu_e, area, le, 1.0).unwrap();
    close(inductance_from_al(n, al).unwrap(), l_core, 1e-12, "N²·A_L");
    // 4π·1e-7 · 95.238 · 1e-4 m² · 400 / 0.1 m = 47.87 µH (by hand).
    close(l_core, 47.87e-6, 1e-4, "L from the core");
}
