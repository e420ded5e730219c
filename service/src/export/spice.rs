//! The lumped model as a SPICE subcircuit of R, L and C only.
//!
//! Topology (pin 1 to pin 2): `ls_h` in series; then, between two nodes, the winding branch
//! (`rdc_ohm`, the skin-effect ladder, `l0_h` ‖ `rp_ohm` or the dispersive core's cells, in series) in
//! parallel with `cp_f` and every
//! series-kind section (an R–L–C chain); then every parallel-kind section (an R‖L‖C tank) in series.
//! Absent elements (zero `ls_h`, `cp_f`, `rdc_ohm`, `k_ac_ohm_per_sqrt_hz`, a zero section R or L,
//! `rp_ohm = None`) are left out rather than written as zero-valued elements.

use super::accuracy::band_accuracy;
use super::core::{CoreCell, CoreNetwork, design_core};
use super::ladder::{SkinLadder, design_skin_ladder, impedance_with_core};
use super::netlist::{Netlist, PIN_A, PIN_B, subckt_name};
use super::{ExportContext, ExportError, check_param, provenance_lines};
use crate::model::{ImpedanceModel, LumpedModel, SectionKind};
use num_complex::Complex64;

pub use super::accuracy::ERROR_BOUND_KEY;

/// Writes `model` as a `.SUBCKT` whose impedance between its two pins matches the model's within the
/// error stated in its comments over `ctx.band_hz`.
pub fn lumped_subcircuit(model: &LumpedModel, ctx: &ExportContext) -> Result<String, ExportError> {
    let band = ctx.checked_band()?;
    validate(model)?;
    let winding = Winding::design(model, band)?;
    let mut net = Netlist::new();
    let a = if model.ls_h > 0.0 {
        let a = net.node();
        net.element("LS", PIN_A, a, model.ls_h);
        a
    } else {
        PIN_A
    };
    let has_tanks = model
        .sections
        .iter()
        .any(|s| s.kind == SectionKind::Parallel);
    let b = if has_tanks { net.node() } else { PIN_B };
    winding.write(&mut net, model, a, b);
    if model.cp_f > 0.0 {
        net.element("CP", a, b, model.cp_f);
    }
    write_sections(&mut net, model, a, b);
    let accuracy = band_accuracy(
        |f| model.impedance(f),
        |f| winding.impedance(model, f),
        &net,
        band,
    )?;

    net.comment("henrybook lumped inductor model as a passive subcircuit (R, L, C only)");
    for line in provenance_lines(ctx) {
        net.comment(line);
    }
    net.comment(format!(
        "model: l0_h={:e} rdc_ohm={:e} k_ac_ohm_per_sqrt_hz={:e} rp_ohm={} cp_f={:e} ls_h={:e} sections={}",
        model.l0_h,
        model.rdc_ohm,
        model.k_ac_ohm_per_sqrt_hz,
        model.rp_ohm.map_or("none".to_string(), |r| format!("{r:e}")),
        model.cp_f,
        model.ls_h,
        model.sections.len()
    ));
    if let Some(l) = &winding.ladder {
        ladder_comments(&mut net, l, model);
    }
    if let (Some(c), Some(cn)) = (&model.core, &winding.core) {
        core_comments(&mut net, c, cn);
    }
    accuracy.comments(&mut net);
    net.comment("pins: 1 and 2 (the part is symmetric); values in ohm, henry, farad");
    net.comment("");

    Ok(net.render(&subckt_name(ctx.part_number.as_deref())))
}

/// The winding branch as realised: the skin-effect ladder (when the model has a √f term), the L0
/// left once the ladder's internal inductance is taken off, and the dispersive core's cells.
struct Winding {
    ladder: Option<SkinLadder>,
    l0_h: f64,
    core: Option<CoreNetwork>,
}

impl Winding {
    fn design(model: &LumpedModel, band: [f64; 2]) -> Result<Winding, ExportError> {
        let ladder = if model.k_ac_ohm_per_sqrt_hz > 0.0 {
            Some(design_skin_ladder(model, band)?)
        } else {
            None
        };
        let l0_h = ladder.as_ref().map_or(model.l0_h, |l| l.l0_h);
        let core = match &model.core {
            Some(c) => Some(design_core(c, l0_h, band)?),
            None => None,
        };
        Ok(Winding { ladder, l0_h, core })
    }

