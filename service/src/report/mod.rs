//! The printable inspection report of one lot's fit: what a component engineer files with the lot.
//!
//! [`build`] turns the stored facts of a fit (its detail, the part's limits, the sweep's provenance,
//! the measured and model curves) into a document of [`Block`]s; [`html`] writes it as one
//! self-contained HTML page that prints cleanly, [`pdf`] as a PDF of text and lines with the
//! standard fonts. Pure: values in, text and bytes out; the HTTP shell reads the store.

pub mod chart;
pub mod html;
pub mod pdf;

use crate::fit::FitReport;
use crate::model::FittedModel;
use crate::registry::drift::{Drift, ParameterDrift};
use crate::registry::limits::Limits;
use crate::registry::verdict::Check;
use crate::units::eng;
use chart::{Chart, Series};
use std::f64::consts::PI;

/// How a cell or a status reads: plain, good (pass), bad (fail) or a warning.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Tone {
    Plain,
    Good,
    Bad,
    Warn,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Cell {
    pub text: String,
    pub tone: Tone,
    pub numeric: bool,
}

impl Cell {
    fn text(t: impl Into<String>) -> Cell {
        Cell {
            text: t.into(),
            tone: Tone::Plain,
            numeric: false,
        }
    }
    fn num(t: impl Into<String>) -> Cell {
        Cell {
            text: t.into(),
            tone: Tone::Plain,
            numeric: true,
        }
    }
    fn tone(mut self, tone: Tone) -> Cell {
        self.tone = tone;
        self
    }
}

#[derive(Debug, Clone, PartialEq)]
pub enum Block {
    Title {
        title: String,
        subtitle: String,
    },
    /// Big status boxes: (caption, value, tone).
    Status(Vec<(String, String, Tone)>),
    Heading(String),
    Para(String),
    Muted(String),
    KeyValues(Vec<(String, String)>),
    Table {
        head: Vec<String>,
        rows: Vec<Vec<Cell>>,
    },
    Chart(Chart),
    PageBreak,
    /// Lines to sign on paper.
    Signatures(Vec<String>),
}

/// Everything a report states, as read from the store.
#[derive(Debug, Clone)]
pub struct ReportInput {
    pub part_number: String,
    pub part_description: String,
    pub limits: Limits,
    pub lot: String,
    pub fit_id: i64,
    pub revision: i64,
    pub file_name: String,
    pub sha256: String,
    pub method: String,
    pub z0_ohm: Option<f64>,
    pub dcr_reading_ohm: Option<f64>,
    pub temperature_c: Option<f64>,
    pub operator: String,
    pub points: i64,
    pub uploaded_at: String,
    pub uploaded_by: String,
    pub engine_version: Option<String>,
    pub report: FitReport,
    /// `pass`, `fail`, `withheld` or `None` (no limits).
    pub verdict: Option<String>,
    pub verdict_note: Option<String>,
    pub checks: Vec<Check>,
    pub drift: Option<Drift>,
    /// `approved`, `rejected` or `None`.
    pub approval: Option<String>,
    pub approved_by: Option<String>,
    pub approved_at: Option<String>,
    pub approved_reason: Option<String>,
    pub frequency_hz: Vec<f64>,
    pub measured_ohm: Vec<(f64, f64)>,
    pub model_ohm: Vec<(f64, f64)>,
    /// When the report was made (RFC 3339).
    pub generated_at: String,
}

fn method_label(method: &str) -> &str {
    match method {
        "reflection" => "Reflection (S11, one port)",
        "series-thru" => "Series-thru (S21, two ports)",
        "shunt-thru" => "Shunt-thru (S21, two ports)",
        "direct" => "Impedance read directly (impedance analyser)",
        other => other,
    }
}

/// A parameter's name for people.
pub fn parameter_label(name: &str) -> String {
    match name {
        "l0_h" => "Inductance L0".into(),
        "rdc_ohm" => "DC resistance".into(),
        "k_ac_ohm_per_sqrt_hz" => "Skin-effect coefficient".into(),
        "rp_ohm" => "Core-loss resistance".into(),
        "cp_f" => "Winding capacitance".into(),
        "ls_h" => "Lead inductance".into(),
        "srf_hz" => "Self-resonant frequency".into(),
        "core.corner_hz" => "Core corner frequency".into(),
        "core.alpha" => "Core broadening α".into(),
        "core.air_fraction" => "Non-dispersive share of L0".into(),
        "core.resonance_hz" => "Core resonance".into(),
        other => other.to_string(),
    }
}

