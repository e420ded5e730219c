//! Two registry behaviours over real HTTP, on synthetic sweeps made from known models (invented
//! values): a lumped fit that cannot hold the data queues a rational fit of the same sweep as the next
//! revision; and a "|Z| at least X over a band" query sees a series-resonance notch that falls
//! between the stored grid points.

use henrybook::model::{ImpedanceModel, LumpedModel, Section, SectionKind};
use henrybook_tests::service::{TestApp, spawn_app, synthetic_csv};
use serde_json::{Value, json};
use std::time::Duration;

const FIT_TIMEOUT: Duration = Duration::from_secs(120);

/// 10 µH, 50 mΩ, 5 pF with a series section 0.2 Ω / 100 nH / 22.54 pF across it: the section resonates
/// at 1/(2π√(100 nH · 22.54 pF)) = 106.0 MHz (Thomson's formula), between the grid points at 100 MHz and
/// 112.2 MHz, where |Z| falls to about 0.2 Ω.
fn notched() -> LumpedModel {
    LumpedModel {
        l0_h: 10e-6,
        rdc_ohm: 0.05,
        k_ac_ohm_per_sqrt_hz: 0.0,
        rp_ohm: None,
        cp_f: 5e-12,
        ls_h: 0.0,
        sections: vec![Section {
            kind: SectionKind::Series,
            r_ohm: 0.2,
            l_h: 100e-9,
            c_f: 22.54e-12,
        }],
        core: None,
    }
}

async fn upload(app: &TestApp, part: &str, lot: &str, csv: Vec<u8>, options: &str) -> i64 {
    let r = app
        .upload(
            &format!("{part}-{lot}.csv"),
            csv,
            &[
                ("part_number", part),
                ("lot", lot),
                ("method", "direct"),
                ("options", options),
            ],
        )
        .await;
    assert_eq!(r.status(), 202, "{}", r.text().await.unwrap_or_default());
    r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap()
}

