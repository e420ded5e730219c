//! The lumped model's parameter layout for fitting, and Z(f) with its analytic Jacobian with respect to
//! the natural logarithms of the parameters (so a fit on θ = ln p keeps every element positive).
//!
//! Layout of θ: `l0_h, rdc_ohm, cp_f`, then whichever of `rp_ohm, k_ac_ohm_per_sqrt_hz, ls_h` the
//! [`Structure`] has, then the dispersive core's parameters (its law's: `ln corner_hz`, then
//! `ln alpha` for Cole–Cole and Havriliak–Negami, `ln (1 − beta)` for Havriliak–Negami, `ln damping`
//! for the resonance law, and `ln corner_hz, ln alpha, ln resonance_hz, ln damping,
//! ln resonance_share` for the resonance-plus-relaxation law; then `ln air_fraction` when the structure
//! has one), then `r_ohm, l_h, c_f`
//! of each section in order. Each law nests in the next by a parameter going to zero: a single pole
//! (rp) is Cole–Cole with α → 0, Cole–Cole is Havriliak–Negami with 1 − β → 0, and no air path is an
//! air fraction → 0.

use super::{CoreDispersion, CoreLaw, LumpedModel, Section, SectionKind, jx_pow};
use num_complex::Complex64;
use std::f64::consts::PI;

/// Most parameters a structure may have (6 elements, 6 of a dispersive core and 8 sections); keeps
/// evaluation allocation-free.
pub const MAX_PARAMETERS: usize = 36;

/// Which elements a lumped model has; the fit's unit of model selection.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Structure {
    pub has_rp: bool,
    pub has_k_ac: bool,
    pub has_ls: bool,
    /// A dispersive core's law (never together with `has_rp`).
    pub dispersion: Option<CoreLaw>,
    /// A non-dispersing share of L0 (only with a dispersion).
    pub has_air: bool,
    pub sections: Vec<SectionKind>,
}

/// How many θ entries a law has.
pub fn law_parameters(law: CoreLaw) -> usize {
    match law {
        CoreLaw::ColeCole => 2,
        CoreLaw::HavriliakNegami => 3,
        CoreLaw::Resonance => 2,
        CoreLaw::ResonanceRelaxation => 5,
    }
}

/// One fitted parameter.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Param {
    L0,
    Rdc,
    Cp,
    Rp,
    KAc,
    Ls,
    /// The dispersive core's corner (or resonance) frequency.
    CoreCorner,
    /// Cole–Cole / Havriliak–Negami broadening α.
    CoreAlpha,
    /// Havriliak–Negami asymmetry β (θ holds ln(1 − β)).
    CoreBeta,
    /// Resonance-law damping ratio ζ.
    CoreDamping,
    /// The resonant mechanism's frequency (resonance plus relaxation).
    CoreResonance,
    /// The resonant mechanism's share (resonance plus relaxation).
    CoreResonanceShare,
    /// The non-dispersing fraction of L0.
    AirFraction,
    SectionR(usize),
    SectionL(usize),
    SectionC(usize),
}

impl Param {
    /// The JSON name, e.g. `l0_h` or `sections[1].c_f`.
    pub fn name(&self) -> String {
        match self {
            Param::L0 => "l0_h".into(),
            Param::Rdc => "rdc_ohm".into(),
            Param::Cp => "cp_f".into(),
            Param::Rp => "rp_ohm".into(),
            Param::KAc => "k_ac_ohm_per_sqrt_hz".into(),
            Param::Ls => "ls_h".into(),
            Param::CoreCorner => "core.corner_hz".into(),
            Param::CoreAlpha => "core.alpha".into(),
            Param::CoreBeta => "core.beta".into(),
            Param::CoreDamping => "core.damping".into(),
            Param::CoreResonance => "core.resonance_hz".into(),
            Param::CoreResonanceShare => "core.resonance_share".into(),
            Param::AirFraction => "core.air_fraction".into(),
            Param::SectionR(i) => format!("sections[{i}].r_ohm"),
            Param::SectionL(i) => format!("sections[{i}].l_h"),
            Param::SectionC(i) => format!("sections[{i}].c_f"),
        }
    }
}

impl Structure {
    /// The structure of a model: `rp_ohm = Some`, `k_ac > 0`, `ls > 0` mean present.
    pub fn of(model: &LumpedModel) -> Structure {
        Structure {
            has_rp: model.rp_ohm.is_some() && model.core.is_none(),
            has_k_ac: model.k_ac_ohm_per_sqrt_hz > 0.0,
            has_ls: model.ls_h > 0.0,
            dispersion: model.core.map(|c| c.law),
            has_air: model.core.is_some_and(|c| c.air_fraction > 0.0),
            sections: model.sections.iter().map(|s| s.kind).collect(),
        }
    }

    pub fn len(&self) -> usize {
        3 + self.has_rp as usize
            + self.has_k_ac as usize
            + self.has_ls as usize
            + self.dispersion.map_or(0, law_parameters)
            + (self.dispersion.is_some() && self.has_air) as usize
            + 3 * self.sections.len()
    }

    pub fn is_empty(&self) -> bool {
        false
    }

