//! The dashboard in a real browser against the real server: Debian's headless Chromium, driven by
//! Playwright for Python (tests/python/browser_dashboard.py), with the demo data loaded through the API.
//!
//! The script works the pages as a person would and reports what it saw; this test asserts on it:
//! the queue page shows every demo fit reaching a final state, the fit page draws measured and model
//! curves with as many points as the curves API returned, an engineer approves a fit from the part page
//! while a reader sees no such buttons and is refused by the API, and a bad upload shows its error;
//! a part's history shows trend plots with the drifting lot flagged and an overlay of lots, and the
//! failing lot's report prints to PDF (Chromium) and downloads as the service's own PDF.
//! Screenshots of every page and both PDFs are left in target/screenshots/ for a person to look at.

use henrybook::app::Application;
use henrybook::settings::Settings;
use henrybook::store::tokens::Role;
use henrybook_tests::service::TestDatabase;
use henrybook_tests::{reference_python, repo_root};
use serde_json::Value;
use std::process::Command;

fn strings(v: &Value) -> Vec<String> {
    v.as_array()
        .unwrap_or_else(|| panic!("expected an array, got {v}"))
        .iter()
        .map(|x| {
            x.as_str()
                .map(str::to_string)
                .unwrap_or_else(|| x.to_string())
        })
        .collect()
}

