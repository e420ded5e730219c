//! The core corner frequency in the registry, over real HTTP and gRPC, on synthetic sweeps made from
//! known models (invented values, noise-free): queries bounded by the corner, a part's limits on it,
//! its drift against the baseline; and an upload whose options state the construction (as the
//! dashboard's upload form sends it) giving a material report with σ per point.
//!
//! The single-pole core L0 ‖ Rp has its corner at fc = Rp/(2π·L0) (the frequency where the core's
//! reactance equals its loss resistance; common practice, no source); a lossless core has none.

use henrybook::grpc::proto;
use henrybook::grpc::proto::part_registry_client::PartRegistryClient;
use henrybook::model::LumpedModel;
use henrybook_tests::service::{TestApp, grpc_request, simple_model, spawn_app, synthetic_csv};
use serde_json::{Value, json};
use std::f64::consts::PI;
use std::time::Duration;

const FIT_TIMEOUT: Duration = Duration::from_secs(120);

/// 47 µH, 50 mΩ, 4 pF (SRF 11.6 MHz) with a single-pole core cornering at `corner_hz`, or none.
fn choke(corner_hz: Option<f64>) -> LumpedModel {
    let mut m = simple_model(47e-6, 0.05, 4e-12);
    m.rp_ohm = corner_hz.map(|f| 2.0 * PI * f * m.l0_h);
    m
}

async fn upload(app: &TestApp, part: &str, lot: &str, model: &LumpedModel, options: &str) -> Value {
    let r = app
        .upload(
            &format!("{part}-{lot}.csv"),
            synthetic_csv(model, 1e3, 100e6, 301),
            &[
                ("part_number", part),
                ("lot", lot),
                ("method", "direct"),
                ("options", options),
            ],
        )
        .await;
    assert_eq!(r.status(), 202, "{}", r.text().await.unwrap_or_default());
    let id = r.json::<Value>().await.unwrap()["fit_id"].as_i64().unwrap();
    let fit = app.wait_for_fit(id, FIT_TIMEOUT).await;
    assert_eq!(fit["status"], "succeeded", "{fit}");
    fit
}

