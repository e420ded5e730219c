//! Starting values read off the measured curve, so LM starts near the answer.
//!
//! - L0 and Rdc: median of Im Z/ω and Re Z over the lowest points.
//! - SRF: the first + → − zero crossing of Im Z (log-interpolated); Cp = 1/((2π·SRF)²·L0) (Thomson).
//!   With no crossing in the band, the SRF is extrapolated from the rise of Im Z/ω at the top of the
//!   band, L_eff = L0/(1 − (f/SRF)²).
//! - Rp: the resistance at the |Z| peak, less the share the series resistance transforms into there.
//! - ls: from the series resonance of ls with Cp when one shows, else from the capacitive slope above the SRF
//!   (Im Z ≈ ωls − 1/(ωCp)).
//! - Extra sections: from the pairs (series resonance, next parallel resonance) that follow the SRF,
//!   one pair per section, solved for the section's L and C by the section's own resonance conditions.

use super::problem::FitData;
use crate::model::{LumpedModel, Section, SectionKind};
use std::f64::consts::PI;

/// Zero crossings of the measured Im Z.
#[derive(Debug, Clone, Default)]
pub struct CurveFeatures {
    /// (frequency, +→− parallel?) in increasing frequency, noise chatter removed.
    pub crossings: Vec<(f64, bool)>,
}

/// What the curve says: the base model (every element present) and candidate section guesses.
#[derive(Debug, Clone)]
pub struct Guess {
    pub base: LumpedModel,
    /// (notch frequency, peak frequency, resistance at notch, resistance at peak) per visible pair,
    /// lowest first.
    pub pairs: Vec<(f64, f64, f64, f64)>,
}