/// A parameter's unit from its name.
fn parameter_unit(name: &str) -> &'static str {
    if name.ends_with("_ohm_per_sqrt_hz") {
        "Ω/√Hz"
    } else if name.ends_with("_ohm") {
        "Ω"
    } else if name.ends_with("_hz") {
        "Hz"
    } else if name.ends_with("_h") {
        "H"
    } else if name.ends_with("_f") {
        "F"
    } else {
        ""
    }
}

fn value(v: f64, unit: &str) -> String {
    if unit.is_empty() || unit == "1" {
        let t = format!("{v:.4}");
        t.trim_end_matches('0').trim_end_matches('.').to_string()
    } else if unit == "ohm" {
        eng(v, "Ω")
    } else {
        eng(v, unit)
    }
}

/// The part's limit on one check as a sentence: "10 µH ± 20 % at 100 kHz".
pub fn limit_caption(limit: &str, limits: &Limits) -> String {
    match limit {
        "inductance" => match (
            limits.l_nominal_h,
            limits.l_tolerance_percent,
            limits.l_test_frequency_hz,
        ) {
            (Some(n), Some(t), Some(f)) => format!(
                "Inductance {} ± {} % at {}",
                eng(n, "H"),
                value(t, ""),
                eng(f, "Hz")
            ),
            _ => "Inductance".into(),
        },
        "dcr_max" => match limits.dcr_max_ohm {
            Some(v) => format!("DC resistance at most {}", eng(v, "Ω")),
            None => "DC resistance".into(),
        },
        "srf_min" => match limits.srf_min_hz {
            Some(v) => format!("Self-resonance at least {}", eng(v, "Hz")),
            None => "Self-resonance".into(),
        },
        "q_min" => match (limits.q_min, limits.q_test_frequency_hz) {
            (Some(q), Some(f)) => format!("Q at least {} at {}", value(q, ""), eng(f, "Hz")),
            _ => "Q".into(),
        },
        "z_min_band" => match (limits.z_min_ohm, limits.z_band_min_hz, limits.z_band_max_hz) {
            (Some(z), Some(a), Some(b)) => format!(
                "|Z| at least {} from {} to {}",
                eng(z, "Ω"),
                eng(a, "Hz"),
                eng(b, "Hz")
            ),
            _ => "|Z| over a band".into(),
        },
        other => other.to_string(),
    }
}

/// Model parameters with their standard uncertainty: (name, value, σ).
fn parameters(report: &FitReport) -> Vec<(String, f64, Option<f64>)> {
    let FittedModel::Lumped(m) = &report.model else {
        return Vec::new();
    };
    let u = report.uncertainty.clone().unwrap_or_default();
    let mut v = vec![
        ("l0_h".to_string(), m.l0_h, u.l0_h),
        ("rdc_ohm".into(), m.rdc_ohm, u.rdc_ohm),
        (
            "k_ac_ohm_per_sqrt_hz".into(),
            m.k_ac_ohm_per_sqrt_hz,
            u.k_ac_ohm_per_sqrt_hz,
        ),
        ("cp_f".into(), m.cp_f, u.cp_f),
        ("ls_h".into(), m.ls_h, u.ls_h),
    ];
    if let Some(rp) = m.rp_ohm {
        v.push(("rp_ohm".into(), rp, u.rp_ohm));
    }
    if let Some(c) = &m.core {
        let uc = u.core.unwrap_or_default();
        v.push(("core.corner_hz".into(), c.corner_hz, uc.corner_hz));
        v.push(("core.alpha".into(), c.alpha, uc.alpha));
        v.push(("core.air_fraction".into(), c.air_fraction, uc.air_fraction));
    }
    for (i, s) in m.sections.iter().enumerate() {
        let us = u.sections.get(i);
        v.push((
            format!("section {} R", i + 1),
            s.r_ohm,
            us.and_then(|x| x.r_ohm),
        ));
        v.push((
            format!("section {} L", i + 1),
            s.l_h,
            us.and_then(|x| x.l_h),
        ));
        v.push((
            format!("section {} C", i + 1),
            s.c_f,
            us.and_then(|x| x.c_f),
        ));
    }
    v
}

