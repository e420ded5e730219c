//! The registry's shapes (the same the HTTP JSON uses) as protobuf messages. Translation only: every
//! value comes from the store or the engine report unchanged.

use super::proto;
use crate::fit::{Derived, FitReport, LumpedUncertainty, Quality};
use crate::model::{FittedModel, LumpedModel, RationalModel, SectionKind};
use crate::registry::drift::Drift;
use crate::registry::limits::Limits;
use crate::registry::trend::{FigureTrend, PartTrend};
use crate::registry::verdict::Check;
use crate::registry::wire::{
    AuditEntry, FitCurves, FitDetail, FitPage, FitStatus, FitSummary, Part, PartPage, PartSummary,
    QueueCounts,
};

pub fn fit_state(s: FitStatus) -> proto::FitState {
    match s {
        FitStatus::Queued => proto::FitState::Queued,
        FitStatus::Running => proto::FitState::Running,
        FitStatus::Succeeded => proto::FitState::Succeeded,
        FitStatus::Failed => proto::FitState::Failed,
        FitStatus::Cancelled => proto::FitState::Cancelled,
    }
}

/// The store's status for a requested state; `None` for UNSPECIFIED (any state).
pub fn fit_status(s: proto::FitState) -> Option<FitStatus> {
    match s {
        proto::FitState::Unspecified => None,
        proto::FitState::Queued => Some(FitStatus::Queued),
        proto::FitState::Running => Some(FitStatus::Running),
        proto::FitState::Succeeded => Some(FitStatus::Succeeded),
        proto::FitState::Failed => Some(FitStatus::Failed),
        proto::FitState::Cancelled => Some(FitStatus::Cancelled),
    }
}

pub fn fit_summary(s: FitSummary) -> proto::FitSummary {
    proto::FitSummary {
        fit_id: s.fit_id,
        revision: s.revision,
        sweep_id: s.sweep_id,
        part_number: s.part_number,
        lot: s.lot,
        state: fit_state(s.status) as i32,
        progress: s.progress,
        error: s.error,
        error_kind: s.error_kind.map(|k| k.as_str().to_string()),
        created_at: s.created_at,
        started_at: s.started_at,
        finished_at: s.finished_at,
        srf_hz: s.srf_hz,
        verdict: s.verdict,
        approval: s.approval,
        quality: s.quality,
    }
}

pub fn fit_page(p: FitPage) -> proto::FitPage {
    proto::FitPage {
        items: p.items.into_iter().map(fit_summary).collect(),
        next_cursor: p.next_cursor,
    }
}

pub fn fit_counts(c: QueueCounts) -> proto::FitCounts {
    proto::FitCounts {
        queued: c.queued,
        running: c.running,
        succeeded: c.succeeded,
        failed: c.failed,
        cancelled: c.cancelled,
    }
}

fn part_summary(p: PartSummary) -> proto::PartSummary {
    proto::PartSummary {
        part_number: p.part_number,
        description: p.description,
        approved_fit_id: p.approved_fit_id,
        latest_fit_id: p.latest_fit_id,
        latest_verdict: p.latest_verdict,
        drift_max_sigma: p.drift_max_sigma,
        drift_l0_percent: p.drift_l0_percent,
        l_tolerance_percent: p.l_tolerance_percent,
        srf_hz: p.srf_hz,
        series_resonances_hz: p.series_resonances_hz,
        l0_h: p.l0_h,
        rdc_ohm: p.rdc_ohm,
        core_corner_hz: p.core_corner_hz,
        l_eff_h: p.l_eff_h,
        z_min_ohm: p.z_min_ohm,
        answered_from_fit_id: p.answered_from_fit_id,
    }
}

pub fn part_page(p: PartPage) -> proto::PartPage {
    proto::PartPage {
        items: p.items.into_iter().map(part_summary).collect(),
        next_cursor: p.next_cursor,
        answer_from: p.answer_from,
    }
}

fn limits(l: Limits) -> proto::Limits {
    proto::Limits {
        l_nominal_h: l.l_nominal_h,
        l_test_frequency_hz: l.l_test_frequency_hz,
        l_tolerance_percent: l.l_tolerance_percent,
        dcr_max_ohm: l.dcr_max_ohm,
        srf_min_hz: l.srf_min_hz,
        q_min: l.q_min,
        q_test_frequency_hz: l.q_test_frequency_hz,
        z_min_ohm: l.z_min_ohm,
        z_band_min_hz: l.z_band_min_hz,
        z_band_max_hz: l.z_band_max_hz,
        core_corner_min_hz: l.core_corner_min_hz,
        core_corner_max_hz: l.core_corner_max_hz,
    }
}

fn audit_entry(a: AuditEntry) -> proto::AuditEntry {
    proto::AuditEntry {
        at: a.at,
        actor: a.actor,
        action: a.action,
        fit_id: a.fit_id,
        reason: a.reason,
    }
}