    /// The impedance of the whole subcircuit with this winding branch at `f`.
    fn impedance(&self, model: &LumpedModel, f: f64) -> Complex64 {
        let skin = self
            .ladder
            .as_ref()
            .map_or(Complex64::new(0.0, 0.0), |l| l.impedance(f));
        let core = match &self.core {
            Some(n) => n.impedance(f),
            None => {
                let jwl0 = Complex64::new(0.0, 2.0 * std::f64::consts::PI * f * self.l0_h);
                match model.rp_ohm {
                    Some(rp) => jwl0 * rp / (jwl0 + rp),
                    None => jwl0,
                }
            }
        };
        impedance_with_core(model, skin, core, f)
    }

    /// Writes rdc, the ladder cells and the core (L0 ‖ rp, or the core's cells) in series from `a`
    /// to `b`.
    fn write(&self, net: &mut Netlist, model: &LumpedModel, a: u32, b: u32) {
        let mut at = a;
        if model.rdc_ohm > 0.0 {
            let next = net.node();
            net.element("RDC", at, next, model.rdc_ohm);
            at = next;
        }
        if let Some(l) = &self.ladder {
            for (i, cell) in l.cells.iter().enumerate() {
                let next = net.node();
                net.element(&format!("RSK{}", i + 1), at, next, cell.r_ohm);
                net.element(&format!("LSK{}", i + 1), at, next, cell.l_h);
                at = next;
            }
        }
        match &self.core {
            Some(cn) => {
                let last = cn.cells.len();
                for (i, cell) in cn.cells.iter().enumerate() {
                    let next = if i + 1 == last { b } else { net.node() };
                    let k = i + 1;
                    match *cell {
                        CoreCell::Inductor { l_h } => net.element(&format!("LC{k}"), at, next, l_h),
                        CoreCell::Relaxation { l_h, r_ohm } => {
                            net.element(&format!("LC{k}"), at, next, l_h);
                            net.element(&format!("RC{k}"), at, next, r_ohm);
                        }
                        CoreCell::Tank { l_h, c_f, r_ohm } => {
                            net.element(&format!("LC{k}"), at, next, l_h);
                            net.element(&format!("CC{k}"), at, next, c_f);
                            net.element(&format!("RC{k}"), at, next, r_ohm);
                        }
                    }
                    at = next;
                }
            }
            None => {
                net.element("L0", at, b, self.l0_h);
                if let Some(rp) = model.rp_ohm {
                    net.element("RP", at, b, rp);
                }
            }
        }
    }
}

/// The sections: each series kind as an R–L–C chain from `a` to `b`, each parallel kind as an
/// R‖L‖C tank in a chain from `b` to pin 2.
fn write_sections(net: &mut Netlist, model: &LumpedModel, a: u32, b: u32) {
    let mut n_series = 0;
    let mut n_tank = 0;
    let mut tank_at = b;
    let n_tanks_total = model
        .sections
        .iter()
        .filter(|s| s.kind == SectionKind::Parallel)
        .count();
    for s in &model.sections {
        match s.kind {
            SectionKind::Series => {
                n_series += 1;
                let mut at = a;
                if s.r_ohm > 0.0 {
                    let next = net.node();
                    net.element(&format!("RSER{n_series}"), at, next, s.r_ohm);
                    at = next;
                }
                if s.l_h > 0.0 {
                    let next = net.node();
                    net.element(&format!("LSER{n_series}"), at, next, s.l_h);
                    at = next;
                }
                net.element(&format!("CSER{n_series}"), at, b, s.c_f);
            }
            SectionKind::Parallel => {
                n_tank += 1;
                let next = if n_tank == n_tanks_total {
                    PIN_B
                } else {
                    net.node()
                };
                net.element(&format!("RTNK{n_tank}"), tank_at, next, s.r_ohm);
                net.element(&format!("LTNK{n_tank}"), tank_at, next, s.l_h);
                if s.c_f > 0.0 {
                    net.element(&format!("CTNK{n_tank}"), tank_at, next, s.c_f);
                }
                tank_at = next;
            }
        }
    }
}

