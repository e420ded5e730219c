//! The gRPC interface against the real service (random ports, its own database): every answer equals
//! the HTTP answer to the same question, every method admits exactly the roles of its HTTP twin, and
//! bad arguments are INVALID_ARGUMENT naming the field. The sweeps are synthetic, made from known
//! lumped models (invented for these tests).

use henrybook::fit::{FitControl, FitError, FitOptions, FitReport};
use henrybook::grpc::proto;
use henrybook::grpc::proto::fit_registry_client::FitRegistryClient;
use henrybook::grpc::proto::part_registry_client::PartRegistryClient;
use henrybook::jobs::{CoreEngine, Engine};
use henrybook::model::{Section, SectionKind};
use henrybook::sweep::{ReadOptions, Sweep, SweepError};
use henrybook_tests::service::{
    TestApp, TestDatabase, grpc_request, simple_model, spawn_app, spawn_app_with, synthetic_csv,
};
use serde_json::{Value, json};
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;
use std::time::Instant;
use tonic::Code;
use tonic::transport::Channel;

const FIT_TIMEOUT: Duration = Duration::from_secs(120);

// ---- proto messages as the HTTP JSON shapes (same names, null for absent) ----

/// `v` written as JSON text and read back, as the HTTP answers are: both sides then pass through the
/// same float parser, so equal numbers compare equal (the text of an f64 is its shortest exact form).
fn norm(v: Value) -> Value {
    serde_json::from_str(&v.to_string()).expect("JSON text reads back")
}

fn state_name(state: i32) -> &'static str {
    match proto::FitState::try_from(state).expect("a known state") {
        proto::FitState::Unspecified => "unspecified",
        proto::FitState::Queued => "queued",
        proto::FitState::Running => "running",
        proto::FitState::Succeeded => "succeeded",
        proto::FitState::Failed => "failed",
        proto::FitState::Cancelled => "cancelled",
    }
}

fn summary_json(s: &proto::FitSummary) -> Value {
    norm(json!({
        "fit_id": s.fit_id, "revision": s.revision, "sweep_id": s.sweep_id,
        "part_number": s.part_number, "lot": s.lot, "status": state_name(s.state),
        "progress": s.progress, "error": s.error, "error_kind": s.error_kind,
        "created_at": s.created_at,
        "started_at": s.started_at, "finished_at": s.finished_at, "srf_hz": s.srf_hz,
        "verdict": s.verdict, "approval": s.approval, "quality": s.quality,
    }))
}

const SUMMARY_KEYS: [&str; 16] = [
    "quality",
    "error_kind",
    "fit_id",
    "revision",
    "sweep_id",
    "part_number",
    "lot",
    "status",
    "progress",
    "error",
    "created_at",
    "started_at",
    "finished_at",
    "srf_hz",
    "verdict",
    "approval",
];

/// The keys of `v` named in `keys` (a flattened HTTP detail holds the summary among other fields).
fn pick(v: &Value, keys: &[&str]) -> Value {
    Value::Object(
        keys.iter()
            .map(|k| {
                (
                    k.to_string(),
                    v.get(*k)
                        .cloned()
                        .unwrap_or_else(|| panic!("no {k} in {v}")),
                )
            })
            .collect(),
    )
}

fn fit_page_json(p: &proto::FitPage) -> Value {
    norm(
        json!({"items": p.items.iter().map(summary_json).collect::<Vec<_>>(), "next_cursor": p.next_cursor}),
    )
}

fn part_summary_json(p: &proto::PartSummary) -> Value {
    norm(json!({
        "part_number": p.part_number, "description": p.description,
        "approved_fit_id": p.approved_fit_id, "latest_fit_id": p.latest_fit_id,
        "latest_verdict": p.latest_verdict, "drift_max_sigma": p.drift_max_sigma,
        "drift_l0_percent": p.drift_l0_percent, "l_tolerance_percent": p.l_tolerance_percent,
        "srf_hz": p.srf_hz, "series_resonances_hz": p.series_resonances_hz, "l0_h": p.l0_h,
        "rdc_ohm": p.rdc_ohm, "l_eff_h": p.l_eff_h, "z_min_ohm": p.z_min_ohm,
        "answered_from_fit_id": p.answered_from_fit_id, "core_corner_hz": p.core_corner_hz,
    }))
}

fn part_page_json(p: &proto::PartPage) -> Value {
    norm(
        json!({"items": p.items.iter().map(part_summary_json).collect::<Vec<_>>(), "next_cursor": p.next_cursor,
               "answer_from": p.answer_from}),
    )
}

fn part_json(p: &proto::Part) -> Value {
    let l = p.limits.expect("limits are always sent");
    norm(json!({
        "part_number": p.part_number, "description": p.description,
        "limits": {
            "l_nominal_h": l.l_nominal_h, "l_test_frequency_hz": l.l_test_frequency_hz,
            "l_tolerance_percent": l.l_tolerance_percent, "dcr_max_ohm": l.dcr_max_ohm,
            "srf_min_hz": l.srf_min_hz, "q_min": l.q_min,
            "q_test_frequency_hz": l.q_test_frequency_hz, "z_min_ohm": l.z_min_ohm,
            "z_band_min_hz": l.z_band_min_hz, "z_band_max_hz": l.z_band_max_hz,
            "core_corner_min_hz": l.core_corner_min_hz, "core_corner_max_hz": l.core_corner_max_hz,
        },
        "lots": p.lots, "baseline_fit_id": p.baseline_fit_id,
        "fits": p.fits.iter().map(summary_json).collect::<Vec<_>>(),
        "audit": p.audit.iter().map(|a| json!({
            "at": a.at, "actor": a.actor, "action": a.action, "fit_id": a.fit_id, "reason": a.reason,
        })).collect::<Vec<_>>(),
    }))
}

fn model_json(r: &proto::FitResult) -> Value {
    norm(
        match r.model.as_ref().expect("a succeeded fit has a model") {
            proto::fit_result::Model::Lumped(m) => json!({
                "kind": "lumped", "l0_h": m.l0_h, "rdc_ohm": m.rdc_ohm,
                "k_ac_ohm_per_sqrt_hz": m.k_ac_ohm_per_sqrt_hz, "rp_ohm": m.rp_ohm, "cp_f": m.cp_f,
                "ls_h": m.ls_h,
                "sections": m.sections.iter().map(|s| json!({
                    "kind": match proto::SectionKind::try_from(s.kind).unwrap() {
                        proto::SectionKind::Series => "series",
                        proto::SectionKind::Parallel => "parallel",
                        proto::SectionKind::Unspecified => "unspecified",
                    },
                    "r_ohm": s.r_ohm, "l_h": s.l_h, "c_f": s.c_f,
                })).collect::<Vec<_>>(),
            }),
            proto::fit_result::Model::Rational(m) => json!({
                "kind": "rational", "d_ohm": m.d_ohm, "e_h": m.e_h,
                "real_poles": m.real_poles.iter().map(|p| json!({
                    "pole_rad_per_s": p.pole_rad_per_s, "residue_ohm_rad_per_s": p.residue_ohm_rad_per_s,
                })).collect::<Vec<_>>(),
                "complex_poles": m.complex_poles.iter().map(|p| json!({
                    "pole_rad_per_s": [p.pole_re_rad_per_s, p.pole_im_rad_per_s],
                    "residue_ohm_rad_per_s": [p.residue_re_ohm_rad_per_s, p.residue_im_ohm_rad_per_s],
                })).collect::<Vec<_>>(),
            }),
        },
    )
}

fn uncertainty_json(u: &proto::LumpedUncertainty) -> Value {
    norm(json!({
        "l0_h": u.l0_h, "rdc_ohm": u.rdc_ohm, "k_ac_ohm_per_sqrt_hz": u.k_ac_ohm_per_sqrt_hz,
        "rp_ohm": u.rp_ohm, "cp_f": u.cp_f, "ls_h": u.ls_h,
        "sections": u.sections.iter().map(|s| json!({"r_ohm": s.r_ohm, "l_h": s.l_h, "c_f": s.c_f}))
            .collect::<Vec<_>>(),
    }))
}

fn derived_json(d: &proto::DerivedFigures) -> Value {
    norm(json!({
        "srf_hz": d.srf_hz, "srf_above_hz": d.srf_above_hz,
        "series_resonances_hz": d.series_resonances_hz,
        "parallel_resonances_hz": d.parallel_resonances_hz, "q_peak": d.q_peak,
        "q_peak_hz": d.q_peak_hz, "naive_cp_f": d.naive_cp_f,
        "naive_cp_error_percent": d.naive_cp_error_percent, "core_corner_hz": d.core_corner_hz,
        "at_frequencies": d.at_frequencies.iter().map(|p| json!({
            "frequency_hz": p.frequency_hz, "l_eff_h": p.l_eff_h, "q": p.q, "z_mag_ohm": p.z_mag_ohm,
        })).collect::<Vec<_>>(),
    }))
}

fn quality_json(q: &proto::FitQuality) -> Value {
    norm(json!({
        "rms_weighted": q.rms_weighted, "max_relative_error": q.max_relative_error,
        "max_relative_error_at_hz": q.max_relative_error_at_hz, "points": q.points,
        "parameters": q.parameters,
    }))
}

fn checks_json(r: &proto::FitResult) -> Value {
    norm(Value::Array(
        r.verdict_checks
            .iter()
            .map(|c| {
                json!({
                    "limit": c.limit, "measured": c.measured, "limit_value": c.limit_value,
                    "unit": c.unit, "margin": c.margin, "pass": c.pass, "note": c.note,
                })
            })
            .collect(),
    ))
}