    /// The parameters in θ order.
    pub fn params(&self) -> Vec<Param> {
        let mut p = vec![Param::L0, Param::Rdc, Param::Cp];
        if self.has_rp {
            p.push(Param::Rp);
        }
        if self.has_k_ac {
            p.push(Param::KAc);
        }
        if self.has_ls {
            p.push(Param::Ls);
        }
        if let Some(law) = self.dispersion {
            p.push(Param::CoreCorner);
            match law {
                CoreLaw::ColeCole => p.push(Param::CoreAlpha),
                CoreLaw::HavriliakNegami => p.extend([Param::CoreAlpha, Param::CoreBeta]),
                CoreLaw::Resonance => p.push(Param::CoreDamping),
                CoreLaw::ResonanceRelaxation => p.extend([
                    Param::CoreAlpha,
                    Param::CoreResonance,
                    Param::CoreDamping,
                    Param::CoreResonanceShare,
                ]),
            }
            if self.has_air {
                p.push(Param::AirFraction);
            }
        }
        for i in 0..self.sections.len() {
            p.extend([Param::SectionR(i), Param::SectionL(i), Param::SectionC(i)]);
        }
        p
    }

    /// Index of a parameter in θ, if the structure has it.
    pub fn index(&self, param: Param) -> Option<usize> {
        self.params().iter().position(|p| *p == param)
    }

    /// A short label such as `l0+rdc+cp+rp+k_ac+ls+1s+1p` (s: series section, p: parallel tank).
    pub fn label(&self) -> String {
        let mut s = String::from("l0+rdc+cp");
        if self.has_rp {
            s.push_str("+rp");
        }
        if self.has_k_ac {
            s.push_str("+k_ac");
        }
        if self.has_ls {
            s.push_str("+ls");
        }
        if let Some(law) = self.dispersion {
            s.push_str(match law {
                CoreLaw::ColeCole => "+cole_cole",
                CoreLaw::HavriliakNegami => "+havriliak_negami",
                CoreLaw::Resonance => "+resonance",
                CoreLaw::ResonanceRelaxation => "+resonance_relaxation",
            });
            if self.has_air {
                s.push_str("+air");
            }
        }
        let n_series = self
            .sections
            .iter()
            .filter(|k| **k == SectionKind::Series)
            .count();
        let n_par = self.sections.len() - n_series;
        if n_series > 0 {
            s.push_str(&format!("+{n_series}s"));
        }
        if n_par > 0 {
            s.push_str(&format!("+{n_par}p"));
        }
        s
    }

    /// θ = ln of the model's values in this structure's order (the model must have every element the
    /// structure has, with positive values).
    pub fn pack(&self, model: &LumpedModel) -> Vec<f64> {
        let mut v = vec![model.l0_h.ln(), model.rdc_ohm.ln(), model.cp_f.ln()];
        if self.has_rp {
            v.push(model.rp_ohm.unwrap_or(f64::NAN).ln());
        }
        if self.has_k_ac {
            v.push(model.k_ac_ohm_per_sqrt_hz.ln());
        }
        if self.has_ls {
            v.push(model.ls_h.ln());
        }
        if let Some(law) = self.dispersion {
            let c = model.core.unwrap_or(CoreDispersion {
                law,
                corner_hz: f64::NAN,
                alpha: f64::NAN,
                beta: f64::NAN,
                damping: f64::NAN,
                air_fraction: f64::NAN,
                resonance_hz: f64::NAN,
                resonance_share: f64::NAN,
            });
            v.push(c.corner_hz.ln());
            match law {
                CoreLaw::ColeCole => v.push(c.alpha.ln()),
                CoreLaw::HavriliakNegami => v.extend([c.alpha.ln(), (1.0 - c.beta).ln()]),
                CoreLaw::Resonance => v.push(c.damping.ln()),
                CoreLaw::ResonanceRelaxation => v.extend([
                    c.alpha.ln(),
                    c.resonance_hz.ln(),
                    c.damping.ln(),
                    c.resonance_share.ln(),
                ]),
            }
            if self.has_air {
                v.push(c.air_fraction.ln());
            }
        }
        for s in &model.sections {
            v.extend([s.r_ohm.ln(), s.l_h.ln(), s.c_f.ln()]);
        }
        v
    }