fn int(v: &Value) -> i64 {
    v.as_i64()
        .unwrap_or_else(|| panic!("expected an integer, got {v}"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_dashboard_shows_queue_plots_approvals_and_upload_errors_in_a_real_browser() {
    // Arrange: the real service on a free loopback port with its own database, one token per role.
    let database = TestDatabase::new().await;
    let mut settings = Settings::new(database.location());
    settings.workers = 2;
    let app = Application::build(settings).await.unwrap();
    let base = format!("http://127.0.0.1:{}", app.port());
    let store = app.store().clone();
    let (_, engineer) = store
        .create_token(Role::Engineer, Some("browser engineer"))
        .await
        .unwrap();
    let (_, inspector) = store
        .create_token(Role::Inspector, Some("browser inspector"))
        .await
        .unwrap();
    let (_, reader) = store
        .create_token(Role::Reader, Some("browser reader"))
        .await
        .unwrap();
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(app.run(async move {
        let _ = stop_rx.await;
    }));

    // Act: the browser session (blocking; the server keeps serving on the runtime's other thread).
    let shots = repo_root().join("target/screenshots");
    let script = repo_root().join("tests/python/browser_dashboard.py");
    let demo = repo_root().join("demo-data");
    assert!(
        demo.join("manifest.json").exists(),
        "the demo data (demo-data/manifest.json) is missing"
    );
    let out = tokio::task::spawn_blocking({
        let (base, shots) = (base.clone(), shots.clone());
        move || {
            Command::new(reference_python())
                .arg(&script)
                .arg(&base)
                .arg(&shots)
                .env("HB_ENGINEER_TOKEN", &engineer)
                .env("HB_INSPECTOR_TOKEN", &inspector)
                .env("HB_READER_TOKEN", &reader)
                .env("HB_DEMO_DIR", &demo)
                .output()
                .expect("the reference Python starts (run `bash .ci/setup`)")
        }
    })
    .await
    .unwrap();
    let _ = stop_tx.send(());
    server.await.unwrap().unwrap();
    assert!(
        out.status.success(),
        "the browser script failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let facts: Value = serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!(
            "the browser script printed no JSON ({e}): {}",
            String::from_utf8_lossy(&out.stdout)
        )
    });

    // Assert: the queue page ends with every demo fit finished, and failed ones say why.
    let n_fits = facts["demo_fit_ids"].as_array().unwrap().len() as i64;
    assert!(n_fits >= 2, "the demo has at least two sweeps");
    let fin = &facts["queue_final"];
    assert_eq!(int(&fin["queued"]), 0, "queue page at the end: {fin}");
    assert_eq!(int(&fin["running"]), 0, "queue page at the end: {fin}");
    assert_eq!(
        int(&fin["succeeded"]) + int(&fin["failed"]) + int(&fin["cancelled"]),
        n_fits,
        "queue page at the end: {fin}"
    );
    assert!(
        int(&facts["queue_polls"]) >= 2,
        "the queue page polls the status API"
    );
    let rows = facts["queue_rows"].as_array().unwrap();
    assert_eq!(rows.len() as i64, n_fits, "one row per demo fit: {rows:?}");
    assert!(
        rows.iter()
            .all(|r| ["succeeded", "failed", "cancelled"].contains(&r["status"].as_str().unwrap())),
        "{rows:?}"
    );
    let failed_rows = rows.iter().filter(|r| r["status"] == "failed").count();
    assert_eq!(
        facts["queue_error_rows"].as_array().unwrap().len(),
        failed_rows,
        "every failed fit shows its error in words"
    );

    // The fit page draws both curves with every point the curves API returned.
    let n = int(&facts["curve_points"]);
    assert!(n >= 20, "a demo sweep has at least 20 points");
    assert_eq!(int(&facts["curve_model_points"]), n);
    for plot in ["plot-mag", "plot-phase"] {
        let p = &facts["fit_plots"][plot];
        assert_eq!(int(&p["measured"]["points"]), n, "{plot}: {p}");
        assert_eq!(
            int(&p["measured"]["moves"]),
            n,
            "{plot}: one dot per point: {p}"
        );
        assert_eq!(int(&p["model"]["points"]), n, "{plot}: {p}");
        assert_eq!(
            int(&p["model"]["lines"]),
            n - 1,
            "{plot}: one unbroken model line: {p}"
        );
        assert!(int(&p["measured-band"]["d_length"]) > 0, "{plot}: {p}");
    }
    let res = &facts["fit_plots"]["plot-residual"];
    assert_eq!(int(&res["residual-real"]["points"]), n, "{res}");
    assert_eq!(int(&res["residual-imag"]["points"]), n, "{res}");
    for plot in ["plot-leff", "plot-q"] {
        let p = &facts["fit_plots"][plot];
        assert!(int(&p["model"]["d_length"]) > 0, "{plot}: {p}");
        assert!(int(&p["measured"]["points"]) > 0, "{plot}: {p}");
    }
    if facts["fit_srf_hz"].is_number() {
        assert!(
            strings(&facts["fit_markers"]).contains(&"srf".to_string()),
            "an SRF inside the band is marked: {}",
            facts["fit_markers"]
        );
    }
    let ticks = strings(&facts["fit_x_ticks"]);
    assert!(
        ticks
            .iter()
            .any(|t| t.ends_with("kHz") || t.ends_with("MHz")),
        "frequency ticks carry SI prefixes: {ticks:?}"
    );
    assert!(
        strings(&facts["fit_y_ticks"])
            .iter()
            .any(|t| t.ends_with('Ω')),
        "{}",
        facts["fit_y_ticks"]
    );
    let readout = facts["fit_readout"].as_str().unwrap();
    assert!(
        readout.contains("Hz") && readout.contains("measured") && readout.contains("Ω"),
        "hover read-out: {readout}"
    );
    assert!(
        !facts["fit_param_rows"].as_array().unwrap().is_empty(),
        "parameter table"
    );
    assert!(
        facts["fit_param_rows"]
            .as_array()
            .unwrap()
            .iter()
            .any(|r| r[0] == "l0_h" || r[0] == "d_ohm")
    );
    assert_eq!(
        facts["fit_check_rows"], facts["fit_api_checks"],
        "one verdict row per limit check"
    );
    assert_eq!(
        facts["fit_downloads"].as_array().unwrap().len(),
        5,
        "{}",
        facts["fit_downloads"]
    );
    // Every plot of the fit page downloads as SVG and PNG, and the curves as CSV.
    let plot_dl = strings(&facts["fit_plot_downloads"]);
    assert_eq!(
        plot_dl.iter().filter(|k| *k == "svg").count(),
        5,
        "{plot_dl:?}"
    );
    assert_eq!(
        plot_dl.iter().filter(|k| *k == "png").count(),
        5,
        "{plot_dl:?}"
    );
    assert_eq!(
        plot_dl.iter().filter(|k| *k == "csv").count(),
        1,
        "{plot_dl:?}"
    );
    assert!(
        int(&facts["model_download_bytes"]) > 0,
        "the model JSON download delivers bytes: {}",
        facts["model_download_problem"]
    );
    assert!(
        facts["model_download_kind"].is_string(),
        "the downloaded model JSON names its kind: {}",
        facts["model_download_kind"]
    );
    // The SPICE download is a subcircuit of resistors, inductors and capacitors only (the export's
    // promise; SPICE netlist syntax: element letter first, .SUBCKT … .ENDS).
    assert!(
        facts["netlist_subckt"].is_string(),
        "the netlist download holds a .SUBCKT line: {}",
        facts["netlist_problem"]
    );
    assert_eq!(facts["netlist_ends"], true);
    let letters: Vec<&str> = facts["netlist_element_letters"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|v| v.as_str())
        .collect();
    assert!(
        !letters.is_empty() && letters.iter().all(|l| ["R", "L", "C"].contains(l)),
        "{letters:?}"
    );
    if let Some(text) = facts["failed_fit_text"].as_str() {
        assert_eq!(Some(text), facts["failed_fit_api_error"].as_str());
    }

    // The page's SI formatting, evaluated in the browser.
    // Source: Thomson formula, 10 µH with 5 pF -> 22.5079 MHz (TOOLBOX reference values).
    let si = &facts["si_checks"];
    assert_eq!(si["srf"], "22.51 MHz", "{si}");
    assert_eq!(si["l"], "4.700 µH", "{si}");
    assert_eq!(si["c"], "5.000 pF", "{si}");
    assert_eq!(si["r"], "12.30 mΩ", "{si}");
    let close = |v: &Value, x: f64| (v.as_f64().unwrap() / x - 1.0).abs() < 1e-12;
    assert!(close(&si["parse_l"], 4.7e-6), "{si}");
    assert!(close(&si["parse_f"], 30e6), "{si}");
    assert!(close(&si["parse_r"], 0.05), "{si}");
    assert!(close(&si["parse_plain"], 3e7), "{si}");
    assert!(si["parse_bad"].as_str().unwrap().contains("thirty"), "{si}");

    // Parts: the list shows the demo parts, and the approved-only filter is the registry's own query.
    let parts = strings(&facts["parts_rows"]);
    for pn in strings(&facts["demo_parts"]) {
        assert!(parts.contains(&pn), "{pn} listed in {parts:?}");
    }
    let reqs = strings(&facts["parts_requests"]);
    assert!(
        reqs.iter().any(|r| r.contains("approved_only=true")),
        "{reqs:?}"
    );
    assert!(
        reqs.iter().all(|r| r.contains("limit=")),
        "paginated: {reqs:?}"
    );

    // An engineer approves from the part page; the trail records who and why; a reader cannot.
    assert!(int(&facts["engineer_approve_buttons"]) >= 1);
    assert_eq!(int(&facts["engineer_edit_limits"]), 1);
    assert_eq!(facts["api_approval_after"], "approved");
    // The override box is offered exactly when the fit fails its limits or its model is poor.
    assert_eq!(
        int(&facts["approve_override_offered"]) == 1,
        facts["approve_needs_override"] == true,
        "{}",
        facts["approve_override_offered"]
    );
    assert!(
        strings(&facts["audit_after_approve"])
            .iter()
            .any(|r| r.contains("browser test approval")),
        "{}",
        facts["audit_after_approve"]
    );
    let fit_id = facts["fit_id"].to_string();
    let approved = strings(&facts["parts_approved_rows"]);
    assert!(
        !approved.is_empty(),
        "the approved part is listed under approved only (fit {fit_id})"
    );
    assert_eq!(int(&facts["reader_approve_buttons"]), 0);
    assert_eq!(int(&facts["reader_fit_approve_buttons"]), 0);
    assert_eq!(int(&facts["reader_edit_limits"]), 0);
    assert_eq!(int(&facts["reader_note"]), 1);
    assert_eq!(int(&facts["reader_upload_form"]), 0);
    assert_eq!(int(&facts["reader_api_reject"]["status"]), 403);
    assert_eq!(
        facts["reader_api_reject"]["type"],
        "urn:henrybook:problem:forbidden"
    );

    // A bad upload shows the error in words; both pages carry the safety caution.
    let err = facts["upload_error_text"].as_str().unwrap();
    assert!(err.to_lowercase().contains("line"), "upload error: {err}");
    assert_eq!(int(&facts["upload_safety_note"]), 1);
    assert_eq!(int(&facts["part_safety_note"]), 1);

    // A part's history: a trend plot per figure, the drifting last lot flagged beyond the control
    // limits on L0, one report link per lot, plot downloads (SVG, PNG) and the curves as CSV.
    let figures = strings(&facts["history_figures"]);
    for f in ["l0_h", "l_test_h", "dcr_ohm", "srf_hz"] {
        assert!(
            figures.contains(&f.to_string()),
            "trend of {f}: {figures:?}"
        );
    }
    let lots = strings(&facts["history_lots_in_manifest"]);
    assert_eq!(strings(&facts["history_lot_rows"]), lots);
    assert_eq!(int(&facts["history_report_links"]), lots.len() as i64);
    let l0 = &facts["history_l0_series"];
    assert_eq!(int(&l0["value"]["points"]), lots.len() as i64, "{l0}");
    assert!(
        int(&l0["control-low"]["points"]) == 2 && int(&l0["centre"]["points"]) == 2,
        "{l0}"
    );
    assert_eq!(int(&l0["out-of-control"]["points"]), 1, "{l0}");
    assert_eq!(
        strings(&facts["history_flags"]),
        [lots.last().unwrap().clone()],
        "only the drifting lot is flagged on L0"
    );
    assert!(strings(&facts["history_x_ticks"]).contains(lots.last().unwrap()));
    let dl = &facts["history_downloads"];
    assert!(
        dl["svg"]["name"].as_str().unwrap().ends_with(".svg"),
        "{dl}"
    );
    assert_eq!(dl["svg"]["has_polyline_or_path"], true, "{dl}");
    // PNG signature: 89 50 4E 47 0D 0A 1A 0A (ISO/IEC 15948, 5.2).
    assert_eq!(dl["png"]["head"], "89504e470d0a1a0a", "{dl}");
    assert!(dl["png"]["bytes"].as_i64().unwrap() > 1000, "{dl}");
    assert!(
        dl["csv"]["header"]
            .as_str()
            .unwrap()
            .starts_with("frequency_hz,measured_z_real_ohm"),
        "{dl}"
    );
    assert!(dl["csv"]["rows"].as_i64().unwrap() >= 20, "{dl}");
    let overlay = &facts["overlay_plots"];
    for pid in ["overlay-zmag", "overlay-l", "overlay-q"] {
        let series = overlay[pid].as_object().unwrap();
        assert!(
            series.len() >= 2,
            "baseline and the chosen lot in {pid}: {overlay}"
        );
        assert!(
            series.values().all(|s| s["points"].as_i64().unwrap() >= 20),
            "{overlay}"
        );
    }

    // The history's report link opens the lot's report in a tab, styled (the policy admits its sheet).
    let tab = &facts["report_tab"];
    assert_eq!(tab["url_scheme"], "blob", "{tab}");
    assert!(
        tab["title"]
            .as_str()
            .unwrap()
            .contains(lots.last().unwrap()),
        "{tab}"
    );
    assert_eq!(
        tab["status_display"], "grid",
        "the report's style applies: {tab}"
    );

    // The lot report prints: Chromium's PDF of the HTML page has pages with the part and lot on the
    // first; the service's own PDF reads back (pypdf, strict) with the same facts.
    let rf = &facts["report_fit"];
    assert_eq!(rf["verdict"], "fail", "the demo has a failing lot: {rf}");
    assert_eq!(int(&facts["report_html_svgs"]), 3);
    assert!(int(&facts["printed_pdf_pages"]) >= 1);
    // Words as pypdf extracts them, line breaks as spaces (a table cell may wrap).
    let words = |v: &Value| {
        v.as_str()
            .unwrap()
            .split_whitespace()
            .collect::<Vec<_>>()
            .join(" ")
    };
    let page1 = words(&facts["printed_pdf_page1_text"]);
    let (part, lot) = (rf["part"].as_str().unwrap(), rf["lot"].as_str().unwrap());
    assert!(
        page1.contains(part) && page1.contains(lot),
        "printed page 1: {page1}"
    );
    assert!(page1.contains("Fail"), "printed page 1: {page1}");
    assert_eq!(facts["own_pdf_type"], "application/pdf");
    assert!(
        int(&facts["own_pdf_pages"]) >= 2,
        "text pages and the plot page"
    );
    let own = words(&facts["own_pdf_text"]);
    assert!(
        own.contains(&format!("Inspection report: {part} lot {lot}")),
        "own PDF: {own}"
    );
    assert!(
        own.contains("Inductance 220 µH ± 10 % at 10 kHz"),
        "own PDF: {own}"
    );
    for shot in [
        "part-history.png",
        "part-overlay.png",
        "report.png",
        "report-printed.pdf",
        "report-download.pdf",
    ] {
        assert!(shots.join(shot).exists(), "artefact {shot}");
    }

    assert!(
        facts["console_errors"].as_array().unwrap().is_empty(),
        "script errors in the pages: {}",
        facts["console_errors"]
    );
    for page in [
        "queue",
        "fit",
        "parts",
        "part-engineer",
        "part-reader",
        "upload-bad-file",
    ] {
        assert!(
            shots.join(format!("{page}.png")).exists(),
            "screenshot {page}"
        );
    }
}