fn section_unit(name: &str) -> &'static str {
    match name.rsplit(' ').next() {
        Some("R") => "Ω",
        Some("L") => "H",
        Some("C") => "F",
        _ => parameter_unit(name),
    }
}

fn curves(input: &ReportInput) -> Vec<Chart> {
    let f = &input.frequency_hz;
    let mag = |z: &[(f64, f64)]| z.iter().map(|(r, i)| r.hypot(*i)).collect::<Vec<_>>();
    let l = |z: &[(f64, f64)]| {
        z.iter()
            .zip(f)
            .map(|((_, i), f)| i / (2.0 * PI * f))
            .collect::<Vec<_>>()
    };
    let q = |z: &[(f64, f64)]| z.iter().map(|(r, i)| i / r).collect::<Vec<_>>();
    let series = |label: &str, y: Vec<f64>, colour: &'static str, width: f64| Series {
        label: label.into(),
        x: f.clone(),
        y,
        colour,
        width,
        dashed: false,
    };
    let has_model = input.model_ohm.len() == f.len() && !f.is_empty();
    let two = |name: &str, m: Vec<f64>, fit: Option<Vec<f64>>| {
        let mut s = vec![series(&format!("measured {name}"), m, "#8a94a3", 0.9)];
        if let Some(y) = fit {
            s.push(series("model", y, "#1d5fa8", 1.4));
        }
        s
    };
    // Effective L and Q are drawn below the SRF, where they mean something: the range comes from
    // the model there.
    let srf = input.report.derived.srf_hz.unwrap_or(f64::INFINITY);
    let below = |y: &[f64]| -> Vec<f64> {
        y.iter()
            .zip(f)
            .filter(|(v, f)| **f < srf * 0.7 && v.is_finite() && **v > 0.0)
            .map(|(v, _)| *v)
            .collect()
    };
    let model_l = has_model.then(|| l(&input.model_ohm));
    let model_q = has_model.then(|| q(&input.model_ohm));
    let l_ref = below(model_l.as_deref().unwrap_or(&l(&input.measured_ohm)));
    let q_ref = below(model_q.as_deref().unwrap_or(&q(&input.measured_ohm)));
    let l_range = l_ref
        .iter()
        .cloned()
        .fold(None, |m: Option<f64>, v| Some(m.map_or(v, |m| m.max(v))))
        .map(|hi| [0.0, hi * 1.3]);
    let q_range = q_ref
        .iter()
        .cloned()
        .fold(None, |m: Option<f64>, v| Some(m.map_or(v, |m| m.max(v))))
        .map(|hi| [0.0, hi * 1.25]);
    vec![
        Chart {
            title: "Impedance magnitude |Z|".into(),
            x_unit: "Hz".into(),
            y_label: "|Z|".into(),
            y_unit: "Ω".into(),
            y_log: true,
            y_range: None,
            series: two(
                "|Z|",
                mag(&input.measured_ohm),
                has_model.then(|| mag(&input.model_ohm)),
            ),
        },
        Chart {
            title: "Effective inductance L(f) = Im Z / ω".into(),
            x_unit: "Hz".into(),
            y_label: "L".into(),
            y_unit: "H".into(),
            y_log: false,
            y_range: l_range,
            series: two("L", l(&input.measured_ohm), model_l),
        },
        Chart {
            title: "Quality factor Q(f) = Im Z / Re Z".into(),
            x_unit: "Hz".into(),
            y_label: "Q".into(),
            y_unit: String::new(),
            y_log: false,
            y_range: q_range,
            series: two("Q", q(&input.measured_ohm), model_q),
        },
    ]
}

/// The tolerance a drift is read against: the part's inductance tolerance for L0 (and the effective
/// L), else none.
fn tolerance_for(name: &str, limits: &Limits) -> Option<f64> {
    match name {
        "l0_h" => limits.l_tolerance_percent,
        _ => None,
    }
}