fn drift_json(r: &proto::FitResult) -> Value {
    norm(match &r.drift {
        None => Value::Null,
        Some(d) => json!({
            "baseline_fit_id": d.baseline_fit_id,
            "parameters": d.parameters.iter().map(|p| json!({
                "name": p.name, "baseline": p.baseline, "current": p.current,
                "percent": p.percent, "sigma": p.sigma,
            })).collect::<Vec<_>>(),
        }),
    })
}

/// Every field of a gRPC fit result against the HTTP fit detail of the same fit.
fn assert_result_equals_detail(r: &proto::FitResult, http: &Value) {
    let id = http["fit_id"].clone();
    assert_eq!(
        summary_json(r.summary.as_ref().unwrap()),
        pick(http, &SUMMARY_KEYS),
        "fit {id}: summary"
    );
    assert_eq!(checks_json(r), http["verdict_checks"], "fit {id}: checks");
    assert_eq!(drift_json(r), http["drift"], "fit {id}: drift");
    let options: Value = serde_json::from_str(&r.options_json).unwrap();
    assert_eq!(options, http["options"], "fit {id}: options");
    assert_eq!(
        norm(json!({
            "method": r.method, "z0_ohm": r.z0_ohm, "dcr_ohm": r.dcr_ohm,
            "temperature_c": r.temperature_c, "operator": r.operator, "file_name": r.file_name,
            "sha256": r.sha256, "engine_version": r.engine_version, "attempts": r.attempts,
            "verdict_note": r.verdict_note, "quality_summary": r.quality_summary,
        })),
        pick(
            http,
            &[
                "method",
                "z0_ohm",
                "dcr_ohm",
                "temperature_c",
                "operator",
                "file_name",
                "sha256",
                "engine_version",
                "attempts",
                "verdict_note",
                "quality_summary"
            ]
        ),
        "fit {id}: metadata"
    );
    let report = &http["report"];
    if report.is_null() {
        assert!(r.report_json.is_none() && r.model.is_none() && r.derived.is_none());
        return;
    }
    let whole: Value = serde_json::from_str(r.report_json.as_deref().unwrap()).unwrap();
    assert_eq!(&whole, report, "fit {id}: report_json");
    assert_eq!(model_json(r), report["model"], "fit {id}: model");
    assert_eq!(
        r.uncertainty.as_ref().map_or(Value::Null, uncertainty_json),
        report["uncertainty"],
        "fit {id}: uncertainty"
    );
    assert_eq!(
        derived_json(r.derived.as_ref().unwrap()),
        report["derived"],
        "fit {id}: derived"
    );
    assert_eq!(
        quality_json(r.quality.as_ref().unwrap()),
        report["quality"],
        "fit {id}: quality"
    );
    assert_eq!(json!(r.not_identifiable), report["not_identifiable"]);
    assert_eq!(json!(r.termination), report["termination"]);
    assert_eq!(json!(r.iterations), report["iterations"]);
    assert_eq!(
        norm(json!([r.band_min_hz, r.band_max_hz])),
        report["band_hz"]
    );
}

// ---- helpers ----

struct Clients {
    parts: PartRegistryClient<Channel>,
    fits: FitRegistryClient<Channel>,
}

async fn clients(app: &TestApp) -> Clients {
    let channel = app.grpc_channel().await;
    Clients {
        parts: PartRegistryClient::new(channel.clone()),
        fits: FitRegistryClient::new(channel),
    }
}

async fn upload_http(app: &TestApp, part: &str, lot: &str, csv: Vec<u8>) -> i64 {
    let r = app
        .upload(
            &format!("{part}-{lot}.csv"),
            csv,
            &[("part_number", part), ("lot", lot), ("method", "direct")],
        )
        .await;
    assert_eq!(r.status(), 202, "{}", r.text().await.unwrap_or_default());
    r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap()
}

fn upload_message(part: &str, lot: &str, csv: Vec<u8>) -> proto::UploadSweepRequest {
    proto::UploadSweepRequest {
        file_name: format!("{part}-{lot}.csv"),
        file: csv,
        part_number: part.into(),
        lot: lot.into(),
        method: Some("direct".into()),
        ..Default::default()
    }
}

/// Watches a fit over gRPC until the stream ends; returns every status it sent.
async fn watch(c: &mut Clients, token: &str, fit_id: i64) -> Vec<proto::FitSummary> {
    let mut stream = c
        .fits
        .watch_fit(grpc_request(proto::FitRef { fit_id }, token))
        .await
        .expect("watch starts")
        .into_inner();
    let mut seen = Vec::new();
    let deadline = tokio::time::Instant::now() + FIT_TIMEOUT;
    loop {
        let next = tokio::time::timeout_at(deadline, stream.message())
            .await
            .expect("the fit ends in time")
            .expect("the stream carries no error");
        match next {
            Some(s) => seen.push(s),
            None => return seen,
        }
    }
}

async fn text_of(r: reqwest::Response) -> (u16, String, String) {
    let status = r.status().as_u16();
    let disposition = r
        .headers()
        .get("content-disposition")
        .map(|v| v.to_str().unwrap().to_string())
        .unwrap_or_default();
    (status, disposition, r.text().await.unwrap())
}