    /// The model for θ.
    pub fn unpack(&self, theta: &[f64]) -> LumpedModel {
        let mut i = 3;
        let mut next = |present: bool| {
            if present {
                i += 1;
                Some(theta[i - 1].exp())
            } else {
                None
            }
        };
        let rp_ohm = next(self.has_rp);
        let k_ac = next(self.has_k_ac).unwrap_or(0.0);
        let ls_h = next(self.has_ls).unwrap_or(0.0);
        let core = self.dispersion.map(|law| {
            let corner_hz = next(true).expect("present");
            let mut take = || next(true).expect("present");
            let (alpha, beta, damping, resonance_hz, resonance_share) = match law {
                CoreLaw::ColeCole => (take(), 1.0, 0.0, 0.0, 0.0),
                CoreLaw::HavriliakNegami => (take(), 1.0 - take(), 0.0, 0.0, 0.0),
                CoreLaw::Resonance => (0.0, 1.0, take(), 0.0, 0.0),
                CoreLaw::ResonanceRelaxation => {
                    let (a, fr, z, w) = (take(), take(), take(), take());
                    (a, 1.0, z, fr, w)
                }
            };
            CoreDispersion {
                law,
                corner_hz,
                alpha,
                beta,
                damping,
                air_fraction: next(self.has_air).unwrap_or(0.0),
                resonance_hz,
                resonance_share,
            }
        });
        let sections = self
            .sections
            .iter()
            .enumerate()
            .map(|(k, &kind)| Section {
                kind,
                r_ohm: theta[i + 3 * k].exp(),
                l_h: theta[i + 3 * k + 1].exp(),
                c_f: theta[i + 3 * k + 2].exp(),
            })
            .collect();
        LumpedModel {
            l0_h: theta[0].exp(),
            rdc_ohm: theta[1].exp(),
            k_ac_ohm_per_sqrt_hz: k_ac,
            rp_ohm,
            cp_f: theta[2].exp(),
            ls_h,
            sections,
            core,
        }
    }
}

/// Linear parameter values unpacked once per evaluation pass (no allocation).
#[derive(Debug, Clone, Copy)]
pub struct Values {
    p: [f64; MAX_PARAMETERS],
    n: usize,
    rp: Option<usize>,
    k_ac: Option<usize>,
    ls: Option<usize>,
    /// The law and the index of its first θ entry.
    core: Option<(CoreLaw, usize)>,
    air: Option<usize>,
    first_section: usize,
}

impl Values {
    pub fn new(structure: &Structure, theta: &[f64]) -> Values {
        let n = structure.len();
        assert!(
            n <= MAX_PARAMETERS && theta.len() == n,
            "θ has {} values for a structure of {n}",
            theta.len()
        );
        let mut p = [0.0; MAX_PARAMETERS];
        for (d, t) in p.iter_mut().zip(theta) {
            *d = t.exp();
        }
        let mut i = 3;
        let mut slot = |present: bool| {
            present.then(|| {
                i += 1;
                i - 1
            })
        };
        let rp = slot(structure.has_rp);
        let k_ac = slot(structure.has_k_ac);
        let ls = slot(structure.has_ls);
        let core = structure.dispersion.map(|law| {
            let first = slot(true).expect("present");
            for _ in 1..law_parameters(law) {
                slot(true);
            }
            (law, first)
        });
        let air = slot(structure.dispersion.is_some() && structure.has_air);
        Values {
            p,
            n,
            rp,
            k_ac,
            ls,
            core,
            air,
            first_section: i,
        }
    }

    pub fn len(&self) -> usize {
        self.n
    }

    pub fn is_empty(&self) -> bool {
        self.n == 0
    }
}

/// 1/z with one division.
#[inline(always)]
fn inv(z: Complex64) -> Complex64 {
    let s = 1.0 / z.norm_sqr();
    Complex64::new(z.re * s, -z.im * s)
}