/// The report as blocks, in reading order.
pub fn build(input: &ReportInput) -> Vec<Block> {
    let r = &input.report;
    let mut out = vec![
        Block::Title {
            title: format!("Inspection report: {} lot {}", input.part_number, input.lot),
            subtitle: input.part_description.clone(),
        },
        status_boxes(input),
        Block::Heading("Part, lot and sweep".into()),
        Block::KeyValues(provenance(input)),
        Block::Heading("Verdict per limit".into()),
    ];
    out.extend(verdict_section(input));
    out.push(Block::Heading("Model parameters".into()));
    out.extend(parameter_section(r));
    out.push(Block::KeyValues(figures(r)));
    out.push(Block::Heading("Drift against the approved baseline".into()));
    out.extend(drift_section(input));
    out.push(Block::Heading("Model quality".into()));
    out.extend(quality_section(r));
    out.push(Block::Heading("Approval".into()));
    out.push(Block::KeyValues(approval_record(input)));
    out.push(Block::Signatures(vec![
        "Inspected by".into(),
        "Released by".into(),
    ]));

    out.push(Block::PageBreak);
    out.push(Block::Heading(format!(
        "Plots: {} lot {}",
        input.part_number, input.lot
    )));
    for c in curves(input) {
        out.push(Block::Chart(c));
    }
    out.push(Block::Muted(format!(
        "Report made {} by henrybook from the stored sweep and fit. Caution: a choke removed from \
         its circuit stores no energy; the hazards at test are the equipment's charged capacitors, \
         the voltage kick when current through an inductor is interrupted, and bias supplies. \
         Follow local electrical codes and licensed practice.",
        input.generated_at
    )));
    out
}

/// The three status boxes at the top: verdict, model quality, approval.
fn status_boxes(input: &ReportInput) -> Block {
    let verdict = match input.verdict.as_deref() {
        Some("pass") => ("Pass".to_string(), Tone::Good),
        Some("fail") => ("Fail".to_string(), Tone::Bad),
        Some("withheld") => ("Withheld (model not trustworthy)".to_string(), Tone::Warn),
        _ => ("No limits set".to_string(), Tone::Plain),
    };
    let quality = if crate::registry::verdict::trustworthy(&input.report) {
        ("OK: the model follows the data".to_string(), Tone::Good)
    } else {
        ("Poor: the model misses the data".to_string(), Tone::Bad)
    };
    let approval = match input.approval.as_deref() {
        Some("approved") => (
            format!(
                "Approved by {}",
                input.approved_by.as_deref().unwrap_or("(not recorded)")
            ),
            Tone::Good,
        ),
        Some("rejected") => ("Rejected".to_string(), Tone::Bad),
        _ => match &input.approved_by {
            Some(by) => (
                format!("Approved earlier by {by}, since superseded"),
                Tone::Plain,
            ),
            None => ("Not approved".to_string(), Tone::Plain),
        },
    };
    Block::Status(vec![
        (
            "Verdict against the part's limits".into(),
            verdict.0,
            verdict.1,
        ),
        ("Model quality".into(), quality.0, quality.1),
        ("Approval".into(), approval.0, approval.1),
    ])
}

/// Part, lot and sweep: which file, how it was measured and by whom, and the engine that fitted it.
fn provenance(input: &ReportInput) -> Vec<(String, String)> {
    let r = &input.report;
    let mut kv = vec![
        ("Part".to_string(), input.part_number.clone()),
        ("Lot".into(), input.lot.clone()),
        (
            "Fit".into(),
            format!("#{} (revision {})", input.fit_id, input.revision),
        ),
        ("Sweep file".into(), input.file_name.clone()),
        ("File SHA-256".into(), input.sha256.clone()),
        ("Method".into(), method_label(&input.method).to_string()),
    ];
    if input.method != "direct"
        && let Some(z0) = input.z0_ohm
    {
        kv.push(("Reference impedance".into(), eng(z0, "Ω")));
    }
    kv.push((
        "Points, band".into(),
        format!(
            "{} points, {} to {}",
            input.points,
            eng(r.band_hz[0], "Hz"),
            eng(r.band_hz[1], "Hz")
        ),
    ));
    if let Some(d) = input.dcr_reading_ohm {
        kv.push(("Four-wire DCR reading".into(), eng(d, "Ω")));
    }
    if let Some(t) = input.temperature_c {
        kv.push(("Temperature".into(), format!("{} °C", value(t, ""))));
    }
    if !input.operator.is_empty() {
        kv.push(("Measured by".into(), input.operator.clone()));
    }
    kv.push((
        "Uploaded".into(),
        format!("{} by {}", input.uploaded_at, input.uploaded_by),
    ));
    kv.push((
        "Engine".into(),
        input
            .engine_version
            .clone()
            .unwrap_or_else(|| r.engine_version.clone()),
    ));
    kv
}

