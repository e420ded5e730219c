//! A part's trend across lots and a lot's printable report, over HTTP against the real service.
//!
//! Five lots of a 10 µH part are uploaded as synthetic sweeps from known models (invented for this
//! test): four are approved one after the other (each approval supersedes the one before, and all
//! four count as approved lots), the fifth has 9 % less inductance. The trend's control limits are
//! checked against numpy (mean, sample standard deviation with ddof=1) on the very values the API
//! returns, and the fifth lot must be flagged beyond them while inside the ±20 % limit. The report
//! of that lot must name the part, the lot and the limit in SI prefixes, as HTML and as a PDF.

use henrybook_tests::run_reference_script;
use henrybook_tests::service::{TestApp, simple_model, spawn_app, synthetic_csv};
use serde_json::{Value, json};
use std::time::Duration;

const FIT_TIMEOUT: Duration = Duration::from_secs(120);
const PART: &str = "TR-L10U";

async fn upload(app: &TestApp, lot: &str, l0_h: f64) -> i64 {
    let csv = synthetic_csv(&simple_model(l0_h, 0.012, 6e-12), 1e3, 1e8, 201);
    let r = app
        .upload(
            &format!("lot-{lot}.csv"),
            csv,
            &[
                ("part_number", PART),
                ("lot", lot),
                ("method", "direct"),
                ("operator", "T. Ester"),
            ],
        )
        .await;
    assert_eq!(r.status(), 202, "{}", r.text().await.unwrap_or_default());
    let id = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let fit = app.wait_for_fit(id, FIT_TIMEOUT).await;
    assert_eq!(fit["status"], "succeeded", "{fit}");
    id
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_trend_flags_a_drifting_lot_and_its_report_prints_as_html_and_pdf() {
    // Arrange: five lots, the first four approved in turn.
    let app = spawn_app().await;
    app.create_part(
        PART,
        json!({"l_nominal_h": 1e-5, "l_test_frequency_hz": 1e5, "l_tolerance_percent": 20,
               "dcr_max_ohm": 0.018}),
    )
    .await;
    let mut ids = Vec::new();
    for (lot, l0) in [
        ("A1", 10.0e-6),
        ("A2", 10.2e-6),
        ("A3", 10.1e-6),
        ("A4", 9.9e-6),
    ] {
        let id = upload(&app, lot, l0).await;
        let r = app
            .post_json(
                &format!("/api/v1/fits/{id}/approve"),
                &app.engineer,
                &json!({"reason": "lot released"}),
            )
            .await;
        assert_eq!(r.status(), 200, "{}", r.text().await.unwrap_or_default());
        ids.push(id);
    }
    let drifting = upload(&app, "B1", 9.1e-6).await;

    // Act
    let trend = app
        .get_json(&format!("/api/v1/parts/{PART}/trend"), &app.reader)
        .await;
    let bogus = app
        .get(&format!("/api/v1/parts/{PART}/trend?bogus=1"), &app.reader)
        .await;
    let html = app
        .get(&format!("/api/v1/fits/{drifting}/report"), &app.reader)
        .await;
    let pdf = app
        .get(&format!("/api/v1/fits/{drifting}/report.pdf"), &app.reader)
        .await;
    let missing = app.get("/api/v1/fits/999999/report", &app.reader).await;

    // Assert: lots in upload order, four approved.
    let lots: Vec<&str> = trend["lots"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["lot"].as_str().unwrap())
        .collect();
    assert_eq!(lots, ["A1", "A2", "A3", "A4", "B1"]);
    let approved: Vec<bool> = trend["lots"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["approved"].as_bool().unwrap())
        .collect();
    assert_eq!(approved, [true, true, true, true, false]);
    let l0 = trend["figures"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["figure"] == "l0_h")
        .expect("an L0 trend");
    assert_eq!(l0["unit"], "H");
    assert_eq!(l0["approved_lots"], 4);
    let values: Vec<f64> = l0["points"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["value"].as_f64().unwrap())
        .collect();
    // Source: numpy (mean, std with ddof=1) on the four approved values the API returned.
    let np = run_reference_script(
        "trend_numpy.py",
        &[],
        &serde_json::to_string(&values[..4]).unwrap(),
    );
    for (ours, theirs) in [
        ("centre", "mean"),
        ("sigma", "sd"),
        ("control_low", "low"),
        ("control_high", "high"),
    ] {
        let a = l0[ours].as_f64().unwrap();
        let b = np[theirs].as_f64().unwrap();
        assert!(
            (a - b).abs() <= 1e-12 * b.abs(),
            "{ours} {a} vs numpy {theirs} {b}"
        );
    }
    let last = &l0["points"][4];
    assert_eq!(last["out_of_control"], true, "{l0}");
    assert_eq!(last["outside_limits"], false, "L0 has no limit of its own");
    let lt = trend["figures"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["figure"] == "l_test_h")
        .expect("the inductance at the test frequency");
    assert!((lt["limit_low"].as_f64().unwrap() - 8e-6).abs() < 1e-15);
    assert_eq!(
        lt["points"][4]["outside_limits"], false,
        "-9 % is inside ±20 %"
    );
    assert_eq!(bogus.status(), 400, "unknown query parameters are refused");

    assert_eq!(html.status(), 200);
    assert!(
        html.headers()["content-type"]
            .to_str()
            .unwrap()
            .starts_with("text/html")
    );
    let page = html.text().await.unwrap();
    for want in [
        "Inspection report: TR-L10U lot B1",
        "Inductance 10 µH ± 20 % at 100 kHz",
        "lot-B1.csv",
        "T. Ester",
        "@media print",
    ] {
        assert!(page.contains(want), "the HTML report lacks {want:?}");
    }
    assert!(
        page.contains(&format!("fit #{}", ids[3])),
        "drift names the baseline"
    );

    assert_eq!(pdf.status(), 200);
    assert_eq!(pdf.headers()["content-type"], "application/pdf");
    let bytes = pdf.bytes().await.unwrap();
    assert!(bytes.starts_with(b"%PDF-1.4") && bytes.ends_with(b"%%EOF\n"));
    let text = String::from_utf8_lossy(&bytes);
    assert!(text.contains("(Inspection report: TR-L10U lot B1) Tj"));
    assert_eq!(missing.status(), 404);
    app.stop().await;
}