/// Z at one frequency and, when `dz` is given (length = number of parameters), ∂Z/∂θ_k for θ = ln p.
/// `sqrt_f` is √f, passed in so a fit computes it once per point.
#[inline(always)]
pub fn eval(
    structure: &Structure,
    v: &Values,
    frequency_hz: f64,
    sqrt_f: f64,
    dz: Option<&mut [Complex64]>,
) -> Complex64 {
    let w = 2.0 * PI * frequency_hz;
    let jw = Complex64::new(0.0, w);
    let p = &v.p;
    let (l0, rdc, cp) = (p[0], p[1], p[2]);
    let a = Complex64::new(0.0, w * l0);
    // A dispersive core: Z_core = a·((1 − r)·m + r) and ∂Z_core/∂θ of its law's parameters.
    // ∂Z_core/∂θ of the law's parameters, then (last slot) of the air fraction.
    let mut core_d = [Complex64::new(0.0, 0.0); 6];
    let (core, inv_den) = match (v.rp, v.core) {
        (_, Some((law, first))) => {
            let r = v.air.map_or(0.0, |i| p[i]);
            let (m, dm) = law_and_derivatives(law, &p[first..], frequency_hz);
            let k = 1.0 - r;
            for (d, dm) in core_d.iter_mut().zip(&dm[..law_parameters(law)]) {
                *d = a * k * dm;
            }
            if v.air.is_some() {
                // ∂/∂ln r of a·((1 − r)m + r) = a·r·(1 − m).
                core_d[5] = a * r * (Complex64::new(1.0, 0.0) - m);
            }
            (a * (k * m + r), Complex64::new(0.0, 0.0))
        }
        (Some(i), None) => {
            let rp = p[i];
            let id = inv(a + rp);
            (a * (rp * id), id)
        }
        (None, None) => (a, Complex64::new(0.0, 0.0)),
    };
    let k_term = v.k_ac.map_or(0.0, |i| p[i] * sqrt_f);
    let zw = rdc + k_term + core;
    let yw = inv(zw);
    let jwcp = Complex64::new(0.0, w * cp);
    let mut y = yw + jwcp;
    let mut z_tanks = Complex64::new(0.0, 0.0);
    // Section admittances (series) or impedances (tanks) are needed twice; keep them on the stack.
    let mut sec = [Complex64::new(0.0, 0.0); 8];
    for (k, kind) in structure.sections.iter().enumerate() {
        let b = v.first_section + 3 * k;
        let (r, l, c) = (p[b], p[b + 1], p[b + 2]);
        match kind {
            SectionKind::Series => {
                let ys = inv(Complex64::new(r, w * l - 1.0 / (w * c)));
                sec[k] = ys;
                y += ys;
            }
            SectionKind::Parallel => {
                let zt = inv(Complex64::new(1.0 / r, w * c - 1.0 / (w * l)));
                sec[k] = zt;
                z_tanks += zt;
            }
        }
    }
    let zy = inv(y);
    let jwls = v.ls.map_or(Complex64::new(0.0, 0.0), |i| jw * p[i]);
    let z = jwls + zy + z_tanks;
    if let Some(dz) = dz {
        // dZ/dY = −1/Y², dY/dZw = −1/Zw², so dZ/dZw = (Yw/Y)².
        let g_y = -(zy * zy);
        let yr = yw * zy;
        let g_w = yr * yr;
        match (v.rp, v.core) {
            (_, Some((law, first))) => {
                // Z_core is proportional to l0.
                dz[0] = g_w * core;
                for j in 0..law_parameters(law) {
                    dz[first + j] = g_w * core_d[j];
                }
                if let Some(i) = v.air {
                    dz[i] = g_w * core_d[5];
                }
            }
            (Some(i), None) => {
                // Zc = a·rp/(a + rp): dZc/dln l0 = a·rp²/(a+rp)², dZc/dln rp = a²·rp/(a+rp)².
                let rp = p[i];
                let g = g_w * (inv_den * inv_den) * (a * rp);
                dz[0] = g * rp;
                dz[i] = g * a;
            }
            (None, None) => dz[0] = g_w * a,
        }
        dz[1] = g_w * rdc;
        dz[2] = g_y * jwcp;
        if let Some(i) = v.k_ac {
            dz[i] = g_w * k_term;
        }
        if let Some(i) = v.ls {
            dz[i] = jwls;
        }
        for (k, kind) in structure.sections.iter().enumerate() {
            let b = v.first_section + 3 * k;
            let (r, l, c) = (p[b], p[b + 1], p[b + 2]);
            match kind {
                SectionKind::Series => {
                    // dY/dZs = −Ys²; dZs/dln r = r, dln l = jωl, dln c = −1/(jωc) = j/(ωc).
                    let g = -(g_y * sec[k] * sec[k]);
                    dz[b] = g * r;
                    dz[b + 1] = g * Complex64::new(0.0, w * l);
                    dz[b + 2] = g * Complex64::new(0.0, 1.0 / (w * c));
                }
                SectionKind::Parallel => {
                    // dZt/dYt = −Zt²; dYt/dln r = −1/r, dln l = −1/(jωl) = j/(ωl), dln c = jωc.
                    let g = -(sec[k] * sec[k]);
                    dz[b] = g * (-1.0 / r);
                    dz[b + 1] = g * Complex64::new(0.0, 1.0 / (w * l));
                    dz[b + 2] = g * Complex64::new(0.0, w * c);
                }
            }
        }
    }
    z
}

/// m(f) of a law and ∂m/∂θ of its θ entries (`p` starts at the law's first entry, values already
/// exponentiated: corner_hz, then α and γ = 1 − β, or ζ). With s = jf/f_c, a = 1 − α, u = s^a:
/// - Cole–Cole m = 1/(1 + u): ∂m/∂ln f_c = a·u·m², ∂m/∂ln α = α·u·(ln x + jπ/2)·m²;
/// - Havriliak–Negami m = (1 + u)^(−β): ∂m/∂ln f_c = β·a·u·m/(1 + u),
///   ∂m/∂ln α = β·α·u·(ln x + jπ/2)·m/(1 + u), ∂m/∂ln γ = γ·ln(1 + u)·m;
/// - resonance m = 1/D, D = 1 − x² + j2ζx: ∂m/∂ln f_r = −m²·(2x² − j2ζx), ∂m/∂ln ζ = −m²·j2ζx.
#[inline]
pub fn law_and_derivatives(
    law: CoreLaw,
    p: &[f64],
    frequency_hz: f64,
) -> (Complex64, [Complex64; 5]) {
    let x = frequency_hz / p[0];
    let one = Complex64::new(1.0, 0.0);
    let zero = Complex64::new(0.0, 0.0);
    let mut d = [zero; 5];
    match law {
        CoreLaw::ColeCole | CoreLaw::HavriliakNegami => {
            let alpha = p[1];
            let a = 1.0 - alpha;
            let u = jx_pow(x, a);
            let one_u = one + u;
            // ln(jx) = ln x + jπ/2.
            let ln_jx = Complex64::new(x.ln(), std::f64::consts::FRAC_PI_2);
            if law == CoreLaw::ColeCole {
                let m = inv(one_u);
                let m2 = m * m;
                d[0] = m2 * u * a;
                d[1] = m2 * u * ln_jx * alpha;
                (m, d)
            } else {
                let gamma = p[2];
                let beta = 1.0 - gamma;
                let m = one_u.powf(-beta);
                let k = m * inv(one_u);
                d[0] = k * u * (beta * a);
                d[1] = k * u * ln_jx * (beta * alpha);
                d[2] = m * one_u.ln() * gamma;
                (m, d)
            }
        }
        CoreLaw::Resonance => {
            let (m, dr) = resonance_and_derivatives(x, p[1]);
            d[0] = dr[0];
            d[1] = dr[1];
            (m, d)
        }
        CoreLaw::ResonanceRelaxation => {
            // p: corner, α, resonance, ζ, w.
            let (relax, dc) = law_and_derivatives(CoreLaw::ColeCole, &p[..2], frequency_hz);
            let (res, dr) = resonance_and_derivatives(frequency_hz / p[2], p[3]);
            let w = p[4];
            d[0] = dc[0] * (1.0 - w);
            d[1] = dc[1] * (1.0 - w);
            d[2] = dr[0] * w;
            d[3] = dr[1] * w;
            // ∂m/∂ln w = w·(m_res − m_relax).
            d[4] = (res - relax) * w;
            (res * w + relax * (1.0 - w), d)
        }
    }
}