/// One row per check against the part's limits, or a note that the part has none.
fn verdict_section(input: &ReportInput) -> Vec<Block> {
    if input.checks.is_empty() {
        return vec![Block::Muted("The part has no limits set.".into())];
    }
    let mut out = Vec::new();
    if let Some(note) = &input.verdict_note {
        out.push(Block::Para(note.clone()));
    }
    let withheld = input.verdict.as_deref() == Some("withheld");
    let rows = input
        .checks
        .iter()
        .map(|c| check_row(c, &input.limits, withheld))
        .collect();
    out.push(Block::Table {
        head: ["Limit", "Measured", "Margin", "Result", "Note"]
            .map(String::from)
            .to_vec(),
        rows,
    });
    out
}

fn check_row(c: &Check, limits: &Limits, withheld: bool) -> Vec<Cell> {
    let result = if withheld {
        Cell::text("withheld").tone(Tone::Warn)
    } else if c.pass {
        Cell::text("pass").tone(Tone::Good)
    } else {
        Cell::text("fail").tone(Tone::Bad)
    };
    vec![
        Cell::text(limit_caption(&c.limit, limits)),
        Cell::num(c.measured.map_or("—".into(), |m| value(m, &c.unit))),
        Cell::num(c.margin.map_or("—".into(), |m| value(m, &c.unit))),
        result,
        Cell::text(c.note.clone().unwrap_or_default()),
    ]
}

/// The lumped model's parameters with their uncertainty (and those the selection left out), or a
/// note for a rational model.
fn parameter_section(r: &FitReport) -> Vec<Block> {
    let params = parameters(r);
    if params.is_empty() {
        return vec![Block::Para(format!(
            "A rational (pole–residue) model: its parameters are poles and residues, given in \
             model.json. Figures from it: SRF {}, peak Q {}.",
            r.derived
                .srf_hz
                .map_or("above the sweep".into(), |v| eng(v, "Hz")),
            r.derived.q_peak.map_or("—".into(), |v| value(v, ""))
        ))];
    }
    let rows = params
        .iter()
        .filter(|(_, v, _)| *v != 0.0)
        .map(|(name, v, u)| parameter_row(name, *v, *u))
        .collect();
    let mut out = vec![Block::Table {
        head: [
            "Parameter",
            "Value",
            "σ (one standard uncertainty)",
            "σ relative",
        ]
        .map(String::from)
        .to_vec(),
        rows,
    }];
    let left_out: Vec<String> = params
        .iter()
        .filter(|(_, v, _)| *v == 0.0)
        .map(|(n, _, _)| parameter_label(n))
        .collect();
    if !left_out.is_empty() {
        out.push(Block::Muted(format!(
            "Not in the selected model (the data did not call for them): {}.",
            left_out.join(", ")
        )));
    }
    out
}

fn parameter_row(name: &str, v: f64, u: Option<f64>) -> Vec<Cell> {
    let unit = section_unit(name);
    let shown = |x: f64| {
        if unit.is_empty() {
            value(x, "")
        } else {
            eng(x, unit)
        }
    };
    vec![
        Cell::text(parameter_label(name)),
        Cell::num(shown(v)),
        Cell::num(u.map_or("not determined".into(), shown)),
        Cell::num(u.filter(|_| v != 0.0).map_or("—".into(), |u| {
            format!("{} %", value(u / v.abs() * 100.0, ""))
        })),
    ]
}

/// The figures read off the model (SRF, peak Q) and how closely it follows the data.
fn figures(r: &FitReport) -> Vec<(String, String)> {
    let mut figures = vec![(
        "Self-resonant frequency".to_string(),
        match (r.derived.srf_hz, r.derived.srf_above_hz) {
            (Some(v), _) => eng(v, "Hz"),
            (None, Some(a)) => format!("above {} (the top of the sweep)", eng(a, "Hz")),
            _ => "—".into(),
        },
    )];
    if let (Some(q), Some(f)) = (r.derived.q_peak, r.derived.q_peak_hz) {
        figures.push((
            "Peak Q".into(),
            format!("{} at {}", value(q, ""), eng(f, "Hz")),
        ));
    }
    figures.push((
        "Fit residual (weighted RMS; 1 = at the noise)".into(),
        value(r.quality.rms_weighted, ""),
    ));
    figures.push((
        "Largest relative error".into(),
        format!(
            "{} % at {}",
            value(r.quality.max_relative_error * 100.0, ""),
            eng(r.quality.max_relative_error_at_hz, "Hz")
        ),
    ));
    figures
}