// ---- the cross-check ----

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_grpc_answer_equals_the_http_answer_to_the_same_question() {
    // Arrange: one part with limits, sweeps uploaded over HTTP and over gRPC.
    // Thomson f = 1/(2π√(LC)): G-A 10 µH ‖ 5 pF → 22.51 MHz, G-B 1 µH ‖ 2 pF → 112.5 MHz
    // (computed by hand); G-D adds a series R–L–C branch (2 Ω, 50 nH, 2 pF): a |Z| notch near 503 MHz.
    let app = spawn_app().await;
    let mut c = clients(&app).await;
    app.create_part(
        "G-A",
        json!({"l_nominal_h": 1e-5, "l_test_frequency_hz": 1e5, "l_tolerance_percent": 20,
               "dcr_max_ohm": 0.04, "srf_min_hz": 1.5e7}),
    )
    .await;
    app.create_part("G-B", json!({})).await;
    app.create_part("G-D", json!({})).await;
    let a1 = upload_http(
        &app,
        "G-A",
        "1",
        synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 401),
    )
    .await;
    let accepted = c
        .fits
        .upload_sweep(grpc_request(
            upload_message(
                "G-A",
                "2",
                synthetic_csv(&simple_model(1.05e-5, 0.05, 5e-12), 1e4, 1e8, 401),
            ),
            &app.inspector,
        ))
        .await
        .expect("a gRPC upload is accepted")
        .into_inner();
    assert!(!accepted.duplicate);
    let a2 = accepted.fit_id;
    let b = upload_http(
        &app,
        "G-B",
        "1",
        synthetic_csv(&simple_model(1e-6, 0.01, 2e-12), 1e5, 1e9, 401),
    )
    .await;
    let mut d_model = simple_model(1e-5, 0.05, 5e-12);
    d_model.sections.push(Section {
        kind: SectionKind::Series,
        r_ohm: 2.0,
        l_h: 5e-8,
        c_f: 2e-12,
    });
    let d_csv = synthetic_csv(&d_model, 1e4, 1e9, 801);
    let d = c
        .fits
        .upload_sweep(grpc_request(
            upload_message("G-D", "1", d_csv.clone()),
            &app.inspector,
        ))
        .await
        .unwrap()
        .into_inner()
        .fit_id;

    // Act/Assert: the watch stream follows each fit to its terminal status and then ends.
    for id in [a1, a2, b, d] {
        let seen = watch(&mut c, &app.reader, id).await;
        let last = seen.last().expect("at least the current status");
        assert_eq!(state_name(last.state), "succeeded", "fit {id}: {seen:?}");
        assert!(
            seen[..seen.len() - 1]
                .iter()
                .all(|s| ["queued", "running"].contains(&state_name(s.state))),
            "only the last status is terminal: {seen:?}"
        );
        assert!(
            seen.windows(2).all(|w| w[0] != w[1]),
            "only changes are sent"
        );
        let http = app
            .get_json(&format!("/api/v1/fits/{id}"), &app.reader)
            .await;
        assert_eq!(summary_json(last), pick(&http, &SUMMARY_KEYS));
    }
    // The same file, part and options again over gRPC: the existing fit, nothing new stored.
    let again = c
        .fits
        .upload_sweep(grpc_request(
            upload_message("G-D", "1", d_csv),
            &app.engineer,
        ))
        .await
        .unwrap()
        .into_inner();
    assert!(again.duplicate);
    assert_eq!(again.fit_id, d);

    // Approve G-A lot 1 so that drift and approved-only answers are not empty (it fails the DCR limit,
    // so the approval is a deliberate override).
    let r = app
        .post_json(
            &format!("/api/v1/fits/{a1}/approve"),
            &app.engineer,
            &json!({"reason": "first lot", "override": true}),
        )
        .await;
    assert_eq!(r.status(), 200);

    // Fit status and results.
    for id in [a1, a2, b, d] {
        let http = app
            .get_json(&format!("/api/v1/fits/{id}"), &app.reader)
            .await;
        let status = c
            .fits
            .get_fit_status(grpc_request(proto::FitRef { fit_id: id }, &app.reader))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(summary_json(&status), pick(&http, &SUMMARY_KEYS));
        let result = c
            .fits
            .get_fit_result(grpc_request(proto::FitRef { fit_id: id }, &app.reader))
            .await
            .unwrap()
            .into_inner();
        assert_result_equals_detail(&result, &http);
    }
    // Lot 2 is judged (DCR 50 mΩ > 40 mΩ fails) and drifts against the approved lot 1.
    let r2 = c
        .fits
        .get_fit_result(grpc_request(proto::FitRef { fit_id: a2 }, &app.reader))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r2.summary.unwrap().verdict.as_deref(), Some("fail"));
    assert_eq!(r2.drift.as_ref().unwrap().baseline_fit_id, a1);
    assert!(!r2.verdict_checks.is_empty());

    // Fit lists with filters and cursor pages.
    for (query, request) in [
        ("", proto::ListFitsRequest::default()),
        (
            "?part_number=G-A",
            proto::ListFitsRequest {
                part_number: Some("G-A".into()),
                ..Default::default()
            },
        ),
        (
            "?status=succeeded&lot=1",
            proto::ListFitsRequest {
                state: proto::FitState::Succeeded as i32,
                lot: Some("1".into()),
                ..Default::default()
            },
        ),
        (
            "?status=failed",
            proto::ListFitsRequest {
                state: proto::FitState::Failed as i32,
                ..Default::default()
            },
        ),
        (
            "?since=2000-01-01T00:00:00Z&limit=3",
            proto::ListFitsRequest {
                since: Some("2000-01-01T00:00:00Z".into()),
                limit: Some(3),
                ..Default::default()
            },
        ),
    ] {
        let http = app
            .get_json(&format!("/api/v1/fits{query}"), &app.reader)
            .await;
        let page = c
            .fits
            .list_fits(grpc_request(request, &app.reader))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(fit_page_json(&page), http, "fits{query}");
    }
    let mut cursor: Option<String> = None;
    let mut listed = Vec::new();
    loop {
        let q = cursor
            .as_ref()
            .map_or("?limit=1".to_string(), |c| format!("?limit=1&cursor={c}"));
        let http = app.get_json(&format!("/api/v1/fits{q}"), &app.reader).await;
        let page = c
            .fits
            .list_fits(grpc_request(
                proto::ListFitsRequest {
                    limit: Some(1),
                    cursor: cursor.clone(),
                    ..Default::default()
                },
                &app.reader,
            ))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(fit_page_json(&page), http, "fits{q}");
        listed.extend(page.items.iter().map(|f| f.fit_id));
        match page.next_cursor {
            Some(next) => cursor = Some(next),
            None => break,
        }
    }
    assert_eq!(listed, [d, b, a2, a1], "every fit once, newest first");
    let counts = c
        .fits
        .count_fits(grpc_request(proto::CountFitsRequest {}, &app.reader))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        json!({"queued": counts.queued, "running": counts.running, "succeeded": counts.succeeded,
               "failed": counts.failed, "cancelled": counts.cancelled}),
        app.get_json("/api/v1/queue", &app.reader).await
    );
    assert_eq!(counts.succeeded, 4);

    // Exports: the same text and file name as the HTTP downloads.
    for id in [a1, d] {
        for (format, path, ext) in [
            (proto::ExportFormat::SpiceSubcircuit, "netlist.cir", "cir"),
            (proto::ExportFormat::Touchstone1port, "model.s1p", "s1p"),
        ] {
            let (status, disposition, text) = text_of(
                app.get(&format!("/api/v1/fits/{id}/{path}"), &app.reader)
                    .await,
            )
            .await;
            assert_eq!(status, 200);
            let exported = c
                .fits
                .export_fit(grpc_request(
                    proto::ExportFitRequest {
                        fit_id: id,
                        format: format as i32,
                    },
                    &app.reader,
                ))
                .await
                .unwrap()
                .into_inner();
            assert_eq!(exported.text, text, "fit {id} {path}");
            assert_eq!(exported.file_name, format!("fit-{id}.{ext}"));
            assert!(disposition.contains(&exported.file_name), "{disposition}");
        }
    }

    // Behavioural part queries (from the newest fits: only G-A has an approved baseline), and the
    // default answer source, the approved baseline.
    let queries: Vec<(&str, proto::QueryPartsRequest)> = vec![
        ("", proto::QueryPartsRequest::default()),
        (
            "answer_from=latest",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                ..Default::default()
            },
        ),
        (
            "answer_from=latest&srf_min_hz=2e7&srf_max_hz=3e7",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                srf_min_hz: Some(2e7),
                srf_max_hz: Some(3e7),
                ..Default::default()
            },
        ),
        (
            "answer_from=latest&series_resonance_min_hz=3e8&series_resonance_max_hz=8e8",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                series_resonance_min_hz: Some(3e8),
                series_resonance_max_hz: Some(8e8),
                ..Default::default()
            },
        ),
        (
            "answer_from=latest&l_at_hz=1e5&l_min_h=9e-6&l_max_h=1.2e-5",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                l_at_hz: Some(1e5),
                l_min_h: Some(9e-6),
                l_max_h: Some(1.2e-5),
                ..Default::default()
            },
        ),
        (
            "answer_from=latest&dcr_max_ohm=0.02",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                dcr_max_ohm: Some(0.02),
                ..Default::default()
            },
        ),
        (
            "answer_from=latest&z_min_ohm=30&z_band_min_hz=1e6&z_band_max_hz=2e6",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                z_min_ohm: Some(30.0),
                z_band_min_hz: Some(1e6),
                z_band_max_hz: Some(2e6),
                ..Default::default()
            },
        ),
        (
            "approved_only=true&srf_min_hz=1e6",
            proto::QueryPartsRequest {
                approved_only: true,
                srf_min_hz: Some(1e6),
                ..Default::default()
            },
        ),
        (
            "answer_from=latest&q=G-&sort=-rdc_ohm",
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                q: Some("G-".into()),
                sort: Some("-rdc_ohm".into()),
                ..Default::default()
            },
        ),
    ];
    let mut non_empty = 0;
    for (query, request) in queries {
        let http = app
            .get_json(&format!("/api/v1/parts?{query}"), &app.reader)
            .await;
        let page = c
            .parts
            .query_parts(grpc_request(request, &app.reader))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(part_page_json(&page), http, "parts?{query}");
        non_empty += usize::from(!page.items.is_empty());
    }
    assert_eq!(non_empty, 9, "every query above matches at least one part");
    // Sorted by SRF, descending, one per page, following the cursor.
    let mut cursor: Option<String> = None;
    let mut order = Vec::new();
    loop {
        let q = cursor
            .as_ref()
            .map_or("answer_from=latest&sort=-srf_hz&limit=1".to_string(), |c| {
                format!("answer_from=latest&sort=-srf_hz&limit=1&cursor={c}")
            });
        let http = app
            .get_json(&format!("/api/v1/parts?{q}"), &app.reader)
            .await;
        let page = c
            .parts
            .query_parts(grpc_request(
                proto::QueryPartsRequest {
                    answer_from: Some("latest".into()),
                    sort: Some("-srf_hz".into()),
                    limit: Some(1),
                    cursor: cursor.clone(),
                    ..Default::default()
                },
                &app.reader,
            ))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(part_page_json(&page), http, "parts?{q}");
        order.extend(page.items.iter().map(|p| p.part_number.clone()));
        match page.next_cursor {
            Some(next) => cursor = Some(next),
            None => break,
        }
    }
    assert_eq!(order, ["G-B", "G-A", "G-D"]);

    // One part's record.
    for pn in ["G-A", "G-B", "G-D"] {
        let http = app
            .get_json(&format!("/api/v1/parts/{pn}"), &app.reader)
            .await;
        let part = c
            .parts
            .get_part(grpc_request(
                proto::GetPartRequest {
                    part_number: pn.into(),
                },
                &app.reader,
            ))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(part_json(&part), http, "part {pn}");
    }

    // gRPC health reports both services as serving.
    let mut health = tonic_health::pb::health_client::HealthClient::new(app.grpc_channel().await);
    for service in ["henrybook.v1.PartRegistry", "henrybook.v1.FitRegistry"] {
        let h = health
            .check(tonic_health::pb::HealthCheckRequest {
                service: service.into(),
            })
            .await
            .unwrap()
            .into_inner();
        assert_eq!(
            h.status,
            tonic_health::pb::health_check_response::ServingStatus::Serving as i32,
            "{service}"
        );
    }
    app.stop().await;
}

// ---- roles ----