fn median(mut v: Vec<f64>) -> f64 {
    v.retain(|x| x.is_finite());
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn crossing_at(f0: f64, y0: f64, f1: f64, y1: f64) -> f64 {
    let t = y0 / (y0 - y1);
    (f0.ln() + t * (f1.ln() - f0.ln())).exp()
}

pub fn features(data: &FitData) -> CurveFeatures {
    let f = &data.frequency_hz;
    let mut raw: Vec<(f64, bool, usize)> = Vec::new();
    for k in 1..f.len() {
        let (a, b) = (data.z[k - 1].im, data.z[k].im);
        if a > 0.0 && b <= 0.0 {
            raw.push((crossing_at(f[k - 1], a, f[k], b), true, k));
        } else if a <= 0.0 && b > 0.0 {
            raw.push((crossing_at(f[k - 1], a, f[k], b), false, k));
        }
    }
    // Noise makes Im Z chatter around zero: drop crossing pairs within 1 % of each other where the
    // excursion between them is within three σ.
    let mut out: Vec<(f64, bool, usize)> = Vec::new();
    for c in raw {
        if let Some(&(fp, _, kp)) = out.last() {
            let small = (kp..c.2).all(|k| data.z[k].im.abs() * data.inv_sigma[k] < 3.0);
            if c.0 / fp < 1.01 && small {
                out.pop();
                continue;
            }
        }
        out.push(c);
    }
    CurveFeatures {
        crossings: out.into_iter().map(|(f, p, _)| (f, p)).collect(),
    }
}

fn nearest(data: &FitData, freq: f64) -> usize {
    let f = &data.frequency_hz;
    let k = f.partition_point(|&x| x < freq).min(f.len() - 1);
    if k > 0 && (freq / f[k - 1]).ln() < (f[k] / freq).ln() {
        k - 1
    } else {
        k
    }
}

pub fn guess(data: &FitData) -> Guess {
    let f = &data.frequency_hz;
    let n = f.len();
    let w = |k: usize| 2.0 * PI * f[k];
    let low = (n / 50).max(3).min(n);
    let l0 = median((0..low).map(|k| data.z[k].im / w(k)).collect());
    let l0 = if l0.is_finite() && l0 > 0.0 {
        l0
    } else {
        (data.z[0].im.abs() / w(0)).max(1e-12)
    };
    let mut rdc = median((0..low).map(|k| data.z[k].re).collect());
    if let Some((value, _)) = data.dcr_prior {
        rdc = value;
    }
    let floor_r = 1e-4 * w(0) * l0;
    if !(rdc.is_finite() && rdc > floor_r) {
        rdc = floor_r.max(1e-6);
    }

    let feats = features(data);
    let srf = feats.crossings.iter().find(|c| c.1).map(|c| c.0);
    let top = n - 1;
    let srf_est = srf.unwrap_or_else(|| {
        let ratio = data.z[top].im / w(top) / l0;
        if ratio > 1.001 {
            f[top] / (1.0 - 1.0 / ratio).sqrt()
        } else {
            30.0 * f[top]
        }
    });
    let ws = 2.0 * PI * srf_est;
    let cp = 1.0 / (ws * ws * l0);

    let rp = if srf.is_some() {
        let peak = data.z[nearest(data, srf_est)].re.max(floor_r);
        let inv = 1.0 / peak - rdc / (ws * l0).powi(2);
        if inv > 0.0 { 1.0 / inv } else { 100.0 * peak }
    } else {
        let excess = data.z[top].re - rdc;
        let xl = data.z[top].im.max(w(top) * l0);
        if excess > 0.0 {
            xl * xl / excess
        } else {
            100.0 * xl
        }
    };
    let f_mid = (f[0] * srf_est.min(f[top])).sqrt();
    let k_ac = 0.1 * rdc / f_mid.sqrt();

    // Pairs after the SRF: (series crossing, following parallel crossing).
    let after: Vec<(f64, bool)> = match srf {
        Some(s) => feats
            .crossings
            .iter()
            .copied()
            .filter(|c| c.0 > s)
            .collect(),
        None => Vec::new(),
    };
    let mut pairs = Vec::new();
    let mut i = 0;
    let mut last_series: Option<f64> = None;
    while i < after.len() {
        if !after[i].1 {
            let fs = after[i].0;
            let fp = after.get(i + 1).filter(|c| c.1).map(|c| c.0);
            let r_at = |freq: f64| data.z[nearest(data, freq)].re.max(floor_r);
            match fp {
                Some(fp) => {
                    pairs.push((fs, fp, r_at(fs), r_at(fp)));
                    i += 2;
                    continue;
                }
                None => last_series = Some(fs),
            }
        }
        i += 1;
    }

    // ls: from a trailing series resonance with Cp, else the capacitive slope at the top.
    let mut ls = match last_series {
        Some(fs) => 1.0 / ((2.0 * PI * fs).powi(2) * cp),
        None => {
            let wt = w(top);
            (data.z[top].im + 1.0 / (wt * cp)) / wt
        }
    };
    if !(ls.is_finite() && ls > 1e-4 * l0 && ls < 0.1 * l0) {
        ls = 1e-3 * l0;
    }
    if let Some(fs) = last_series {
        // The series resonance may also be the notch of a section whose peak lies above the band.
        pairs.push((
            fs,
            2.0 * f[top].max(fs),
            data.z[nearest(data, fs)].re.max(floor_r),
            rp,
        ));
    }

    Guess {
        base: LumpedModel {
            l0_h: l0,
            rdc_ohm: rdc,
            k_ac_ohm_per_sqrt_hz: k_ac,
            rp_ohm: Some(rp),
            cp_f: cp,
            ls_h: ls,
            sections: Vec::new(),
        },
        pairs,
    }
}

/// A section of `kind` placed on a (notch, peak) pair, given the winding capacitance seen so far;
/// returns the section and the winding capacitance to use with it (below its notch a series branch
/// acts as its own c in parallel with Cp, so the SRF-derived Cp already contains it).
pub fn section_for(kind: SectionKind, pair: (f64, f64, f64, f64), cp_f: f64) -> (Section, f64) {
    let (fs, fp, r_notch, r_peak) = pair;
    let (ws2, wp2) = ((2.0 * PI * fs).powi(2), (2.0 * PI * fp).powi(2));
    let (r_ohm, l_h, c_f, cp) = match kind {
        // Branch l–c resonates at the notch; above it the branch is inductive and resonates with Cp
        // at the peak: ωp² = ωs² + 1/(l·Cp).
        SectionKind::Series => {
            let mut cp = cp_f;
            let mut l = 0.0;
            let mut c = 0.0;
            for _ in 0..3 {
                l = 1.0 / (cp * (wp2 - ws2).max(0.1 * ws2));
                c = 1.0 / (ws2 * l);
                cp = (cp_f - c).max(0.2 * cp_f);
            }
            (r_notch, l, c, cp)
        }
        // Tank resonates at the peak; below it the tank is inductive and cancels the winding's
        // capacitive reactance at the notch: 1/ωs² = l·(Cp + c), 1/ωp² = l·c.
        SectionKind::Parallel => {
            let l = ((1.0 / ws2 - 1.0 / wp2) / cp_f).max(1e-3 / (ws2 * cp_f));
            (r_peak, l, 1.0 / (wp2 * l), cp_f)
        }
    };
    (
        Section {
            kind,
            r_ohm,
            l_h,
            c_f,
        },
        cp,
    )
}