pub fn part(p: Part) -> proto::Part {
    proto::Part {
        part_number: p.part_number,
        description: p.description,
        limits: Some(limits(p.limits)),
        lots: p.lots,
        baseline_fit_id: p.baseline_fit_id,
        fits: p.fits.into_iter().map(fit_summary).collect(),
        audit: p.audit.into_iter().map(audit_entry).collect(),
    }
}

fn lumped(m: LumpedModel) -> proto::LumpedModel {
    proto::LumpedModel {
        l0_h: m.l0_h,
        rdc_ohm: m.rdc_ohm,
        k_ac_ohm_per_sqrt_hz: m.k_ac_ohm_per_sqrt_hz,
        rp_ohm: m.rp_ohm,
        cp_f: m.cp_f,
        ls_h: m.ls_h,
        sections: m
            .sections
            .into_iter()
            .map(|s| proto::Section {
                kind: match s.kind {
                    SectionKind::Series => proto::SectionKind::Series,
                    SectionKind::Parallel => proto::SectionKind::Parallel,
                } as i32,
                r_ohm: s.r_ohm,
                l_h: s.l_h,
                c_f: s.c_f,
            })
            .collect(),
    }
}

fn rational(m: RationalModel) -> proto::RationalModel {
    proto::RationalModel {
        d_ohm: m.d_ohm,
        e_h: m.e_h,
        real_poles: m
            .real_poles
            .into_iter()
            .map(|p| proto::RealPole {
                pole_rad_per_s: p.pole_rad_per_s,
                residue_ohm_rad_per_s: p.residue_ohm_rad_per_s,
            })
            .collect(),
        complex_poles: m
            .complex_poles
            .into_iter()
            .map(|p| proto::ComplexPole {
                pole_re_rad_per_s: p.pole_rad_per_s.re,
                pole_im_rad_per_s: p.pole_rad_per_s.im,
                residue_re_ohm_rad_per_s: p.residue_ohm_rad_per_s.re,
                residue_im_ohm_rad_per_s: p.residue_ohm_rad_per_s.im,
            })
            .collect(),
    }
}

fn uncertainty(u: LumpedUncertainty) -> proto::LumpedUncertainty {
    proto::LumpedUncertainty {
        l0_h: u.l0_h,
        rdc_ohm: u.rdc_ohm,
        k_ac_ohm_per_sqrt_hz: u.k_ac_ohm_per_sqrt_hz,
        rp_ohm: u.rp_ohm,
        cp_f: u.cp_f,
        ls_h: u.ls_h,
        sections: u
            .sections
            .into_iter()
            .map(|s| proto::SectionUncertainty {
                r_ohm: s.r_ohm,
                l_h: s.l_h,
                c_f: s.c_f,
            })
            .collect(),
    }
}

fn derived(d: Derived) -> proto::DerivedFigures {
    proto::DerivedFigures {
        srf_hz: d.srf_hz,
        srf_above_hz: d.srf_above_hz,
        series_resonances_hz: d.series_resonances_hz,
        parallel_resonances_hz: d.parallel_resonances_hz,
        q_peak: d.q_peak,
        q_peak_hz: d.q_peak_hz,
        naive_cp_f: d.naive_cp_f,
        naive_cp_error_percent: d.naive_cp_error_percent,
        core_corner_hz: d.core_corner_hz,
        at_frequencies: d
            .at_frequencies
            .into_iter()
            .map(|p| proto::PointFigures {
                frequency_hz: p.frequency_hz,
                l_eff_h: p.l_eff_h,
                q: p.q,
                z_mag_ohm: p.z_mag_ohm,
            })
            .collect(),
    }
}

fn quality(q: Quality) -> proto::FitQuality {
    proto::FitQuality {
        rms_weighted: q.rms_weighted,
        max_relative_error: q.max_relative_error,
        max_relative_error_at_hz: q.max_relative_error_at_hz,
        points: i64::try_from(q.points).unwrap_or(i64::MAX),
        parameters: i64::try_from(q.parameters).unwrap_or(i64::MAX),
    }
}

fn check(c: Check) -> proto::VerdictCheck {
    proto::VerdictCheck {
        limit: c.limit,
        measured: c.measured,
        limit_value: c.limit_value,
        unit: c.unit,
        margin: c.margin,
        pass: c.pass,
        note: c.note,
    }
}

fn drift(d: Drift) -> proto::Drift {
    proto::Drift {
        baseline_fit_id: d.baseline_fit_id,
        parameters: d
            .parameters
            .into_iter()
            .map(|p| proto::ParameterDrift {
                name: p.name,
                baseline: p.baseline,
                current: p.current,
                percent: p.percent,
                sigma: p.sigma,
            })
            .collect(),
    }
}