/// Waits until the part has `count` fits and none is queued or running; returns them.
async fn settled_fits(app: &TestApp, part: &str, count: usize) -> Vec<Value> {
    let deadline = tokio::time::Instant::now() + FIT_TIMEOUT;
    loop {
        let p = app
            .get_json(&format!("/api/v1/parts/{part}"), &app.reader)
            .await;
        let fits = p["fits"].as_array().cloned().unwrap_or_default();
        let busy = fits
            .iter()
            .any(|f| f["status"] == "queued" || f["status"] == "running");
        if fits.len() >= count && !busy {
            return fits;
        }
        assert!(tokio::time::Instant::now() < deadline, "{p}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_lumped_fit_that_misses_the_data_gets_a_rational_revision() {
    let app = spawn_app().await;
    app.create_part("RB-1", json!({})).await;
    app.create_part("RB-2", json!({})).await;
    let csv = synthetic_csv(&notched(), 1e4, 300e6, 801);
    // No sections allowed: the lumped model cannot hold the notch, its weighted RMS is far above 3.
    let lumped = upload(&app, "RB-1", "A", csv.clone(), r#"{"max_sections": 0}"#).await;
    let fits = settled_fits(&app, "RB-1", 2).await;
    assert_eq!(fits.len(), 2, "{fits:?}");
    let first = app
        .get_json(&format!("/api/v1/fits/{lumped}"), &app.reader)
        .await;
    assert_eq!(first["report"]["model"]["kind"], "lumped");
    let rms_lumped = first["report"]["quality"]["rms_weighted"].as_f64().unwrap();
    assert!(rms_lumped > 3.0, "lumped weighted RMS {rms_lumped}");
    let second_id = fits
        .iter()
        .map(|f| f["fit_id"].as_i64().unwrap())
        .find(|&id| id != lumped)
        .unwrap();
    let second = app
        .get_json(&format!("/api/v1/fits/{second_id}"), &app.reader)
        .await;
    assert_eq!(second["status"], "succeeded", "{second}");
    assert_eq!(second["revision"], 2);
    assert_eq!(second["sweep_id"], first["sweep_id"]);
    assert_eq!(second["options"]["family"], "rational");
    assert_eq!(second["report"]["model"]["kind"], "rational");
    let rms_rational = second["report"]["quality"]["rms_weighted"]
        .as_f64()
        .unwrap();
    assert!(rms_rational < rms_lumped, "{rms_rational} vs {rms_lumped}");
    // The rational model's own derived figures see the notch (series resonance at 106.0 MHz).
    let series = second["report"]["derived"]["series_resonances_hz"]
        .as_array()
        .unwrap();
    assert!(
        series
            .iter()
            .any(|f| (f.as_f64().unwrap() / 106.0e6 - 1.0).abs() < 5e-3),
        "{series:?}"
    );
    // The audit trail says the service queued it.
    let part = app.get_json("/api/v1/parts/RB-1", &app.reader).await;
    assert!(
        part["audit"]
            .as_array()
            .unwrap()
            .iter()
            .any(|a| a["action"] == "refit-requested" && a["actor"] == "henrybook (automatic)"),
        "{part}"
    );
    // Asked not to, the service queues nothing more.
    upload(
        &app,
        "RB-2",
        "A",
        csv,
        r#"{"max_sections": 0, "rational_fallback_above_rms_weighted": null}"#,
    )
    .await;
    let fits = settled_fits(&app, "RB-2", 1).await;
    assert_eq!(fits.len(), 1, "{fits:?}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_band_query_sees_a_notch_between_grid_points() {
    let app = spawn_app().await;
    app.create_part("NB-1", json!({})).await;
    let id = upload(
        &app,
        "NB-1",
        "A",
        synthetic_csv(&notched(), 1e4, 300e6, 801),
        "{}",
    )
    .await;
    let fit = app.wait_for_fit(id, FIT_TIMEOUT).await;
    assert_eq!(fit["status"], "succeeded", "{fit}");
    assert_eq!(
        fit["report"]["model"]["sections"].as_array().map(Vec::len),
        Some(1),
        "{fit}"
    );
    let q = |query: String| {
        let app = &app;
        async move {
            app.get_json(
                &format!("/api/v1/parts?answer_from=latest&{query}"),
                &app.reader,
            )
            .await
        }
    };
    // The grid points at 100 MHz and 112.2 MHz see several ohms; the notch between them 0.2 Ω.
    let over_notch = q("z_min_ohm=1&z_band_min_hz=9e7&z_band_max_hz=1.3e8".into()).await;
    assert!(
        over_notch["items"].as_array().unwrap().is_empty(),
        "{over_notch}"
    );
    let listed = q("z_band_min_hz=9e7&z_band_max_hz=1.3e8".into()).await;
    let z = listed["items"][0]["z_min_ohm"]
        .as_f64()
        .unwrap_or_else(|| panic!("no lowest |Z| in {listed}"));
    assert!((z / 0.2 - 1.0).abs() < 0.1, "lowest |Z| {z}");
    // A band narrower than one grid step, inside the notch's interval, is answered too.
    let narrow = q("z_band_min_hz=1.05e8&z_band_max_hz=1.07e8".into()).await;
    let z = narrow["items"][0]["z_min_ohm"]
        .as_f64()
        .unwrap_or_else(|| panic!("no lowest |Z| in {narrow}"));
    assert!((z / 0.2 - 1.0).abs() < 0.1, "lowest |Z| {z}");
    // Well below the notch, 1.05–2 MHz, |Z| rises with f, so the lowest is at the band's own lower end,
    // which lies between grid points: the answer is |Z(1.05 MHz)| of the model the sweep was made from.
    let low = q("z_band_min_hz=1.05e6&z_band_max_hz=2e6".into()).await;
    let z = low["items"][0]["z_min_ohm"].as_f64().unwrap();
    let want = notched().impedance(1.05e6).norm();
    assert!((z / want - 1.0).abs() < 0.005, "lowest |Z| {z} vs {want}");
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_poor_model_gets_no_verdict_and_is_approved_only_deliberately() {
    // The part's limits would pass the notched sweep's lumped model (DCR 50 mΩ under 1 Ω), but with no
    // sections allowed that model misses the notch: its quality is poor, so there is no verdict.
    let app = spawn_app().await;
    app.create_part("RQ-1", json!({"dcr_max_ohm": 1.0})).await;
    let poor = upload(
        &app,
        "RQ-1",
        "A",
        synthetic_csv(&notched(), 1e4, 300e6, 801),
        r#"{"max_sections": 0}"#,
    )
    .await;
    let good = upload(
        &app,
        "RQ-1",
        "B",
        synthetic_csv(
            &henrybook_tests::service::simple_model(10e-6, 0.05, 5e-12),
            1e4,
            1e8,
            401,
        ),
        "{}",
    )
    .await;
    // The poor lumped fit, its rational revision, and the good fit.
    settled_fits(&app, "RQ-1", 3).await;
    let first = app
        .get_json(&format!("/api/v1/fits/{poor}"), &app.reader)
        .await;
    assert_eq!(first["quality"], "poor", "{first}");
    assert_eq!(first["verdict"], "withheld");
    assert_eq!(first["report"]["assessment"]["status"], "poor");
    assert_eq!(
        first["verdict_checks"][0]["pass"], true,
        "the check itself is shown"
    );
    let note = first["verdict_note"].as_str().unwrap();
    assert!(note.starts_with("no verdict:"), "{note}");
    assert!(
        first["quality_summary"]
            .as_str()
            .unwrap()
            .contains("does not describe the data"),
        "{first}"
    );
    let ok = app
        .get_json(&format!("/api/v1/fits/{good}"), &app.reader)
        .await;
    assert_eq!(ok["quality"], "ok", "{ok}");
    assert_eq!(ok["verdict"], "pass");
    assert_eq!(ok["verdict_note"], Value::Null);
    // The service says which family it tried next.
    let part = app.get_json("/api/v1/parts/RQ-1", &app.reader).await;
    assert!(
        part["audit"]
            .as_array()
            .unwrap()
            .iter()
            .any(|a| a["actor"] == "henrybook (automatic)"
                && a["reason"]
                    .as_str()
                    .unwrap_or("")
                    .contains("rational family")),
        "{part}"
    );

    // Approving the poor fit needs an override with a reason; blank reasons and unknown fields are
    // refused; nothing is stored by a refused request.
    let approve = |id: i64, body: Value| {
        let app = &app;
        async move {
            app.post_json(&format!("/api/v1/fits/{id}/approve"), &app.engineer, &body)
                .await
        }
    };
    assert_eq!(
        approve(poor, json!({"reason": "looks fine"}))
            .await
            .status(),
        409
    );
    assert_eq!(approve(poor, json!({"override": true})).await.status(), 422);
    assert_eq!(approve(poor, json!({"reason": "   "})).await.status(), 422);
    assert_eq!(
        approve(poor, json!({"reason": "x", "force": true}))
            .await
            .status(),
        422
    );
    let part = app.get_json("/api/v1/parts/RQ-1", &app.reader).await;
    assert_eq!(part["baseline_fit_id"], Value::Null, "{part}");
    let r = approve(
        poor,
        json!({"reason": "notch is outside the band we use", "override": true}),
    )
    .await;
    assert_eq!(r.status(), 200, "{}", r.text().await.unwrap());
    let part = app.get_json("/api/v1/parts/RQ-1", &app.reader).await;
    assert_eq!(part["baseline_fit_id"], poor);
    let entry = part["audit"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["action"] == "fit-approved-override")
        .expect("the override is audited");
    assert!(
        entry["reason"]
            .as_str()
            .unwrap()
            .contains("approved although its model does not describe the data"),
        "{entry}"
    );
    // The baseline cannot be approved again; approving another fit moves the baseline, and only one
    // fit of the part stays approved.
    assert_eq!(approve(poor, json!({})).await.status(), 409);
    assert_eq!(approve(good, json!({})).await.status(), 200);
    let part = app.get_json("/api/v1/parts/RQ-1", &app.reader).await;
    assert_eq!(part["baseline_fit_id"], good);
    let approved: Vec<i64> = part["fits"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["approval"] == "approved")
        .map(|f| f["fit_id"].as_i64().unwrap())
        .collect();
    assert_eq!(approved, [good], "{part}");
    assert!(
        part["audit"]
            .as_array()
            .unwrap()
            .iter()
            .any(|a| a["action"] == "approval-superseded" && a["fit_id"] == poor),
        "{part}"
    );
    app.stop().await;
}
