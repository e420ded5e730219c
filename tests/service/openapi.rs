//! `api/openapi.yaml` is generated from the code: this test fails when the committed file differs
//! from what the routes generate. Regenerate with `HENRYBOOK_WRITE_OPENAPI=1 cargo test -p
//! henrybook-tests --test service openapi::`.

use henrybook_tests::repo_root;

#[test]
fn the_committed_openapi_description_matches_the_code() {
    let generated = henrybook::http::openapi_yaml();
    let path = repo_root().join("api/openapi.yaml");
    if std::env::var_os("HENRYBOOK_WRITE_OPENAPI").is_some() {
        std::fs::write(&path, &generated).expect("write api/openapi.yaml");
    }
    let committed = std::fs::read_to_string(&path).unwrap_or_default();
    assert!(
        committed == generated,
        "api/openapi.yaml is out of date; regenerate it with HENRYBOOK_WRITE_OPENAPI=1 cargo test -p henrybook-tests --test service openapi::"
    );
}

#[test]
fn the_description_covers_every_route_of_the_contract() {
    let api = henrybook::http::openapi();
    let paths: Vec<&String> = api.paths.paths.keys().collect();
    for p in [
        "/healthz",
        "/readyz",
        "/metrics",
        "/api/v1/whoami",
        "/api/v1/queue",
        "/api/v1/fits",
        "/api/v1/fits/{fit_id}",
        "/api/v1/fits/{fit_id}/curves",
        "/api/v1/fits/{fit_id}/cancel",
        "/api/v1/fits/{fit_id}/retry",
        "/api/v1/fits/{fit_id}/refit",
        "/api/v1/fits/{fit_id}/approve",
        "/api/v1/fits/{fit_id}/reject",
        "/api/v1/fits/{fit_id}/model.json",
        "/api/v1/fits/{fit_id}/netlist.cir",
        "/api/v1/fits/{fit_id}/model.s1p",
        "/api/v1/sweeps",
        "/api/v1/sweeps/{sweep_id}/file",
        "/api/v1/parts",
        "/api/v1/parts/{part_number}",
        "/api/v1/parts/{part_number}/limits",
    ] {
        assert!(
            paths.iter().any(|k| k.as_str() == p),
            "{p} is missing from the description"
        );
    }
}

#[test]
fn every_error_answer_is_a_problem_and_every_secured_route_lists_401_and_403() {
    // RFC 9457: error bodies are application/problem+json; the service answers 401/403 on every
    // route that takes a token and 503 when it is at a bound or draining.
    let doc: serde_json::Value =
        serde_json::from_str(&henrybook::http::openapi().to_json().unwrap()).unwrap();
    let mut operations = 0;
    for (path, item) in doc["paths"].as_object().unwrap() {
        for (method, op) in item.as_object().unwrap() {
            operations += 1;
            let responses = op["responses"].as_object().unwrap();
            for (code, answer) in responses {
                if code.starts_with('4') || code.starts_with('5') {
                    let content = answer["content"].as_object().unwrap();
                    assert!(
                        content.contains_key("application/problem+json")
                            && !content.contains_key("application/json"),
                        "{method} {path} {code}"
                    );
                }
            }
            let secured = op["security"].as_array().is_some_and(|s| !s.is_empty());
            if secured {
                for code in ["401", "403"] {
                    assert!(responses.contains_key(code), "{method} {path} lacks {code}");
                }
            }
            assert!(responses.contains_key("503"), "{method} {path} lacks 503");
        }
    }
    assert!(operations >= 21, "{operations}");
}