fn ladder_comments(net: &mut Netlist, l: &SkinLadder, model: &LumpedModel) {
    let fc = |c: &super::ladder::LadderCell| c.r_ohm / (2.0 * std::f64::consts::PI * c.l_h);
    let (fmin, fmax) = l.cells.iter().fold((f64::INFINITY, 0.0f64), |(a, b), c| {
        (a.min(fc(c)), b.max(fc(c)))
    });
    net.comment(format!(
        "skin-effect term k_ac*sqrt(f) realised as {} R||L cells in series (RSKn||LSKn, corners {fmin:.3e} Hz to {fmax:.3e} Hz; zero at DC)",
        l.cells.len()
    ));
    net.comment(format!(
        "  real part: max |Re Z_ladder - k*sqrt(f)| / (rdc + k*sqrt(f)) = {:.3e} over the band",
        l.max_real_error_rel
    ));
    net.comment(format!(
        "  added reactance: up to {:.3e} ohm; X/omega (internal inductance) {:.3e} H at the lower band edge, {:.3e} H at the upper",
        l.max_reactance_ohm, l.internal_inductance_h[0], l.internal_inductance_h[1]
    ));
    net.comment(format!(
        "  complex: max |Z_ladder - k*sqrt(f)| / (rdc + k*sqrt(f)) = {:.3e} (reactance included)",
        l.max_complex_error_rel
    ));
    net.comment(
        "  (a resistance rising as sqrt(f) in a causal network always brings a reactance of about the same size;",
    );
    net.comment(
        "   relative to |Z| that reactance sets the floor of the whole-subcircuit error below)",
    );
    net.comment(format!(
        "  L0 written as {:e} H: the fitted {:e} H less {:.3e} H of the ladder's mean internal inductance",
        l.l0_h,
        model.l0_h,
        model.l0_h - l.l0_h
    ));
}

fn core_comments(net: &mut Netlist, c: &crate::model::CoreDispersion, cn: &CoreNetwork) {
    net.comment(format!(
        "dispersive core ({}, corner {:.4e} Hz, alpha {}, beta {}, damping {}, air fraction {}) realised \
         as cells LCn (with RCn, CCn) in series: {} R||L relaxation cells (Debye terms, non-negative \
         weights), an L||C||R tank for a resonance, plain inductors for the air part",
        c.law.as_str(),
        c.corner_hz,
        c.alpha,
        c.beta,
        c.damping,
        c.air_fraction,
        cn.relaxation_cells
    ));
    net.comment(format!(
        "  core law: max |m_net - m| / |m| = {:.3e} over the band (the tank is exact)",
        cn.max_law_error_rel
    ));
}

fn validate(m: &LumpedModel) -> Result<(), ExportError> {
    check_param("l0_h", m.l0_h, true)?;
    check_param("rdc_ohm", m.rdc_ohm, false)?;
    check_param("k_ac_ohm_per_sqrt_hz", m.k_ac_ohm_per_sqrt_hz, false)?;
    if let Some(rp) = m.rp_ohm {
        check_param("rp_ohm", rp, true)?;
    }
    check_param("cp_f", m.cp_f, false)?;
    check_param("ls_h", m.ls_h, false)?;
    for (i, s) in m.sections.iter().enumerate() {
        let name = |field: &str| format!("sections[{i}].{field}");
        match s.kind {
            SectionKind::Series => {
                check_param(&name("r_ohm"), s.r_ohm, false)?;
                check_param(&name("l_h"), s.l_h, false)?;
                check_param(&name("c_f"), s.c_f, true)?;
            }
            SectionKind::Parallel => {
                check_param(&name("r_ohm"), s.r_ohm, true)?;
                check_param(&name("l_h"), s.l_h, true)?;
                check_param(&name("c_f"), s.c_f, false)?;
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Section;

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

    #[test]
    fn a_negative_element_is_refused_with_its_name() {
        let mut m = choke();
        m.cp_f = -1e-12;
        let e = lumped_subcircuit(&m, &ExportContext::for_band(1e3, 1e8)).unwrap_err();
        assert!(e.to_string().contains("cp_f"), "{e}");
    }

    #[test]
    fn an_inverted_band_is_refused() {
        let e = lumped_subcircuit(&choke(), &ExportContext::for_band(1e8, 1e3)).unwrap_err();
        assert!(matches!(e, ExportError::InvalidBand(_)), "{e}");
    }

    #[test]
    fn the_netlist_states_a_small_error() {
        let text = lumped_subcircuit(&choke(), &ExportContext::for_band(1e3, 1e8)).unwrap();
        let bound: f64 = text
            .lines()
            .find_map(|l| l.strip_prefix("* ")?.strip_prefix(ERROR_BOUND_KEY))
            .unwrap()
            .trim()
            .parse()
            .unwrap();
        println!("{text}");
        assert!(bound < 1e-2, "{bound}");
    }
}