/// The change of each parameter since the approved baseline, or a note that there is none to
/// compare with.
fn drift_section(input: &ReportInput) -> Vec<Block> {
    let Some(d) = &input.drift else {
        return vec![Block::Muted(
            "No approved baseline to compare with, or this fit is the baseline.".into(),
        )];
    };
    let rows = d
        .parameters
        .iter()
        .map(|p| drift_row(p, &input.limits))
        .collect();
    vec![
        Block::Para(format!(
            "Baseline: fit #{}. Change in percent of the part's tolerance first (where the part \
             sets one), then in percent of the baseline, then in combined standard \
             uncertainties σ.",
            d.baseline_fit_id
        )),
        Block::Table {
            head: [
                "Parameter",
                "Baseline",
                "This lot",
                "Of tolerance",
                "Change",
                "In σ",
            ]
            .map(String::from)
            .to_vec(),
            rows,
        },
    ]
}

fn drift_row(p: &ParameterDrift, limits: &Limits) -> Vec<Cell> {
    let unit = parameter_unit(&p.name);
    let tol = tolerance_for(&p.name, limits);
    let of_tol = match (p.percent, tol) {
        (Some(pc), Some(t)) => {
            let share = pc / t * 100.0;
            let tone = if share.abs() > 100.0 {
                Tone::Bad
            } else if share.abs() > 50.0 {
                Tone::Warn
            } else {
                Tone::Plain
            };
            Cell::num(format!("{} % of ±{} %", value(share, ""), value(t, ""))).tone(tone)
        }
        _ => Cell::num("no tolerance set"),
    };
    vec![
        Cell::text(parameter_label(&p.name)),
        Cell::num(eng(p.baseline, unit)),
        Cell::num(eng(p.current, unit)),
        of_tol,
        Cell::num(
            p.percent
                .map_or("—".into(), |v| format!("{} %", value(v, ""))),
        ),
        Cell::num(
            p.sigma
                .map_or("—".into(), |v| format!("{} σ", value(v, ""))),
        ),
    ]
}

/// The assessment's summary and findings, and the notes from the reader and the fit.
fn quality_section(r: &FitReport) -> Vec<Block> {
    let mut out = vec![Block::Para(r.assessment.summary.clone())];
    if !r.assessment.findings.is_empty() {
        out.push(Block::Table {
            head: vec!["Finding".into(), "Where".into()],
            rows: r
                .assessment
                .findings
                .iter()
                .map(|f| {
                    vec![
                        Cell::text(f.message.clone()).tone(Tone::Warn),
                        Cell::text(f.band_hz.map_or("whole band".into(), |b| {
                            format!("{} to {}", eng(b[0], "Hz"), eng(b[1], "Hz"))
                        })),
                    ]
                })
                .collect(),
        });
    }
    if !r.warnings.is_empty() {
        out.push(Block::Muted(format!(
            "Notes from the reader and the fit: {}",
            r.warnings.join(" ")
        )));
    }
    out
}

/// Who approved the fit, when and why, or that nobody has.
fn approval_record(input: &ReportInput) -> Vec<(String, String)> {
    let mut ap = vec![(
        "Status".to_string(),
        match input.approval.as_deref() {
            Some("approved") => "approved: this fit is the part's baseline".to_string(),
            Some("rejected") => "rejected".to_string(),
            _ if input.approved_by.is_some() => {
                "approved earlier, superseded by a later approval".to_string()
            }
            _ => "not approved".to_string(),
        },
    )];
    if let Some(by) = &input.approved_by {
        ap.push(("Approved by".into(), by.clone()));
    }
    if let Some(at) = &input.approved_at {
        ap.push(("Approved at".into(), at.clone()));
    }
    if let Some(why) = &input.approved_reason {
        ap.push(("Reason given".into(), why.clone()));
    }
    ap
}