/// A fit's detail with its report (already parsed from the detail's JSON) as one message.
pub fn fit_result(
    detail: FitDetail,
    report: Option<FitReport>,
) -> Result<proto::FitResult, serde_json::Error> {
    let report_json = detail
        .report
        .as_ref()
        .map(serde_json::to_string)
        .transpose()?;
    let options_json = serde_json::to_string(&detail.options)?;
    let mut out = proto::FitResult {
        summary: Some(fit_summary(detail.summary)),
        verdict_checks: detail.verdict_checks.into_iter().map(check).collect(),
        drift: detail.drift.map(drift),
        report_json,
        options_json,
        method: detail.method,
        z0_ohm: detail.z0_ohm,
        dcr_ohm: detail.dcr_ohm,
        temperature_c: detail.temperature_c,
        operator: detail.operator,
        file_name: detail.file_name,
        sha256: detail.sha256,
        engine_version: detail.engine_version,
        attempts: detail.attempts,
        verdict_note: detail.verdict_note,
        quality_summary: detail.quality_summary,
        ..Default::default()
    };
    if let Some(r) = report {
        let termination = serde_json::to_value(r.termination)?;
        out.model = Some(match r.model {
            FittedModel::Lumped(m) => proto::fit_result::Model::Lumped(lumped(m)),
            FittedModel::Rational(m) => proto::fit_result::Model::Rational(rational(m)),
        });
        out.uncertainty = r.uncertainty.map(uncertainty);
        out.not_identifiable = r.not_identifiable;
        out.derived = Some(derived(r.derived));
        out.quality = Some(quality(r.quality));
        out.termination = termination.as_str().map(str::to_string);
        out.iterations = Some(i64::try_from(r.iterations).unwrap_or(i64::MAX));
        out.band_min_hz = Some(r.band_hz[0]);
        out.band_max_hz = Some(r.band_hz[1]);
    }
    Ok(out)
}

/// Limits as given in a request; an absent message is no limits.
pub fn limits_from(l: Option<proto::Limits>) -> Limits {
    let Some(l) = l else {
        return Limits::default();
    };
    Limits {
        l_nominal_h: l.l_nominal_h,
        l_test_frequency_hz: l.l_test_frequency_hz,
        l_tolerance_percent: l.l_tolerance_percent,
        dcr_max_ohm: l.dcr_max_ohm,
        srf_min_hz: l.srf_min_hz,
        q_min: l.q_min,
        q_test_frequency_hz: l.q_test_frequency_hz,
        z_min_ohm: l.z_min_ohm,
        z_band_min_hz: l.z_band_min_hz,
        z_band_max_hz: l.z_band_max_hz,
        core_corner_min_hz: l.core_corner_min_hz,
        core_corner_max_hz: l.core_corner_max_hz,
    }
}

pub fn fit_curves(c: FitCurves) -> proto::FitCurves {
    proto::FitCurves {
        frequency_hz: c.frequency_hz,
        measured_z_real_ohm: c.measured_z_real_ohm,
        measured_z_imag_ohm: c.measured_z_imag_ohm,
        sigma_ohm: c.sigma_ohm,
        model_z_real_ohm: c.model_z_real_ohm,
        model_z_imag_ohm: c.model_z_imag_ohm,
    }
}

fn count(n: usize) -> i64 {
    i64::try_from(n).unwrap_or(i64::MAX)
}

fn figure_trend(f: FigureTrend) -> proto::FigureTrend {
    proto::FigureTrend {
        figure: f.figure,
        label: f.label,
        unit: f.unit,
        limit_low: f.limit_low,
        limit_high: f.limit_high,
        centre: f.centre,
        sigma: f.sigma,
        control_low: f.control_low,
        control_high: f.control_high,
        approved_lots: count(f.approved_lots),
        control_note: f.control_note,
        points: f
            .points
            .into_iter()
            .map(|p| proto::TrendPoint {
                lot_index: count(p.lot_index),
                value: p.value,
                outside_limits: p.outside_limits,
                out_of_control: p.out_of_control,
                in_run: p.in_run,
                beyond_2_sigma_2_of_3: p.beyond_2_sigma_2_of_3,
                beyond_1_sigma_4_of_5: p.beyond_1_sigma_4_of_5,
            })
            .collect(),
    }
}

pub fn part_trend(t: PartTrend) -> proto::PartTrend {
    proto::PartTrend {
        part_number: t.part_number,
        lots: t
            .lots
            .into_iter()
            .map(|l| proto::TrendLot {
                lot: l.lot,
                fit_id: l.fit_id,
                approved: l.approved,
                quality: l.quality,
                uploaded_at: l.uploaded_at,
            })
            .collect(),
        run_length: count(t.run_length),
        figures: t.figures.into_iter().map(figure_trend).collect(),
    }
}