/// Calls every gRPC method once with `token` (None: no metadata; Some(raw): the raw authorization
/// value) and returns each method's name with its outcome code (Ok for success).
async fn call_every_method(
    c: &mut Clients,
    authorization: Option<&str>,
    fits: [i64; 2],
    sweep_id: i64,
    csv: &[u8],
) -> Vec<(&'static str, Code)> {
    let [fit_id, other_fit_id] = fits;
    fn req<T>(m: T, authorization: Option<&str>) -> tonic::Request<T> {
        let mut r = tonic::Request::new(m);
        if let Some(a) = authorization {
            r.metadata_mut().insert("authorization", a.parse().unwrap());
        }
        r
    }
    fn code<T>(r: Result<T, tonic::Status>) -> Code {
        r.map_or_else(|s| s.code(), |_| Code::Ok)
    }
    let f = proto::FitRef { fit_id };
    vec![
        (
            "QueryParts",
            code(
                c.parts
                    .query_parts(req(proto::QueryPartsRequest::default(), authorization))
                    .await,
            ),
        ),
        (
            "GetPart",
            code(
                c.parts
                    .get_part(req(
                        proto::GetPartRequest {
                            part_number: "R-1".into(),
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "GetFitStatus",
            code(c.fits.get_fit_status(req(f, authorization)).await),
        ),
        (
            "ListFits",
            code(
                c.fits
                    .list_fits(req(proto::ListFitsRequest::default(), authorization))
                    .await,
            ),
        ),
        (
            "CountFits",
            code(
                c.fits
                    .count_fits(req(proto::CountFitsRequest {}, authorization))
                    .await,
            ),
        ),
        (
            "WatchFit",
            code(c.fits.watch_fit(req(f, authorization)).await),
        ),
        (
            "GetFitResult",
            code(c.fits.get_fit_result(req(f, authorization)).await),
        ),
        (
            "ExportFit",
            code(
                c.fits
                    .export_fit(req(
                        proto::ExportFitRequest {
                            fit_id,
                            format: proto::ExportFormat::SpiceSubcircuit as i32,
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "UploadSweep",
            code(
                c.fits
                    .upload_sweep(req(upload_message("R-1", "1", csv.to_vec()), authorization))
                    .await,
            ),
        ),
        (
            "CancelFit",
            code(c.fits.cancel_fit(req(f, authorization)).await),
        ),
        (
            "RetryFit",
            code(c.fits.retry_fit(req(f, authorization)).await),
        ),
        (
            "RefitFit",
            code(
                c.fits
                    .refit_fit(req(
                        proto::RefitFitRequest {
                            fit_id,
                            options_json: Some(r#"{"max_sections": 1}"#.into()),
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "ApproveFit",
            code(
                c.fits
                    .approve_fit(req(
                        proto::ApproveFitRequest {
                            fit_id,
                            ..Default::default()
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "RejectFit",
            code(
                c.fits
                    .reject_fit(req(
                        proto::RejectFitRequest {
                            fit_id: other_fit_id,
                            reason: "ringing".into(),
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "GetFitCurves",
            code(c.fits.get_fit_curves(req(f, authorization)).await),
        ),
        (
            "GetSweepFile",
            code(
                c.fits
                    .get_sweep_file(req(proto::SweepRef { sweep_id }, authorization))
                    .await,
            ),
        ),
        (
            "GetFitReport",
            code(
                c.fits
                    .get_fit_report(req(
                        proto::FitReportRequest {
                            fit_id,
                            format: proto::ReportFormat::Html as i32,
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "CreatePart",
            code(
                c.parts
                    .create_part(req(
                        proto::CreatePartRequest {
                            part_number: "R-2".into(),
                            ..Default::default()
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "SetLimits",
            code(
                c.parts
                    .set_limits(req(
                        proto::SetLimitsRequest {
                            part_number: "R-1".into(),
                            limits: None,
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
        (
            "GetPartTrend",
            code(
                c.parts
                    .get_part_trend(req(
                        proto::GetPartRequest {
                            part_number: "R-1".into(),
                        },
                        authorization,
                    ))
                    .await,
            ),
        ),
    ]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_grpc_method_admits_exactly_the_roles_of_its_http_twin() {
    let app = spawn_app().await;
    let mut c = clients(&app).await;
    app.create_part("R-1", json!({})).await;
    let csv = synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 201);
    let fit_id = upload_http(&app, "R-1", "1", csv.clone()).await;
    let other = synthetic_csv(&simple_model(1.1e-5, 0.05, 5e-12), 1e4, 1e8, 201);
    let other_fit_id = upload_http(&app, "R-1", "2", other).await;
    let sweep_id = app.wait_for_fit(fit_id, FIT_TIMEOUT).await["sweep_id"]
        .as_i64()
        .unwrap();
    app.wait_for_fit(other_fit_id, FIT_TIMEOUT).await;
    // The HTTP twins' roles (service/src/http): uploads, cancel and retry need an inspector; refit,
    // approve, reject, creating a part and setting limits an engineer; the rest any token.
    let needs_inspector = ["UploadSweep", "CancelFit", "RetryFit"];
    let needs_engineer = [
        "RefitFit",
        "ApproveFit",
        "RejectFit",
        "CreatePart",
        "SetLimits",
    ];
    // Admitted, these two find a succeeded fit, which can be neither cancelled nor retried; every
    // other admitted call succeeds (each engineer-only call runs once, as the engineer).
    let refused_by_state = ["CancelFit", "RetryFit"];
    let bearer = |t: &str| format!("Bearer {t}");
    let cases: Vec<(&str, Option<String>, Option<u8>)> = vec![
        // (who, authorization, role rank: None = not authenticated)
        ("no token", None, None),
        ("unknown token", Some(bearer("hbk_not-a-token")), None),
        ("not bearer", Some(format!("Basic {}", app.reader)), None),
        ("empty bearer", Some("Bearer ".into()), None),
        ("reader", Some(bearer(&app.reader)), Some(0)),
        ("inspector", Some(bearer(&app.inspector)), Some(1)),
        ("engineer", Some(bearer(&app.engineer)), Some(2)),
    ];
    let mut checked = 0;
    for (who, authorization, rank) in &cases {
        let outcomes = call_every_method(
            &mut c,
            authorization.as_deref(),
            [fit_id, other_fit_id],
            sweep_id,
            &csv,
        )
        .await;
        assert_eq!(outcomes.len(), 20, "every method of the proto is called");
        for (method, code) in outcomes {
            let expected = match rank {
                None => Code::Unauthenticated,
                Some(0) if needs_inspector.contains(&method) => Code::PermissionDenied,
                Some(r) if *r < 2 && needs_engineer.contains(&method) => Code::PermissionDenied,
                Some(_) if refused_by_state.contains(&method) => Code::FailedPrecondition,
                Some(_) => Code::Ok,
            };
            assert_eq!(code, expected, "{method} as {who}");
            checked += 1;
        }
    }
    assert_eq!(checked, 140);
    // The HTTP twin of the one inspector method refuses the reader the same way.
    let form = reqwest::multipart::Form::new().part(
        "file",
        reqwest::multipart::Part::bytes(csv.clone()).file_name("R-1-1.csv"),
    );
    let r = app
        .client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.reader)
        .multipart(form)
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 403);
    // A refused call's message says what is missing, without internals.
    let denied = c
        .fits
        .upload_sweep(grpc_request(
            upload_message("R-1", "1", csv.clone()),
            &app.reader,
        ))
        .await
        .unwrap_err();
    assert_eq!(
        denied.message(),
        "this needs the inspector role; the token has reader"
    );
    app.stop().await;
}

// ---- bad arguments ----

fn assert_invalid(r: Result<impl std::fmt::Debug, tonic::Status>, field: &str) -> tonic::Status {
    let s = r.expect_err("a bad argument is refused");
    assert_eq!(s.code(), Code::InvalidArgument, "{field}: {s:?}");
    assert!(
        s.message().contains(field),
        "the message names {field}: {}",
        s.message()
    );
    s
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_arguments_are_invalid_argument_naming_the_field_and_store_nothing() {
    let app = spawn_app().await;
    let mut c = clients(&app).await;
    app.create_part("B-1", json!({})).await;
    let t = app.reader.clone();

    // Part queries: the same refusals, word for word, as the HTTP problem details.
    for (query, request, field) in [
        (
            "l_min_h=1e-6",
            proto::QueryPartsRequest {
                l_min_h: Some(1e-6),
                ..Default::default()
            },
            "l_at_hz",
        ),
        (
            "z_min_ohm=3",
            proto::QueryPartsRequest {
                z_min_ohm: Some(3.0),
                ..Default::default()
            },
            "z_band_min_hz",
        ),
        (
            "srf_min_hz=-1",
            proto::QueryPartsRequest {
                srf_min_hz: Some(-1.0),
                ..Default::default()
            },
            "srf_min_hz",
        ),
        (
            "sort=colour",
            proto::QueryPartsRequest {
                sort: Some("colour".into()),
                ..Default::default()
            },
            "sort",
        ),
        (
            "cursor=zz",
            proto::QueryPartsRequest {
                cursor: Some("zz".into()),
                ..Default::default()
            },
            "cursor",
        ),
        (
            "limit=0",
            proto::QueryPartsRequest {
                limit: Some(0),
                ..Default::default()
            },
            "limit",
        ),
        (
            "l_at_hz=1",
            proto::QueryPartsRequest {
                l_at_hz: Some(1.0),
                ..Default::default()
            },
            "l_at_hz",
        ),
    ] {
        let s = assert_invalid(c.parts.query_parts(grpc_request(request, &t)).await, field);
        let r = app.get(&format!("/api/v1/parts?{query}"), &t).await;
        assert_eq!(r.status(), 422, "{query}");
        let problem: Value = r.json().await.unwrap();
        assert_eq!(s.message(), problem["detail"], "{query}");
    }
    // A NaN (which HTTP query text cannot carry) is refused too.
    assert_invalid(
        c.parts
            .query_parts(grpc_request(
                proto::QueryPartsRequest {
                    dcr_max_ohm: Some(f64::NAN),
                    ..Default::default()
                },
                &t,
            ))
            .await,
        "dcr_max_ohm",
    );
    assert_invalid(
        c.parts
            .get_part(grpc_request(proto::GetPartRequest::default(), &t))
            .await,
        "part_number",
    );

    // Fit lists: the same refusals as HTTP.
    for (query, request, field) in [
        (
            "since=yesterday",
            proto::ListFitsRequest {
                since: Some("yesterday".into()),
                ..Default::default()
            },
            "since",
        ),
        (
            "limit=600",
            proto::ListFitsRequest {
                limit: Some(600),
                ..Default::default()
            },
            "limit",
        ),
        (
            "cursor=x1",
            proto::ListFitsRequest {
                cursor: Some("x1".into()),
                ..Default::default()
            },
            "cursor",
        ),
        (
            "error_kind=NotAnInductor",
            proto::ListFitsRequest {
                error_kind: Some("NotAnInductor".into()),
                ..Default::default()
            },
            "error_kind",
        ),
        // A name filter is held to the rules of the name (registry::ids), not matched as any text.
        (
            "part_number=B%201",
            proto::ListFitsRequest {
                part_number: Some("B 1".into()),
                ..Default::default()
            },
            "part_number",
        ),
        (
            "lot=a%01b",
            proto::ListFitsRequest {
                lot: Some("a\u{1}b".into()),
                ..Default::default()
            },
            "lot",
        ),
    ] {
        let s = assert_invalid(c.fits.list_fits(grpc_request(request, &t)).await, field);
        let r = app.get(&format!("/api/v1/fits?{query}"), &t).await;
        assert_eq!(r.status(), 422, "{query}");
        let problem: Value = r.json().await.unwrap();
        assert_eq!(s.message(), problem["detail"], "{query}");
    }
    assert_invalid(
        c.fits
            .list_fits(grpc_request(
                proto::ListFitsRequest {
                    state: 99,
                    ..Default::default()
                },
                &t,
            ))
            .await,
        "state",
    );
    // A fit id left unset (0) or negative.
    for id in [0, -3] {
        let f = proto::FitRef { fit_id: id };
        assert_invalid(c.fits.get_fit_status(grpc_request(f, &t)).await, "fit_id");
        assert_invalid(c.fits.get_fit_result(grpc_request(f, &t)).await, "fit_id");
        assert_invalid(c.fits.watch_fit(grpc_request(f, &t)).await, "fit_id");
    }
    assert_invalid(
        c.fits
            .export_fit(grpc_request(
                proto::ExportFitRequest {
                    fit_id: 1,
                    format: proto::ExportFormat::Unspecified as i32,
                },
                &t,
            ))
            .await,
        "format",
    );

    // Unknown things are NOT_FOUND, as HTTP's 404.
    fn not_found<T>(r: Result<tonic::Response<T>, tonic::Status>) {
        let s = r.map(|_| ()).unwrap_err();
        assert_eq!(s.code(), Code::NotFound, "{s:?}");
    }
    let gone = proto::FitRef { fit_id: 987_654 };
    not_found(c.fits.get_fit_status(grpc_request(gone, &t)).await);
    not_found(c.fits.get_fit_result(grpc_request(gone, &t)).await);
    not_found(c.fits.watch_fit(grpc_request(gone, &t)).await);
    not_found(
        c.parts
            .get_part(grpc_request(
                proto::GetPartRequest {
                    part_number: "NO-SUCH-PART".into(),
                },
                &t,
            ))
            .await,
    );
    assert_eq!(
        app.get("/api/v1/parts/NO-SUCH-PART", &t).await.status(),
        404
    );

    // Uploads: each bad field is refused and nothing is stored.
    let good = synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 201);
    let base = upload_message("B-1", "1", good.clone());
    let bad_uploads: Vec<(proto::UploadSweepRequest, &str)> = vec![
        (
            proto::UploadSweepRequest {
                part_number: "".into(),
                ..base.clone()
            },
            "part_number",
        ),
        (
            proto::UploadSweepRequest {
                part_number: "bad part\tnumber".into(),
                ..base.clone()
            },
            "part_number",
        ),
        (
            proto::UploadSweepRequest {
                lot: " ".into(),
                ..base.clone()
            },
            "lot",
        ),
        (
            proto::UploadSweepRequest {
                file_name: "".into(),
                ..base.clone()
            },
            "file name",
        ),
        (
            proto::UploadSweepRequest {
                method: Some("sideways".into()),
                ..base.clone()
            },
            "method",
        ),
        (
            proto::UploadSweepRequest {
                z0_ohm: Some(-50.0),
                ..base.clone()
            },
            "z0_ohm",
        ),
        (
            proto::UploadSweepRequest {
                dcr_ohm: Some(f64::INFINITY),
                ..base.clone()
            },
            "dcr_ohm",
        ),
        (
            proto::UploadSweepRequest {
                temperature_c: Some(f64::NAN),
                ..base.clone()
            },
            "temperature_c",
        ),
        (
            proto::UploadSweepRequest {
                temperature_c: Some(-300.0),
                ..base.clone()
            },
            "temperature_c",
        ),
        (
            proto::UploadSweepRequest {
                options_json: Some(r#"{"max_sections": 1, "colour": "red"}"#.into()),
                ..base.clone()
            },
            "colour",
        ),
        (
            proto::UploadSweepRequest {
                options_json: Some("{not json".into()),
                ..base.clone()
            },
            "options",
        ),
        // Options are checked against their ranges before anything is stored, not when the fit runs.
        (
            proto::UploadSweepRequest {
                options_json: Some(r#"{"max_sections": 99}"#.into()),
                ..base.clone()
            },
            "max_sections",
        ),
        (
            proto::UploadSweepRequest {
                options_json: Some(r#"{"time_limit_s": 1e300}"#.into()),
                ..base.clone()
            },
            "time_limit_s",
        ),
        (
            proto::UploadSweepRequest {
                options_json: Some(r#"{"family": "rational", "rational_order": 2000}"#.into()),
                ..base.clone()
            },
            "rational_order",
        ),
        (
            proto::UploadSweepRequest {
                dcr_ohm: Some(1e300),
                ..base.clone()
            },
            "dcr_ohm",
        ),
        (
            proto::UploadSweepRequest {
                file: Vec::new(),
                ..base.clone()
            },
            "B-1-1.csv",
        ),
    ];
    for (request, field) in bad_uploads {
        assert_invalid(
            c.fits
                .upload_sweep(grpc_request(request, &app.inspector))
                .await,
            field,
        );
    }
    // A file the reader refuses: the file name in the message, its line in `henrybook-line`.
    let mut broken = String::from_utf8(good.clone()).unwrap();
    broken.push_str("1.5e8,abc,1.0,0.1\n");
    let lines = broken.lines().count();
    let s = assert_invalid(
        c.fits
            .upload_sweep(grpc_request(
                proto::UploadSweepRequest {
                    file: broken.into_bytes(),
                    ..base.clone()
                },
                &app.inspector,
            ))
            .await,
        "B-1-1.csv",
    );
    assert_eq!(
        s.metadata()
            .get("henrybook-line")
            .map(|v| v.to_str().unwrap().to_string()),
        Some(lines.to_string()),
        "{s:?}"
    );
    // An unknown part is refused as over HTTP (an upload creates no part).
    let s = assert_invalid(
        c.fits
            .upload_sweep(grpc_request(
                proto::UploadSweepRequest {
                    part_number: "B-404".into(),
                    ..base.clone()
                },
                &app.inspector,
            ))
            .await,
        "B-404",
    );
    let r = app
        .upload(
            "B-404-1.csv",
            good.clone(),
            &[("part_number", "B-404"), ("lot", "1"), ("method", "direct")],
        )
        .await;
    assert_eq!(r.status(), 422);
    let problem: Value = r.json().await.unwrap();
    assert_eq!(s.message(), problem["detail"]);
    // Nothing of the above was stored.
    let counts = app.get_json("/api/v1/queue", &t).await;
    assert_eq!(
        counts,
        json!({"queued": 0, "running": 0, "succeeded": 0, "failed": 0, "cancelled": 0})
    );
    let fits = app.get_json("/api/v1/fits", &t).await;
    assert_eq!(fits["items"], json!([]));

    // An export before the fit succeeded is FAILED_PRECONDITION (HTTP: 409), not an internal error.
    let up = c
        .fits
        .upload_sweep(grpc_request(base.clone(), &app.inspector))
        .await
        .unwrap()
        .into_inner();
    let early = c
        .fits
        .export_fit(grpc_request(
            proto::ExportFitRequest {
                fit_id: up.fit_id,
                format: proto::ExportFormat::SpiceSubcircuit as i32,
            },
            &t,
        ))
        .await;
    let http = app
        .get(&format!("/api/v1/fits/{}/netlist.cir", up.fit_id), &t)
        .await
        .status()
        .as_u16();
    match early {
        // The fit may already have finished on a fast machine: then both answer with the text.
        Ok(_) => assert_eq!(http, 200),
        Err(s) => {
            assert_eq!(s.code(), Code::FailedPrecondition, "{s:?}");
            assert!(s.message().contains("has not succeeded"), "{s:?}");
        }
    }
    app.stop().await;
}

// ---- the watch stream against cancellation and shutdown ----

/// The real engine, holding each fit back for `delay` first (and honouring cancellation meanwhile).
struct SlowEngine {
    delay: Duration,
}

impl Engine for SlowEngine {
    fn read_sweep(&self, name: &str, bytes: &[u8], o: &ReadOptions) -> Result<Sweep, SweepError> {
        CoreEngine.read_sweep(name, bytes, o)
    }
    fn fit(&self, s: &Sweep, o: &FitOptions, c: &FitControl) -> Result<FitReport, FitError> {
        let start = Instant::now();
        while start.elapsed() < self.delay {
            if c.cancel.as_ref().is_some_and(|f| f.load(Ordering::SeqCst)) {
                return Err(FitError::Cancelled);
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        CoreEngine.fit(s, o, c)
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_watch_ends_with_a_cancelled_fit_and_with_unavailable_when_the_service_stops() {
    let db = TestDatabase::new().await;
    let settings = db.settings();
    let engine = Arc::new(SlowEngine {
        delay: Duration::from_secs(4),
    });
    let app = spawn_app_with(db, settings, engine, None).await;
    let mut c = clients(&app).await;
    app.create_part("W-1", json!({})).await;
    let model = simple_model(1e-5, 0.05, 5e-12);

    // Cancelled over HTTP while watched over gRPC: the stream's last status is cancelled.
    let f1 = upload_http(&app, "W-1", "1", synthetic_csv(&model, 1e4, 1e8, 201)).await;
    let mut stream = c
        .fits
        .watch_fit(grpc_request(proto::FitRef { fit_id: f1 }, &app.reader))
        .await
        .unwrap()
        .into_inner();
    let first = stream.message().await.unwrap().expect("the current status");
    assert!(
        ["queued", "running"].contains(&state_name(first.state)),
        "{first:?}"
    );
    let r = app
        .post_json(
            &format!("/api/v1/fits/{f1}/cancel"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let mut last = first;
    while let Some(s) = tokio::time::timeout(Duration::from_secs(20), stream.message())
        .await
        .expect("the stream moves on")
        .expect("no error")
    {
        last = s;
    }
    assert_eq!(state_name(last.state), "cancelled", "{last:?}");

    // Still watched when the service stops: the stream ends with UNAVAILABLE, the stop completes.
    let f2 = upload_http(&app, "W-1", "2", synthetic_csv(&model, 1e4, 1e8, 203)).await;
    let mut stream = c
        .fits
        .watch_fit(grpc_request(proto::FitRef { fit_id: f2 }, &app.reader))
        .await
        .unwrap()
        .into_inner();
    let first = stream.message().await.unwrap().expect("the current status");
    assert!(["queued", "running"].contains(&state_name(first.state)));
    let stopping = tokio::spawn(app.stop());
    let end = tokio::time::timeout(Duration::from_secs(20), async {
        loop {
            match stream.message().await {
                Ok(Some(_)) => continue,
                Ok(None) => return None,
                Err(s) => return Some(s),
            }
        }
    })
    .await
    .expect("the stream ends at shutdown");
    assert_eq!(end.map(|s| s.code()), Some(Code::Unavailable));
    tokio::time::timeout(Duration::from_secs(30), stopping)
        .await
        .expect("the service stops")
        .expect("the stop task");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_sweep_the_fit_refuses_fails_with_its_kind_over_both_transports() {
    // Arrange: a 100 nF capacitor with 20 mΩ ESR, 1 kHz to 10 MHz (invented for this test): Im Z is
    // negative from the first point, so the fit refuses it as not an inductor.
    let app = spawn_app().await;
    let mut c = clients(&app).await;
    app.create_part("K-1", json!({})).await;
    let mut csv = String::from("frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm\n");
    for i in 0..101 {
        let f = 1e3 * 1e4f64.powf(i as f64 / 100.0);
        let x = -1.0 / (2.0 * std::f64::consts::PI * f * 100e-9);
        csv.push_str(&format!("{f:e},0.02,{x:e},{:e}\n", 2e-3 * x.abs()));
    }
    let capacitor = upload_http(&app, "K-1", "1", csv.into_bytes()).await;
    let good = upload_http(
        &app,
        "K-1",
        "2",
        synthetic_csv(&simple_model(1e-5, 0.05, 5e-12), 1e4, 1e8, 201),
    )
    .await;

    // Act
    let failed = app.wait_for_fit(capacitor, FIT_TIMEOUT).await;
    let fitted = app.wait_for_fit(good, FIT_TIMEOUT).await;
    let over_grpc = c
        .fits
        .get_fit_result(grpc_request(
            proto::FitRef { fit_id: capacitor },
            &app.reader,
        ))
        .await
        .unwrap()
        .into_inner();

    // Assert: the kind next to the message, the same over gRPC, and only failures carry one.
    assert_eq!(failed["status"], "failed", "{failed}");
    assert_eq!(failed["error_kind"], "not_an_inductor", "{failed}");
    assert!(
        failed["error"].as_str().unwrap().contains("capacitive"),
        "{failed}"
    );
    assert_result_equals_detail(&over_grpc, &failed);
    assert_eq!(fitted["status"], "succeeded", "{fitted}");
    assert_eq!(fitted["error_kind"], Value::Null, "{fitted}");
    for (kind, expected) in [
        ("not_an_inductor", vec![capacitor]),
        ("too_few_points", vec![]),
    ] {
        let http = app
            .get_json(&format!("/api/v1/fits?error_kind={kind}"), &app.reader)
            .await;
        let page = c
            .fits
            .list_fits(grpc_request(
                proto::ListFitsRequest {
                    error_kind: Some(kind.into()),
                    ..Default::default()
                },
                &app.reader,
            ))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(fit_page_json(&page), http, "error_kind={kind}");
        let ids: Vec<i64> = page.items.iter().map(|f| f.fit_id).collect();
        assert_eq!(ids, expected, "error_kind={kind}");
    }
    app.stop().await;
}

// ---- the layers ----

/// The Rust files under `dir`, recursively.
fn rust_files(dir: &std::path::Path) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir).expect("a source directory") {
        let path = entry.expect("a directory entry").path();
        if path.is_dir() {
            out.extend(rust_files(&path));
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
    out
}

#[test]
fn the_transports_never_import_each_other_and_nothing_else_imports_them() {
    // Both transports call `ops`; neither may reach into the other, and no module besides the one
    // that assembles the server (app.rs) may reach into either. Comments are left out (doc links
    // may name a transport).
    let src = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../service/src");
    let path_to = |transport: &str| {
        [
            format!("crate::{transport}"),
            format!("super::super::{transport}"),
            format!("henrybook::{transport}"),
        ]
    };
    let mut offences = Vec::new();
    let files = rust_files(&src);
    assert!(files.len() > 40, "the service's sources are found");
    for file in files {
        let relative = file
            .strip_prefix(&src)
            .unwrap()
            .to_string_lossy()
            .to_string();
        let forbidden: Vec<String> = if relative.starts_with("http/") {
            path_to("grpc").to_vec()
        } else if relative.starts_with("grpc/") {
            path_to("http").to_vec()
        } else if relative == "app.rs" || relative == "lib.rs" {
            Vec::new()
        } else {
            [path_to("http"), path_to("grpc")].concat()
        };
        let text = std::fs::read_to_string(&file).unwrap();
        for (n, line) in text.lines().enumerate() {
            if line.trim_start().starts_with("//") {
                continue;
            }
            for f in &forbidden {
                if line.contains(f.as_str()) {
                    offences.push(format!("{relative}:{}: {}", n + 1, line.trim()));
                }
            }
        }
    }
    assert!(
        offences.is_empty(),
        "imports across the layers:\n{}",
        offences.join("\n")
    );
}

// ---- the operations gRPC gained: the same answers as HTTP ----

/// A refusal over gRPC against the HTTP refusal of the same request: the kind (status code) and the
/// detail, word for word.
async fn assert_same_refusal<T: std::fmt::Debug>(
    grpc: Result<tonic::Response<T>, tonic::Status>,
    http: reqwest::Response,
    what: &str,
) {
    let s = grpc.expect_err(what);
    let code = match http.status().as_u16() {
        401 => Code::Unauthenticated,
        403 => Code::PermissionDenied,
        404 => Code::NotFound,
        409 => Code::FailedPrecondition,
        422 => Code::InvalidArgument,
        429 => Code::ResourceExhausted,
        503 => Code::Unavailable,
        other => panic!("{what}: HTTP answered {other}"),
    };
    assert_eq!(s.code(), code, "{what}: {s:?}");
    let problem: Value = http.json().await.unwrap();
    assert_eq!(s.message(), problem["detail"], "{what}");
}

fn proto_limits(l: &Value) -> proto::Limits {
    let get = |k: &str| l.get(k).and_then(Value::as_f64);
    proto::Limits {
        l_nominal_h: get("l_nominal_h"),
        l_test_frequency_hz: get("l_test_frequency_hz"),
        l_tolerance_percent: get("l_tolerance_percent"),
        dcr_max_ohm: get("dcr_max_ohm"),
        srf_min_hz: get("srf_min_hz"),
        ..Default::default()
    }
}

fn trend_json(t: &proto::PartTrend) -> Value {
    norm(json!({
        "part_number": t.part_number,
        "lots": t.lots.iter().map(|l| json!({
            "lot": l.lot, "fit_id": l.fit_id, "approved": l.approved, "quality": l.quality,
            "uploaded_at": l.uploaded_at,
        })).collect::<Vec<_>>(),
        "run_length": t.run_length,
        "figures": t.figures.iter().map(|f| json!({
            "figure": f.figure, "label": f.label, "unit": f.unit, "limit_low": f.limit_low,
            "limit_high": f.limit_high, "centre": f.centre, "sigma": f.sigma,
            "control_low": f.control_low, "control_high": f.control_high,
            "approved_lots": f.approved_lots, "control_note": f.control_note,
            "points": f.points.iter().map(|p| json!({
                "lot_index": p.lot_index, "value": p.value, "outside_limits": p.outside_limits,
                "out_of_control": p.out_of_control, "in_run": p.in_run,
                "beyond_2_sigma_2_of_3": p.beyond_2_sigma_2_of_3,
                "beyond_1_sigma_4_of_5": p.beyond_1_sigma_4_of_5,
            })).collect::<Vec<_>>(),
        })).collect::<Vec<_>>(),
    }))
}

fn curves_json(c: &proto::FitCurves) -> Value {
    norm(json!({
        "frequency_hz": c.frequency_hz, "measured_z_real_ohm": c.measured_z_real_ohm,
        "measured_z_imag_ohm": c.measured_z_imag_ohm, "sigma_ohm": c.sigma_ohm,
        "model_z_real_ohm": c.model_z_real_ohm, "model_z_imag_ohm": c.model_z_imag_ohm,
    }))
}

/// An L-shaped fixture (invented values): series 50 mΩ + jω·5 nH, stray jω·2 pF across the part;
/// returns the DUT measured through it, the open and the short as impedance CSV (σ = 0.2 % of |Z|).
/// Measured through it, Zxm = Zs + 1/(Yo + 1/Zdut) (common practice, no source).
fn through_fixture() -> [Vec<u8>; 3] {
    use henrybook::model::ImpedanceModel;
    use num_complex::Complex64;
    let two_pi = 2.0 * std::f64::consts::PI;
    let zs = |f: f64| Complex64::new(0.05, two_pi * f * 5e-9);
    let yo = |f: f64| Complex64::new(0.0, two_pi * f * 2e-12);
    let dut = simple_model(1e-5, 0.05, 5e-12);
    let csv = |z: &dyn Fn(f64) -> Complex64| {
        let mut out = String::from("frequency_hz,z_real_ohm,z_imag_ohm,sigma_ohm\n");
        for i in 0..301 {
            let f = 1e3 * 1e5f64.powf(i as f64 / 300.0);
            let v = z(f);
            out.push_str(&format!(
                "{f:.9e},{:.12e},{:.12e},{:.6e}\n",
                v.re,
                v.im,
                2e-3 * v.norm()
            ));
        }
        out.into_bytes()
    };
    [
        csv(&|f| zs(f) + (yo(f) + dut.impedance(f).inv()).inv()),
        csv(&|f| zs(f) + yo(f).inv()),
        csv(&zs),
    ]
}

fn named(name: &str, content: &[u8]) -> Option<proto::NamedFile> {
    Some(proto::NamedFile {
        file_name: name.into(),
        content: content.to_vec(),
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_operation_http_offers_answers_the_same_over_grpc() {
    // Arrange: a part created over each transport with the same fields.
    let app = spawn_app().await;
    let mut c = clients(&app).await;
    let (e, r) = (app.engineer.clone(), app.reader.clone());
    let limits = json!({"l_nominal_h": 1e-5, "l_test_frequency_hz": 1e5, "l_tolerance_percent": 20,
                        "srf_min_hz": 1.5e7});
    let created = app
        .post_json(
            "/api/v1/parts",
            &e,
            &json!({"part_number": "Q-H", "description": " coil ", "limits": limits}),
        )
        .await;
    assert_eq!(created.status(), 201);
    let created: Value = created.json().await.unwrap();
    let create = |pn: &str, description: &str, limits: &Value| proto::CreatePartRequest {
        part_number: pn.into(),
        description: description.into(),
        limits: Some(proto_limits(limits)),
    };
    let part = c
        .parts
        .create_part(grpc_request(create("Q-G", " coil ", &limits), &e))
        .await
        .expect("a part is created over gRPC")
        .into_inner();
    let part = part_json(&part);
    for key in ["description", "limits", "lots", "fits", "baseline_fit_id"] {
        assert_eq!(part[key], created[key], "created part: {key}");
    }
    assert_eq!(part, app.get_json("/api/v1/parts/Q-G", &r).await);

    // Refusals of parts and limits: the same kind and detail.
    for (pn, description, what) in [
        ("Q-H", "", "an existing part"),
        ("bad part", "", "a bad part number"),
        ("Q-X", &"d".repeat(501)[..], "a long description"),
    ] {
        let http = app
            .post_json(
                "/api/v1/parts",
                &e,
                &json!({"part_number": pn, "description": description}),
            )
            .await;
        let grpc = c
            .parts
            .create_part(grpc_request(create(pn, description, &json!({})), &e))
            .await;
        assert_same_refusal(grpc, http, what).await;
    }
    let set = |pn: &str, limits: &Value| proto::SetLimitsRequest {
        part_number: pn.into(),
        limits: Some(proto_limits(limits)),
    };
    for (pn, l, what) in [
        ("Q-H", json!({"l_nominal_h": -1.0}), "a negative limit"),
        ("Q-NONE", json!({}), "an unknown part"),
    ] {
        let http = app
            .put_json(
                &format!("/api/v1/parts/{pn}/limits"),
                &e,
                &json!({"limits": l}),
            )
            .await;
        let grpc = c.parts.set_limits(grpc_request(set(pn, &l), &e)).await;
        assert_same_refusal(grpc, http, what).await;
    }
    // Limits set over each transport read back the same.
    let tighter = json!({"l_nominal_h": 1e-5, "l_test_frequency_hz": 1e5, "l_tolerance_percent": 20,
                         "srf_min_hz": 1.5e7, "dcr_max_ohm": 0.04});
    let http = app
        .put_json("/api/v1/parts/Q-H/limits", &e, &json!({"limits": tighter}))
        .await;
    assert_eq!(http.status(), 200);
    let http: Value = http.json().await.unwrap();
    let grpc = c
        .parts
        .set_limits(grpc_request(set("Q-G", &tighter), &e))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(part_json(&grpc)["limits"], http["limits"]);

    // Uploads with fixture files: over HTTP to Q-H, over gRPC to Q-G, the same files.
    let [dut, open, short] = through_fixture();
    let form = reqwest::multipart::Form::new()
        .part(
            "file",
            reqwest::multipart::Part::bytes(dut.clone()).file_name("dut.csv"),
        )
        .part(
            "fixture_open",
            reqwest::multipart::Part::bytes(open.clone()).file_name("open.csv"),
        )
        .part(
            "fixture_short",
            reqwest::multipart::Part::bytes(short.clone()).file_name("short.csv"),
        )
        .text("part_number", "Q-H")
        .text("lot", "1")
        .text("method", "direct");
    let http = app
        .client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.inspector)
        .multipart(form)
        .send()
        .await
        .unwrap();
    assert_eq!(http.status(), 202);
    let h_fit = http.json::<Value>().await.unwrap()["fit_id"]
        .as_i64()
        .unwrap();
    let with_fixture = proto::UploadSweepRequest {
        file_name: "dut.csv".into(),
        fixture_open: named("open.csv", &open),
        fixture_short: named("short.csv", &short),
        ..upload_message("Q-G", "1", dut.clone())
    };
    // Only one fixture file: refused as over HTTP, nothing stored.
    let one = proto::UploadSweepRequest {
        fixture_short: None,
        ..with_fixture.clone()
    };
    let form = reqwest::multipart::Form::new()
        .part(
            "file",
            reqwest::multipart::Part::bytes(dut.clone()).file_name("dut.csv"),
        )
        .part(
            "fixture_open",
            reqwest::multipart::Part::bytes(open.clone()).file_name("open.csv"),
        )
        .text("part_number", "Q-G")
        .text("lot", "1")
        .text("method", "direct");
    let http = app
        .client
        .post(app.url("/api/v1/sweeps"))
        .bearer_auth(&app.inspector)
        .multipart(form)
        .send()
        .await
        .unwrap();
    let grpc = c.fits.upload_sweep(grpc_request(one, &app.inspector)).await;
    assert_same_refusal(grpc, http, "one fixture file").await;
    let accepted = c
        .fits
        .upload_sweep(grpc_request(with_fixture, &app.inspector))
        .await
        .expect("an upload with fixture files is accepted over gRPC")
        .into_inner();
    let g_fit = accepted.fit_id;
    let h_detail = app.wait_for_fit(h_fit, FIT_TIMEOUT).await;
    let g_detail = app.wait_for_fit(g_fit, FIT_TIMEOUT).await;
    assert_eq!(g_detail["status"], "succeeded", "{g_detail}");
    assert_eq!(g_detail["sweep_id"], json!(accepted.sweep_id));

    // Curves: the same over both transports, and the fixture corrected the gRPC upload exactly as
    // the HTTP one (the same files give the same measured impedance).
    let g_curves = c
        .fits
        .get_fit_curves(grpc_request(proto::FitRef { fit_id: g_fit }, &r))
        .await
        .unwrap()
        .into_inner();
    let g_curves = curves_json(&g_curves);
    assert_eq!(
        g_curves,
        app.get_json(&format!("/api/v1/fits/{g_fit}/curves"), &r)
            .await
    );
    let h_curves = app
        .get_json(&format!("/api/v1/fits/{h_fit}/curves"), &r)
        .await;
    for key in [
        "frequency_hz",
        "measured_z_real_ohm",
        "measured_z_imag_ohm",
        "sigma_ohm",
    ] {
        assert_eq!(g_curves[key], h_curves[key], "{key}");
    }
    assert_eq!(h_detail["options"], g_detail["options"]);

    // The original file, byte for byte, with the name HTTP offers.
    let sweep_id = accepted.sweep_id;
    let file = c
        .fits
        .get_sweep_file(grpc_request(proto::SweepRef { sweep_id }, &r))
        .await
        .unwrap()
        .into_inner();
    let http = app
        .get(&format!("/api/v1/sweeps/{sweep_id}/file"), &r)
        .await;
    let disposition = http.headers()["content-disposition"]
        .to_str()
        .unwrap()
        .to_string();
    assert_eq!(http.bytes().await.unwrap().to_vec(), file.content);
    assert_eq!(file.content, dut);
    assert_eq!(
        disposition,
        format!("attachment; filename=\"{}\"", file.file_name)
    );
    let http = app.get("/api/v1/sweeps/987654/file", &r).await;
    let grpc = c
        .fits
        .get_sweep_file(grpc_request(proto::SweepRef { sweep_id: 987_654 }, &r))
        .await;
    assert_same_refusal(grpc, http, "an unknown sweep").await;

    // The model as JSON.
    let exported = c
        .fits
        .export_fit(grpc_request(
            proto::ExportFitRequest {
                fit_id: g_fit,
                format: proto::ExportFormat::ModelJson as i32,
            },
            &r,
        ))
        .await
        .unwrap()
        .into_inner();
    let http = app
        .get(&format!("/api/v1/fits/{g_fit}/model.json"), &r)
        .await;
    assert!(
        http.headers()["content-disposition"]
            .to_str()
            .unwrap()
            .contains(&exported.file_name)
    );
    let http: Value = http.json().await.unwrap();
    let grpc: Value = serde_json::from_str(&exported.text).unwrap();
    assert_eq!(grpc, http);

    // The report: the same kind of document under the same name.
    let pdf = c
        .fits
        .get_fit_report(grpc_request(
            proto::FitReportRequest {
                fit_id: g_fit,
                format: proto::ReportFormat::Pdf as i32,
            },
            &r,
        ))
        .await
        .unwrap()
        .into_inner();
    let http = app
        .get(&format!("/api/v1/fits/{g_fit}/report.pdf"), &r)
        .await;
    assert_eq!(http.headers()["content-type"], pdf.content_type.as_str());
    assert_eq!(
        http.headers()["content-disposition"].to_str().unwrap(),
        format!("attachment; filename=\"{}\"", pdf.file_name.unwrap())
    );
    assert!(pdf.content.starts_with(b"%PDF"));
    let html = c
        .fits
        .get_fit_report(grpc_request(
            proto::FitReportRequest {
                fit_id: g_fit,
                format: proto::ReportFormat::Html as i32,
            },
            &r,
        ))
        .await
        .unwrap()
        .into_inner();
    let http = app.get(&format!("/api/v1/fits/{g_fit}/report"), &r).await;
    assert_eq!(http.headers()["content-type"], html.content_type.as_str());
    assert!(String::from_utf8(html.content).unwrap().contains("Q-G"));

    // Approval: refused the same way (the fit fails DCR 50 mΩ > 40 mΩ; a blank reason), then
    // approved with an override; the answer is the fit's detail.
    let approve = |reason: Option<&str>, overriding: bool| proto::ApproveFitRequest {
        fit_id: g_fit,
        reason: reason.map(str::to_string),
        overriding,
    };
    for (reason, overriding, body, what) in [
        (None, false, json!({}), "a failing fit"),
        (
            Some("  "),
            true,
            json!({"reason": "  ", "override": true}),
            "a blank reason",
        ),
    ] {
        let grpc = c
            .fits
            .approve_fit(grpc_request(approve(reason, overriding), &e))
            .await;
        let http = app
            .post_json(&format!("/api/v1/fits/{g_fit}/approve"), &e, &body)
            .await;
        assert_same_refusal(grpc, http, what).await;
    }
    let approved = c
        .fits
        .approve_fit(grpc_request(approve(Some("first lot"), true), &e))
        .await
        .unwrap()
        .into_inner();
    let http = app.get_json(&format!("/api/v1/fits/{g_fit}"), &r).await;
    assert_eq!(http["approval"], "approved");
    assert_result_equals_detail(&approved, &http);

    // Cancel and retry of a succeeded fit: refused the same way.
    let f = proto::FitRef { fit_id: g_fit };
    let grpc = c.fits.cancel_fit(grpc_request(f, &app.inspector)).await;
    let http = app
        .post_json(
            &format!("/api/v1/fits/{g_fit}/cancel"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_same_refusal(grpc, http, "cancel a succeeded fit").await;
    let grpc = c.fits.retry_fit(grpc_request(f, &app.inspector)).await;
    let http = app
        .post_json(
            &format!("/api/v1/fits/{g_fit}/retry"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_same_refusal(grpc, http, "retry a succeeded fit").await;

    // Refit: bad options refused the same way; a new revision over each transport.
    let refit = |options: &str| proto::RefitFitRequest {
        fit_id: g_fit,
        options_json: Some(options.into()),
    };
    let grpc = c
        .fits
        .refit_fit(grpc_request(refit(r#"{"colour": 1}"#), &e))
        .await;
    let http = app
        .post_json(
            &format!("/api/v1/fits/{g_fit}/refit"),
            &e,
            &json!({"options": {"colour": 1}}),
        )
        .await;
    assert_same_refusal(grpc, http, "unknown options").await;
    let g_new = c
        .fits
        .refit_fit(grpc_request(refit(r#"{"max_sections": 1}"#), &e))
        .await
        .unwrap()
        .into_inner()
        .fit_id;
    let http = app
        .post_json(
            &format!("/api/v1/fits/{h_fit}/refit"),
            &e,
            &json!({"options": {"max_sections": 1}}),
        )
        .await;
    assert_eq!(http.status(), 202);
    let h_new = http.json::<Value>().await.unwrap()["fit_id"]
        .as_i64()
        .unwrap();
    let g_new_detail = app.wait_for_fit(g_new, FIT_TIMEOUT).await;
    let h_new_detail = app.wait_for_fit(h_new, FIT_TIMEOUT).await;
    assert_eq!(g_new_detail["revision"], 2);
    assert_eq!(g_new_detail["options"], h_new_detail["options"]);
    assert_eq!(g_new_detail["options"]["max_sections"], 1);

    // Rejection: a blank reason refused the same way, then rejected with one.
    let reject = |reason: &str| proto::RejectFitRequest {
        fit_id: g_new,
        reason: reason.into(),
    };
    let grpc = c.fits.reject_fit(grpc_request(reject(" "), &e)).await;
    let http = app
        .post_json(
            &format!("/api/v1/fits/{g_new}/reject"),
            &e,
            &json!({"reason": " "}),
        )
        .await;
    assert_same_refusal(grpc, http, "a blank rejection").await;
    let rejected = c
        .fits
        .reject_fit(grpc_request(reject("ringing above 20 MHz"), &e))
        .await
        .unwrap()
        .into_inner();
    let http = app.get_json(&format!("/api/v1/fits/{g_new}"), &r).await;
    assert_eq!(http["approval"], "rejected");
    assert_result_equals_detail(&rejected, &http);

    // The trend across lots and the part's record after all of it.
    for pn in ["Q-G", "Q-H"] {
        let trend = c
            .parts
            .get_part_trend(grpc_request(
                proto::GetPartRequest {
                    part_number: pn.into(),
                },
                &r,
            ))
            .await
            .unwrap()
            .into_inner();
        assert!(!trend.figures.is_empty());
        assert_eq!(
            trend_json(&trend),
            app.get_json(&format!("/api/v1/parts/{pn}/trend"), &r).await,
            "trend of {pn}"
        );
    }
    let part = c
        .parts
        .get_part(grpc_request(
            proto::GetPartRequest {
                part_number: "Q-G".into(),
            },
            &r,
        ))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        part_json(&part),
        app.get_json("/api/v1/parts/Q-G", &r).await
    );
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_fit_cancelled_and_retried_over_grpc_ends_as_over_http() {
    // Arrange: fits held back for a while, so each is still queued or running when cancelled.
    let db = TestDatabase::new().await;
    let settings = db.settings();
    let engine = Arc::new(SlowEngine {
        delay: Duration::from_secs(4),
    });
    let app = spawn_app_with(db, settings, engine, None).await;
    let mut c = clients(&app).await;
    app.create_part("C-1", json!({})).await;
    let model = simple_model(1e-5, 0.05, 5e-12);
    let over_grpc = upload_http(&app, "C-1", "1", synthetic_csv(&model, 1e4, 1e8, 201)).await;
    let over_http = upload_http(&app, "C-1", "2", synthetic_csv(&model, 1e4, 1e8, 203)).await;

    // Act: cancel one over each transport; each answer is the fit's status then.
    let f = proto::FitRef { fit_id: over_grpc };
    let answer = c
        .fits
        .cancel_fit(grpc_request(f, &app.inspector))
        .await
        .expect("a queued or running fit can be cancelled")
        .into_inner();
    assert_eq!(answer.fit_id, over_grpc);
    assert!(
        ["cancelled", "running"].contains(&state_name(answer.state)),
        "{answer:?}"
    );
    let r = app
        .post_json(
            &format!("/api/v1/fits/{over_http}/cancel"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200);

    // Assert: both end cancelled with the same kind. (The message tells a queued fit cancelled at once
    // from a running one stopped by its worker, whichever transport asked, so it is not compared.)
    let a = app.wait_for_fit(over_grpc, FIT_TIMEOUT).await;
    let b = app.wait_for_fit(over_http, FIT_TIMEOUT).await;
    for key in ["status", "error_kind"] {
        assert_eq!(a[key], b[key], "{key}: {a} vs {b}");
    }
    assert_eq!(a["status"], "cancelled");

    // Retried over each transport: both are queued again (or already running).
    let answer = c
        .fits
        .retry_fit(grpc_request(f, &app.inspector))
        .await
        .expect("a cancelled fit can be retried")
        .into_inner();
    assert!(
        ["queued", "running"].contains(&state_name(answer.state)),
        "{answer:?}"
    );
    let r = app
        .post_json(
            &format!("/api/v1/fits/{over_http}/retry"),
            &app.inspector,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200);
    let http: Value = r.json().await.unwrap();
    assert!(
        ["queued", "running"].contains(&http["status"].as_str().unwrap()),
        "{http}"
    );
    // And they are fitted this time.
    for id in [over_grpc, over_http] {
        let done = app.wait_for_fit(id, FIT_TIMEOUT).await;
        assert_eq!(done["status"], "succeeded", "{done}");
    }
    app.stop().await;
}