/// The text of every block, for checks and search: what a reader of the page sees, in order.
pub fn plain_text(blocks: &[Block]) -> String {
    let mut s = String::new();
    for b in blocks {
        match b {
            Block::Title { title, subtitle } => {
                s.push_str(title);
                s.push('\n');
                s.push_str(subtitle);
            }
            Block::Status(items) => {
                for (c, v, _) in items {
                    s.push_str(&format!("{c}: {v}\n"));
                }
            }
            Block::Heading(t) | Block::Para(t) | Block::Muted(t) => s.push_str(t),
            Block::KeyValues(kv) => {
                for (k, v) in kv {
                    s.push_str(&format!("{k}: {v}\n"));
                }
            }
            Block::Table { head, rows } => {
                s.push_str(&head.join(" | "));
                for r in rows {
                    s.push('\n');
                    s.push_str(
                        &r.iter()
                            .map(|c| c.text.as_str())
                            .collect::<Vec<_>>()
                            .join(" | "),
                    );
                }
            }
            Block::Chart(c) => s.push_str(&c.title),
            Block::PageBreak => {}
            Block::Signatures(who) => s.push_str(&who.join(" / ")),
        }
        s.push('\n');
    }
    s
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::registry::drift::ParameterDrift;
    use crate::registry::verdict::tests::report;

    pub(crate) fn input() -> ReportInput {
        let r = report(9.45e-6, 0.0122, 5e-12, Some(18.4e6));
        let limits = Limits {
            l_nominal_h: Some(10e-6),
            l_test_frequency_hz: Some(100e3),
            l_tolerance_percent: Some(20.0),
            dcr_max_ohm: Some(0.018),
            ..Limits::default()
        };
        let checks = crate::registry::verdict::checks(&limits, &r);
        let f: Vec<f64> = (0..50).map(|i| 1e3 * 10f64.powf(i as f64 * 0.1)).collect();
        let (re, im) = crate::registry::figures::model_curve(&r.model, &f);
        let model: Vec<(f64, f64)> = re.into_iter().zip(im).collect();
        ReportInput {
            part_number: "OMW-L10U-BK".into(),
            part_description: "10 µH choke".into(),
            limits,
            lot: "2647C".into(),
            fit_id: 7,
            revision: 1,
            file_name: "lot-2647C.s2p".into(),
            sha256: "ab".repeat(32),
            method: "shunt-thru".into(),
            z0_ohm: Some(50.0),
            dcr_reading_ohm: Some(0.0123),
            temperature_c: Some(24.5),
            operator: "J. Varga".into(),
            points: 50,
            uploaded_at: "2026-12-01T10:00:00Z".into(),
            uploaded_by: "inspector".into(),
            engine_version: Some("test".into()),
            report: r,
            verdict: Some("pass".into()),
            verdict_note: None,
            checks,
            drift: Some(Drift {
                baseline_fit_id: 3,
                parameters: vec![ParameterDrift {
                    name: "l0_h".into(),
                    baseline: 10.2e-6,
                    current: 9.45e-6,
                    percent: Some(-7.352_941),
                    sigma: Some(-23.0),
                }],
            }),
            approval: None,
            approved_by: None,
            approved_at: None,
            approved_reason: None,
            frequency_hz: f,
            measured_ohm: model.clone(),
            model_ohm: model,
            generated_at: "2026-12-04T20:00:00Z".into(),
        }
    }

    #[test]
    fn a_limit_caption_prints_si_prefixes_for_people() {
        let i = input();
        assert_eq!(
            limit_caption("inductance", &i.limits),
            "Inductance 10 µH ± 20 % at 100 kHz"
        );
        assert_eq!(
            limit_caption("dcr_max", &i.limits),
            "DC resistance at most 18 mΩ"
        );
    }

    #[test]
    fn the_report_states_part_lot_provenance_verdict_and_drift_against_tolerance_first() {
        let text = plain_text(&build(&input()));
        for want in [
            "Inspection report: OMW-L10U-BK lot 2647C",
            "Sweep file: lot-2647C.s2p",
            "Method: Shunt-thru (S21, two ports)",
            "Reference impedance: 50 Ω",
            "50 points, 1 kHz to 100 MHz",
            "Inductance 10 µH ± 20 % at 100 kHz",
            "Verdict against the part's limits: Pass",
            // −7.35 % of the baseline against a ±20 % tolerance: 36.76 % of it.
            "-36.7647 % of ±20 %",
            "-23 σ",
            "Inductance L0 | 9.45 µH",
            "Not approved",
        ] {
            assert!(text.contains(want), "missing {want:?} in:\n{text}");
        }
        assert!(
            !text.contains("l0_h"),
            "code names leak into the report:\n{text}"
        );
    }

    #[test]
    fn a_direct_impedance_file_shows_no_reference_impedance() {
        let mut i = input();
        i.method = "direct".into();
        let text = plain_text(&build(&i));
        assert!(!text.contains("Reference impedance"));
    }
}