fn numbers(page: &Value) -> Vec<String> {
    page["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["part_number"].as_str().unwrap().to_string())
        .collect()
}

#[tokio::test]
async fn queries_limits_and_drift_use_the_core_corner_and_a_part_without_one_never_matches() {
    let app = spawn_app().await;
    let limits = json!({"core_corner_min_hz": 1e6, "core_corner_max_hz": 3e6});
    for part in ["CC-LOW", "CC-HIGH", "CC-AIR"] {
        app.create_part(part, limits.clone()).await;
    }
    let low = upload(&app, "CC-LOW", "A", &choke(Some(2e6)), "{}").await;
    let high = upload(&app, "CC-HIGH", "A", &choke(Some(8e6)), "{}").await;
    let air = upload(&app, "CC-AIR", "A", &choke(None), "{}").await;

    let corner = |fit: &Value| fit["report"]["derived"]["core_corner_hz"].as_f64();
    assert!((corner(&low).unwrap() / 2e6 - 1.0).abs() < 1e-3, "{low}");
    assert!((corner(&high).unwrap() / 8e6 - 1.0).abs() < 1e-3, "{high}");
    assert_eq!(corner(&air), None, "a lossless core has no corner: {air}");

    // Limits: inside, above, and no corner at all (a failed check that says why).
    let check = |fit: &Value| {
        fit["verdict_checks"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["limit"] == "core_corner")
            .cloned()
            .unwrap_or_else(|| panic!("no core_corner check: {fit}"))
    };
    assert_eq!(low["verdict"], "pass", "{}", check(&low));
    assert_eq!(high["verdict"], "fail", "{}", check(&high));
    assert_eq!(air["verdict"], "fail");
    assert_eq!(check(&air)["measured"], Value::Null);
    assert!(
        check(&air)["note"].as_str().unwrap().contains("no core"),
        "{}",
        check(&air)
    );

    // Queries over HTTP: a band, an open end, the sort; the lossless part never matches.
    let q = |query: &str| {
        let app = &app;
        let query = format!("/api/v1/parts?answer_from=latest&{query}");
        async move { app.get_json(&query, &app.reader).await }
    };
    let band = q("core_corner_min_hz=1e6&core_corner_max_hz=3e6").await;
    assert_eq!(numbers(&band), ["CC-LOW"]);
    let fc = band["items"][0]["core_corner_hz"].as_f64().unwrap();
    assert!((fc / 2e6 - 1.0).abs() < 1e-3, "{band}");
    assert_eq!(
        numbers(&q("core_corner_min_hz=1&sort=-core_corner_hz").await),
        ["CC-HIGH", "CC-LOW"]
    );
    assert_eq!(
        numbers(&q("core_corner_max_hz=1e12").await),
        ["CC-HIGH", "CC-LOW"]
    );
    let all = q("sort=core_corner_hz").await;
    assert_eq!(numbers(&all), ["CC-LOW", "CC-HIGH", "CC-AIR"]);
    assert_eq!(all["items"][2]["core_corner_hz"], Value::Null);
    let bad = app
        .get(
            "/api/v1/parts?core_corner_min_hz=3e6&core_corner_max_hz=1e6",
            &app.reader,
        )
        .await;
    assert_eq!(bad.status(), 422);
    assert!(bad.text().await.unwrap().contains("core_corner"));

    // The same over gRPC.
    let mut grpc = PartRegistryClient::new(app.grpc_channel().await);
    let page = grpc
        .query_parts(grpc_request(
            proto::QueryPartsRequest {
                answer_from: Some("latest".into()),
                core_corner_min_hz: Some(1.0),
                sort: Some("-core_corner_hz".into()),
                ..Default::default()
            },
            &app.reader,
        ))
        .await
        .unwrap()
        .into_inner();
    let got: Vec<&str> = page.items.iter().map(|p| p.part_number.as_str()).collect();
    assert_eq!(got, ["CC-HIGH", "CC-LOW"]);
    assert!((page.items[1].core_corner_hz.unwrap() / 2e6 - 1.0).abs() < 1e-3);
    let refused = grpc
        .query_parts(grpc_request(
            proto::QueryPartsRequest {
                core_corner_min_hz: Some(3e6),
                core_corner_max_hz: Some(1e6),
                ..Default::default()
            },
            &app.reader,
        ))
        .await
        .unwrap_err();
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    let part = grpc
        .get_part(grpc_request(
            proto::GetPartRequest {
                part_number: "CC-LOW".into(),
            },
            &app.reader,
        ))
        .await
        .unwrap()
        .into_inner();
    let l = part.limits.unwrap();
    assert_eq!(
        (l.core_corner_min_hz, l.core_corner_max_hz),
        (Some(1e6), Some(3e6))
    );

    // Drift: approve the low part's fit, then a lot whose corner moved to 2.4 MHz (+20 %).
    let id = low["fit_id"].as_i64().unwrap();
    let r = app
        .post_json(
            &format!("/api/v1/fits/{id}/approve"),
            &app.engineer,
            &json!({}),
        )
        .await;
    assert_eq!(r.status(), 200, "{}", r.text().await.unwrap_or_default());
    let moved = upload(&app, "CC-LOW", "B", &choke(Some(2.4e6)), "{}").await;
    let drift = moved["drift"]["parameters"]
        .as_array()
        .unwrap()
        .iter()
        .find(|p| p["name"] == "core_corner_hz")
        .cloned()
        .unwrap_or_else(|| panic!("no core_corner_hz drift: {}", moved["drift"]));
    assert!(
        (drift["percent"].as_f64().unwrap() - 20.0).abs() < 0.1,
        "{drift}"
    );
    app.stop().await;
}

#[tokio::test]
async fn an_upload_stating_the_construction_gets_a_material_report_with_sigma_per_point() {
    // 12 turns on a 20 × 10 × 5 mm toroid: 99.8 nH per unit permeability (μ0·N²·h·ln(OD/ID)/(2π)),
    // so 47 µH is an initial permeability of 471.
    let app = spawn_app().await;
    app.create_part("MAT-1", json!({})).await;
    let options = json!({"construction": {"turns": 12, "core": {"toroid": {
        "outer_diameter_m": 0.02, "inner_diameter_m": 0.01, "height_m": 0.005}},
        "nominal_initial_permeability": 500}});
    let fit = upload(&app, "MAT-1", "A", &choke(Some(2e6)), &options.to_string()).await;
    let m = &fit["report"]["material"];
    let l1 = 4e-7 * PI * 144.0 * 0.005 * 2f64.ln() / (2.0 * PI);
    assert!(
        (m["inductance_per_permeability_h"].as_f64().unwrap() / l1 - 1.0).abs() < 1e-9,
        "{m}"
    );
    let mu_i = m["initial_permeability"].as_f64().unwrap();
    assert!((mu_i / (47e-6 / l1) - 1.0).abs() < 1e-3, "{m}");
    assert!(m["initial_permeability_sigma"].as_f64().unwrap() > 0.0);
    let spectrum = m["spectrum"].as_array().unwrap();
    assert!(spectrum.len() > 40, "{m}");
    for p in spectrum {
        let s = p["mu_real_sigma"].as_f64().unwrap_or_else(|| panic!("{p}"));
        assert!(s > 0.0 && s < 0.05 * p["mu_real"].as_f64().unwrap(), "{p}");
        assert!(p["mu_imag_sigma"].as_f64().unwrap() > 0.0, "{p}");
    }
    // The options are stored as sent and read back.
    assert_eq!(
        fit["options"]["construction"]["turns"].as_f64(),
        Some(12.0),
        "{}",
        fit["options"]
    );
    app.stop().await;
}