/// m = 1/(1 − x² + j2ζx) at x = f/f_r, and ∂m/∂ln f_r, ∂m/∂ln ζ.
#[inline]
fn resonance_and_derivatives(x: f64, zeta: f64) -> (Complex64, [Complex64; 2]) {
    let m = inv(Complex64::new(1.0 - x * x, 2.0 * zeta * x));
    let m2 = m * m;
    (
        m,
        [
            -m2 * Complex64::new(2.0 * x * x, -2.0 * zeta * x),
            -m2 * Complex64::new(0.0, 2.0 * zeta * x),
        ],
    )
}

/// The values the one-fraction form of a structure without sections uses ([`eval_block`]): α = rp,
/// β = 1 when rp is present and α = 1, β = 0 without (so N = (R·α, a(R·β + α)) and D = (α, β·a));
/// absent k_ac and ls are 0.
#[derive(Clone, Copy)]
struct Fraction {
    l0: f64,
    rdc: f64,
    cp: f64,
    alpha: f64,
    beta: f64,
    kac: f64,
    ls: f64,
}

/// One point of a [`Fraction`]: ω·l0, k_ac·√f, N, D and q = 1/M (re, im), ω·cp.
struct FractionAt {
    ai: f64,
    kt: f64,
    n: (f64, f64),
    d: (f64, f64),
    q: (f64, f64),
    wc: f64,
}

impl Fraction {
    #[inline(always)]
    fn of(v: &Values) -> Fraction {
        let p = &v.p;
        let (alpha, beta) = v.rp.map_or((1.0, 0.0), |i| (p[i], 1.0));
        Fraction {
            l0: p[0],
            rdc: p[1],
            cp: p[2],
            alpha,
            beta,
            kac: v.k_ac.map_or(0.0, |i| p[i]),
            ls: v.ls.map_or(0.0, |i| p[i]),
        }
    }

    #[inline(always)]
    fn at(&self, w: f64, sqrt_f: f64) -> FractionAt {
        let ai = w * self.l0;
        let kt = self.kac * sqrt_f;
        let r = self.rdc + kt;
        let (n_re, n_im) = (r * self.alpha, ai * (r * self.beta + self.alpha));
        let (d_re, d_im) = (self.alpha, self.beta * ai);
        let wc = w * self.cp;
        let (m_re, m_im) = (d_re - wc * n_im, d_im + wc * n_re);
        let s = 1.0 / (m_re * m_re + m_im * m_im);
        FractionAt {
            ai,
            kt,
            n: (n_re, n_im),
            d: (d_re, d_im),
            q: (m_re * s, -m_im * s),
            wc,
        }
    }
}

/// Points one [`Block`] holds.
pub const BLOCK: usize = 64;

/// Z and ∂Z/∂θ over up to [`BLOCK`] points as plain f64 arrays (structure of arrays), so the loops
/// over points have no complex types, branches or calls and the compiler vectorises them. Each array
/// holds the real parts in `[..BLOCK]` and the imaginary parts in `[BLOCK..]`.
#[derive(Clone)]
pub struct Block {
    pub z: [f64; 2 * BLOCK],
    /// `d[p]` = ∂Z/∂θ_p, p in θ order.
    pub d: [[f64; 2 * BLOCK]; MAX_PARAMETERS],
}

impl Block {
    /// A zeroed block on the heap (it is 31 kB).
    pub fn new_boxed() -> Box<Block> {
        Box::new(Block {
            z: [0.0; 2 * BLOCK],
            d: [[0.0; 2 * BLOCK]; MAX_PARAMETERS],
        })
    }
}

/// Fills `out` for the points `frequency_hz` with `sqrt_f` = √f, at most [`BLOCK`] of them: Z, and
/// ∂Z/∂θ multiplied by each point's `weight` (a fit's 1/σ, so the columns come out as the weighted
/// Jacobian without another sweep over them; pass ones for the plain derivatives). Entries past the
/// last point are left as they were. Same values as [`eval`] to rounding.
///
/// Without sections the whole model is one rational function, evaluated with a single real
/// reciprocal per point: with R = rdc + k_ac·√f, a = jωl0 and D = a + rp (D = 1 without rp),
/// Z_core = R + a·rp/(a + rp) = N/D with N = R·D + a·rp (N = R + a without rp); the shunt Cp makes
/// Z = N/M + jωls with M = D + jωcp·N. Then, with q = 1/M:
/// ∂Z/∂ln l0 = a·rp²·q², ∂Z/∂ln rp = a²·rp·q², ∂Z/∂ln rdc = rdc·(Dq)², ∂Z/∂ln k_ac = k_ac√f·(Dq)²,
/// ∂Z/∂ln cp = −jωcp·(Nq)², ∂Z/∂ln ls = jωls (with rp → 1 in the l0 term when rp is absent).
/// Structures with sections or a dispersive core take the per-point [`eval`]. Always inlined, so a caller compiled for
/// wider vectors (AVX2) gets this loop compiled for them too.
#[inline(always)]
pub fn eval_block(
    structure: &Structure,
    v: &Values,
    frequency_hz: &[f64],
    sqrt_f: &[f64],
    weight: &[f64],
    out: &mut Block,
) {
    let m = frequency_hz.len();
    assert!(
        m <= BLOCK && sqrt_f.len() == m && weight.len() == m,
        "a block holds at most {BLOCK} points"
    );
    if !structure.sections.is_empty() || structure.dispersion.is_some() {
        let mut dz = [Complex64::new(0.0, 0.0); MAX_PARAMETERS];
        let n = v.n;
        for k in 0..m {
            let z = eval(structure, v, frequency_hz[k], sqrt_f[k], Some(&mut dz[..n]));
            out.z[k] = z.re;
            out.z[BLOCK + k] = z.im;
            for (col, d) in out.d.iter_mut().zip(&dz[..n]) {
                col[k] = d.re * weight[k];
                col[BLOCK + k] = d.im * weight[k];
            }
        }
        return;
    }
    let fr = Fraction::of(v);
    let (rdc, alpha, ls) = (fr.rdc, fr.alpha, fr.ls);
    let alpha2 = alpha * alpha;
    // Columns in θ order; the optional ones go to scratch rows when absent (θ has at most 6 here).
    let z = &mut out.z;
    let (base, rest) = out.d.split_at_mut(3);
    let [d_l0, d_rdc, d_cp] = base else {
        unreachable!()
    };
    let (opt, spare) = rest.split_at_mut(3);
    let mut opt = opt.iter_mut();
    let mut spare = spare.iter_mut();
    let mut take = |present: bool| {
        if present {
            opt.next().expect("three optional columns")
        } else {
            spare.next().expect("spare columns")
        }
    };
    let d_rp = take(v.rp.is_some());
    let d_k = take(v.k_ac.is_some());
    let d_ls = take(v.ls.is_some());
    for k in 0..m {
        let w = 2.0 * PI * frequency_hz[k];
        let FractionAt {
            ai,
            kt,
            n: (n_re, n_im),
            d: (d_re, d_im),
            q: (q_re, q_im),
            wc,
        } = fr.at(w, sqrt_f[k]);
        let (zn_re, zn_im) = (n_re * q_re - n_im * q_im, n_re * q_im + n_im * q_re);
        let (dq_re, dq_im) = (d_re * q_re - d_im * q_im, d_re * q_im + d_im * q_re);
        let (q2_re, q2_im) = (q_re * q_re - q_im * q_im, 2.0 * q_re * q_im);
        let (dq2_re, dq2_im) = (dq_re * dq_re - dq_im * dq_im, 2.0 * dq_re * dq_im);
        let (zn2_re, zn2_im) = (zn_re * zn_re - zn_im * zn_im, 2.0 * zn_re * zn_im);
        let wls = w * ls;
        z[k] = zn_re;
        z[BLOCK + k] = zn_im + wls;
        let u = weight[k];
        let c0 = ai * alpha2 * u;
        d_l0[k] = -c0 * q2_im;
        d_l0[BLOCK + k] = c0 * q2_re;
        let c_rdc = rdc * u;
        d_rdc[k] = c_rdc * dq2_re;
        d_rdc[BLOCK + k] = c_rdc * dq2_im;
        let c_cp = wc * u;
        d_cp[k] = c_cp * zn2_im;
        d_cp[BLOCK + k] = -c_cp * zn2_re;
        let c_rp = -ai * ai * alpha * u;
        d_rp[k] = c_rp * q2_re;
        d_rp[BLOCK + k] = c_rp * q2_im;
        let c_k = kt * u;
        d_k[k] = c_k * dq2_re;
        d_k[BLOCK + k] = c_k * dq2_im;
        d_ls[k] = 0.0;
        d_ls[BLOCK + k] = wls * u;
    }
}

/// Z alone over up to [`BLOCK`] points into `z` (real parts in `[..BLOCK]`, imaginary parts in
/// `[BLOCK..]`), for a pass that needs the cost but no derivatives: the same rational form as
/// [`eval_block`] without its derivative columns (structures with sections take [`eval`]).
/// Entries past the last point are left as they were.
#[inline(always)]
pub fn impedance_block(
    structure: &Structure,
    v: &Values,
    frequency_hz: &[f64],
    sqrt_f: &[f64],
    z: &mut [f64; 2 * BLOCK],
) {
    let m = frequency_hz.len();
    assert!(
        m <= BLOCK && sqrt_f.len() == m,
        "a block holds at most {BLOCK} points"
    );
    if !structure.sections.is_empty() || structure.dispersion.is_some() {
        for k in 0..m {
            let zk = eval(structure, v, frequency_hz[k], sqrt_f[k], None);
            z[k] = zk.re;
            z[BLOCK + k] = zk.im;
        }
        return;
    }
    let fr = Fraction::of(v);
    for k in 0..m {
        let w = 2.0 * PI * frequency_hz[k];
        let p = fr.at(w, sqrt_f[k]);
        let ((n_re, n_im), (q_re, q_im)) = (p.n, p.q);
        z[k] = n_re * q_re - n_im * q_im;
        z[BLOCK + k] = n_re * q_im + n_im * q_re + w * fr.ls;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::ImpedanceModel;

    fn full_model() -> LumpedModel {
        LumpedModel {
            l0_h: 22e-6,
            rdc_ohm: 0.08,
            k_ac_ohm_per_sqrt_hz: 2e-4,
            rp_ohm: Some(40e3),
            cp_f: 3.5e-12,
            ls_h: 4e-9,
            sections: vec![
                Section {
                    kind: SectionKind::Series,
                    r_ohm: 15.0,
                    l_h: 300e-9,
                    c_f: 1.2e-12,
                },
                Section {
                    kind: SectionKind::Parallel,
                    r_ohm: 900.0,
                    l_h: 40e-9,
                    c_f: 0.8e-12,
                },
            ],
            core: None,
        }
    }

    #[test]
    fn pack_and_unpack_round_trip() {
        let m = full_model();
        let s = Structure::of(&m);
        assert_eq!(s.len(), 12);
        assert_eq!(s.label(), "l0+rdc+cp+rp+k_ac+ls+1s+1p");
        let back = s.unpack(&s.pack(&m));
        for (a, b) in [
            (back.l0_h, m.l0_h),
            (back.rp_ohm.unwrap(), m.rp_ohm.unwrap()),
            (back.sections[1].c_f, m.sections[1].c_f),
        ] {
            assert!((a / b - 1.0).abs() < 1e-14);
        }
        assert_eq!(s.params()[11].name(), "sections[1].c_f");
    }

    #[test]
    fn eval_agrees_with_the_model_definition() {
        let m = full_model();
        let s = Structure::of(&m);
        let v = Values::new(&s, &s.pack(&m));
        for f in [1e3, 1e5, 7.3e6, 3e8, 2e9] {
            let a = eval(&s, &v, f, f.sqrt(), None);
            let b = m.impedance(f);
            assert!((a - b).norm() <= 1e-12 * b.norm(), "{f}: {a} vs {b}");
        }
    }

    #[test]
    fn analytic_jacobian_matches_central_differences() {
        // Check of the analytic derivative against central differences in ln p (step 1e-6); the
        // truncation error is O(h²) ≈ 1e-12 relative, far below the tolerance.
        let models = {
            let full = full_model();
            let mut bare = full.clone();
            bare.rp_ohm = None;
            bare.ls_h = 0.0;
            bare.k_ac_ohm_per_sqrt_hz = 0.0;
            bare.sections.clear();
            vec![full, bare]
        };
        for m in models {
            let s = Structure::of(&m);
            let theta = s.pack(&m);
            let v = Values::new(&s, &theta);
            let mut dz = vec![Complex64::new(0.0, 0.0); s.len()];
            for f in [1e3, 2e5, 5e6, 7.3e6, 8e7, 2.5e8, 1e9, 3e9] {
                let z = eval(&s, &v, f, f.sqrt(), Some(&mut dz));
                for k in 0..s.len() {
                    let h = 1e-6;
                    let mut tp = theta.clone();
                    tp[k] += h;
                    let mut tm = theta.clone();
                    tm[k] -= h;
                    let zp = eval(&s, &Values::new(&s, &tp), f, f.sqrt(), None);
                    let zm = eval(&s, &Values::new(&s, &tm), f, f.sqrt(), None);
                    let fd = (zp - zm) / (2.0 * h);
                    let scale = z.norm().max(dz[k].norm());
                    assert!(
                        (fd - dz[k]).norm() <= 1e-6 * scale,
                        "{} at {f} Hz: analytic {} vs fd {fd}",
                        s.params()[k].name(),
                        dz[k]
                    );
                }
            }
        }
    }

    const LAWS: [CoreLaw; 4] = [
        CoreLaw::ColeCole,
        CoreLaw::HavriliakNegami,
        CoreLaw::Resonance,
        CoreLaw::ResonanceRelaxation,
    ];

    fn dispersive(law: CoreLaw, air: f64) -> LumpedModel {
        let mut m = full_model();
        m.rp_ohm = None;
        let mixed = law == CoreLaw::ResonanceRelaxation;
        m.core = Some(CoreDispersion {
            law,
            corner_hz: 4e6,
            alpha: if law == CoreLaw::Resonance { 0.0 } else { 0.35 },
            beta: if law == CoreLaw::HavriliakNegami {
                0.7
            } else {
                1.0
            },
            damping: if law == CoreLaw::Resonance || mixed {
                0.8
            } else {
                0.0
            },
            air_fraction: air,
            resonance_hz: if mixed { 1.5e6 } else { 0.0 },
            resonance_share: if mixed { 0.3 } else { 0.0 },
        });
        m
    }

    #[test]
    fn a_single_pole_core_is_l0_parallel_rp_and_cole_cole_without_broadening_is_a_single_pole() {
        // Debye: μ/μi = 1/(1 + jf/fc); jωL0/(1 + jω/ωc) = jωL0‖Rp when ωc = Rp/L0 (textbook identity).
        let mut rp_model = full_model();
        rp_model.sections.clear();
        let rp = rp_model.rp_ohm.unwrap();
        let mut cc = rp_model.clone();
        cc.rp_ohm = None;
        cc.core = Some(CoreDispersion {
            law: CoreLaw::ColeCole,
            corner_hz: rp / (2.0 * PI * rp_model.l0_h),
            alpha: 0.0,
            beta: 1.0,
            damping: 0.0,
            air_fraction: 0.0,
            resonance_hz: 0.0,
            resonance_share: 0.0,
        });
        let mut hn = cc.clone();
        hn.core.as_mut().unwrap().law = CoreLaw::HavriliakNegami;
        for f in [10.0, 1e3, 1e5, 3e6, 1e8, 5e9] {
            let (a, b, c) = (rp_model.impedance(f), cc.impedance(f), hn.impedance(f));
            assert!(
                (a - b).norm() <= 4.0 * f64::EPSILON * a.norm(),
                "{f}: {a} vs {b}"
            );
            assert!(
                (b - c).norm() <= 4.0 * f64::EPSILON * b.norm(),
                "{f}: {b} vs {c}"
            );
        }
    }

    #[test]
    fn dispersive_structures_pack_unpack_and_evaluate_like_the_model() {
        for law in LAWS {
            for air in [0.0, 0.05] {
                let m = dispersive(law, air);
                let s = Structure::of(&m);
                assert_eq!(s.dispersion, Some(law));
                assert_eq!(s.has_air, air > 0.0);
                assert!(!s.has_rp);
                let back = s.unpack(&s.pack(&m));
                let (a, b) = (back.core.unwrap(), m.core.unwrap());
                for (x, y) in [
                    (a.corner_hz, b.corner_hz),
                    (a.alpha, b.alpha),
                    (a.beta, b.beta),
                    (a.damping, b.damping),
                    (a.air_fraction, b.air_fraction),
                    (a.resonance_hz, b.resonance_hz),
                    (a.resonance_share, b.resonance_share),
                ] {
                    assert!(
                        (x - y).abs() <= 1e-12 * y.abs().max(1e-300),
                        "{law:?}: {x} vs {y}"
                    );
                }
                let v = Values::new(&s, &s.pack(&m));
                for f in [1e3, 2e5, 4e6, 7.3e6, 3e8] {
                    let (x, y) = (eval(&s, &v, f, f.sqrt(), None), m.impedance(f));
                    assert!(
                        (x - y).norm() <= 1e-12 * y.norm(),
                        "{law:?} {f}: {x} vs {y}"
                    );
                }
            }
        }
    }

    #[test]
    fn the_dispersive_core_jacobian_matches_central_differences() {
        for law in LAWS {
            let m = dispersive(law, 0.05);
            let s = Structure::of(&m);
            let theta = s.pack(&m);
            let v = Values::new(&s, &theta);
            let mut dz = vec![Complex64::new(0.0, 0.0); s.len()];
            for f in [1e3, 2e5, 3.9e6, 4.1e6, 8e7, 2.5e8, 3e9] {
                let z = eval(&s, &v, f, f.sqrt(), Some(&mut dz));
                for k in 0..s.len() {
                    let h = 1e-6;
                    let (mut tp, mut tm) = (theta.clone(), theta.clone());
                    tp[k] += h;
                    tm[k] -= h;
                    let zp = eval(&s, &Values::new(&s, &tp), f, f.sqrt(), None);
                    let zm = eval(&s, &Values::new(&s, &tm), f, f.sqrt(), None);
                    let fd = (zp - zm) / (2.0 * h);
                    let scale = z.norm().max(dz[k].norm());
                    assert!(
                        (fd - dz[k]).norm() <= 1e-6 * scale,
                        "{law:?} {} at {f} Hz: analytic {} vs fd {fd}",
                        s.params()[k].name(),
                        dz[k]
                    );
                }
            }
        }
    }
}
