//! `POST /api/v1/sweeps` (upload a sweep, queue its fit) and `GET /api/v1/sweeps/{sweep_id}/file`.
//!
//! An upload is checked completely before anything is stored: every metadata field, the options, and
//! the file itself (read by the engine's sweep reader; its error and line number go into the problem),
//! and that the sweep is long enough to fit. The text fields' checks are pure functions ([`number`],
//! [`check_upload_fields`]), which the fuzz target `upload_fields` calls.

use super::auth::{Inspector, Reader};
use super::problem::{ApiResult, Kind, Problem};
use crate::app::AppState;
use crate::fit::FitOptions;
use crate::jobs::engine::{FixtureFiles, FixtureTopology, InputError, InputFile, read_input};
use crate::jobs::{duplicate_key_with_fixture, effective_options, parse_method};
use crate::store::sha256_hex;
use crate::store::sweeps::{NamedFile, NewSweep};
use crate::sweep::{Method, ReadOptions};
use axum::Json;
use axum::extract::multipart::MultipartError;
use axum::extract::{Multipart, Path, State};
use axum::http::{StatusCode, header};
use axum::response::IntoResponse;
use serde::Serialize;
use utoipa_axum::{router::OpenApiRouter, routes};

#[derive(Debug, Serialize, utoipa::ToSchema)]
pub struct Accepted {
    pub fit_id: i64,
    pub sweep_id: i64,
    /// Where to poll the fit's status.
    pub status_url: String,
    /// True when the same file was already uploaded for the part with the same options: the answer
    /// is the existing fit and nothing new was stored.
    pub duplicate: bool,
}

/// The multipart form of an upload (for the API description).
#[allow(dead_code)]
#[derive(utoipa::ToSchema)]
pub struct UploadForm {
    /// The measurement file (Touchstone .s1p/.s2p or CSV).
    #[schema(format = Binary, content_media_type = "application/octet-stream")]
    file: String,
    part_number: String,
    lot: String,
    /// reflection, series-thru, shunt-thru or direct; needed for 2-port files.
    method: Option<String>,
    /// Overrides the file's reference impedance.
    z0_ohm: Option<f64>,
    /// A separate four-wire DC resistance reading.
    dcr_ohm: Option<f64>,
    temperature_c: Option<f64>,
    operator: Option<String>,
    /// Fit options as JSON (the engine's FitOptions; every field optional).
    options: Option<String>,
    /// Fixture compensation: the open dummy measured on the DUT's frequency grid (with fixture_short).
    #[schema(format = Binary, content_media_type = "application/octet-stream")]
    fixture_open: Option<String>,
    /// Fixture compensation: the short dummy measured on the DUT's frequency grid (with fixture_open).
    #[schema(format = Binary, content_media_type = "application/octet-stream")]
    fixture_short: Option<String>,
    /// approximate (default), series-then-shunt, shunt-then-series (exact L-shaped fixtures) or
    /// two-port (matrix de-embedding of three 2-port files).
    fixture_topology: Option<String>,
}

fn multipart_problem(e: MultipartError) -> Problem {
    if e.status() == StatusCode::PAYLOAD_TOO_LARGE {
        Problem::new(Kind::PayloadTooLarge, e.body_text())
    } else {
        Problem::validation(format!("the multipart body: {}", e.body_text()))
    }
}

/// A numeric multipart field: empty or `null` for none, else a finite number.
pub fn number(name: &str, text: &str) -> ApiResult<Option<f64>> {
    let t = text.trim();
    if t.is_empty() || t == "null" {
        return Ok(None);
    }
    t.parse::<f64>()
        .ok()
        .filter(|v| v.is_finite())
        .map(Some)
        .ok_or_else(|| Problem::validation(format!("{name} must be a number, not {t:?}")))
}

fn positive(name: &str, v: Option<f64>) -> ApiResult<Option<f64>> {
    match v {
        Some(x) if x <= 0.0 => Err(Problem::validation(format!(
            "{name} must be above zero (got {x})"
        ))),
        other => Ok(other),
    }
}

fn short_text(name: &str, text: &str, max: usize, required: bool) -> ApiResult<String> {
    let t = text.trim();
    if required && t.is_empty() {
        return Err(Problem::validation(format!("{name} is required")));
    }
    if t.chars().count() > max || t.chars().any(char::is_control) {
        return Err(Problem::validation(format!(
            "{name} must be at most {max} characters without control characters"
        )));
    }
    Ok(t.to_string())
}

/// Parses fit options, refusing keys the engine does not know (they would be silently ignored).
pub fn parse_options(text: &str) -> ApiResult<FitOptions> {
    if text.trim().is_empty() {
        return Ok(FitOptions::default());
    }
    let value: serde_json::Value = serde_json::from_str(text)
        .map_err(|e| Problem::validation(format!("options is not JSON: {e}")))?;
    parse_options_value(value)
}

pub fn parse_options_value(value: serde_json::Value) -> ApiResult<FitOptions> {
    if value.is_null() {
        return Ok(FitOptions::default());
    }
    let Some(given) = value.as_object() else {
        return Err(Problem::validation("options must be a JSON object"));
    };
    let options: FitOptions = serde_json::from_value(value.clone())
        .map_err(|e| Problem::validation(format!("options: {e}")))?;
    let known = serde_json::to_value(&options).map_err(Problem::internal)?;
    if let Some(unknown) = given.keys().find(|k| known.get(k.as_str()).is_none()) {
        return Err(Problem::validation(format!(
            "options: unknown field {unknown:?}"
        )));
    }
    Ok(options)
}

fn input_file(f: &NamedFile) -> InputFile<'_> {
    InputFile {
        name: &f.name,
        bytes: &f.bytes,
    }
}

/// Upload a sweep: the file and its metadata; queues a fit.
#[utoipa::path(post, path = "/api/v1/sweeps", tag = "sweeps",
    request_body(content = UploadForm, content_type = "multipart/form-data"),
    responses(
        (status = 202, body = Accepted),
        (status = 401, body = super::problem::ProblemBody),
        (status = 403, body = super::problem::ProblemBody),
        (status = 413, body = super::problem::ProblemBody),
        (status = 422, description = "bad metadata or a file the reader refuses (with its line)", body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn upload(
    Inspector(caller): Inspector,
    State(state): State<AppState>,
    mut form: Multipart,
) -> ApiResult<impl IntoResponse> {
    let mut file: Option<NamedFile> = None;
    let mut fixture_open: Option<NamedFile> = None;
    let mut fixture_short: Option<NamedFile> = None;
    let mut fields = std::collections::HashMap::<String, String>::new();
    while let Some(field) = form.next_field().await.map_err(multipart_problem)? {
        let name = field.name().unwrap_or_default().to_string();
        match name.as_str() {
            "file" | "fixture_open" | "fixture_short" => {
                let file_name = field.file_name().map(str::to_string).ok_or_else(|| {
                    Problem::validation(format!(
                        "the {name} field needs a file name (its extension tells the format)"
                    ))
                })?;
                let bytes = field.bytes().await.map_err(multipart_problem)?;
                let named = NamedFile {
                    name: file_name,
                    bytes: bytes.to_vec(),
                };
                let slot = match name.as_str() {
                    "file" => &mut file,
                    "fixture_open" => &mut fixture_open,
                    _ => &mut fixture_short,
                };
                if slot.is_some() {
                    return Err(Problem::validation(format!(
                        "the field {name} is given twice"
                    )));
                }
                *slot = Some(named);
            }
            "part_number" | "lot" | "method" | "z0_ohm" | "dcr_ohm" | "temperature_c"
            | "operator" | "options" | "fixture_topology" => {
                if fields.contains_key(&name) {
                    return Err(Problem::validation(format!(
                        "the field {name} is given twice"
                    )));
                }
                let text = field.text().await.map_err(multipart_problem)?;
                fields.insert(name, text);
            }
            other => {
                return Err(Problem::validation(format!(
                    "unknown multipart field {other:?}"
                )));
            }
        }
    }
    let get = |n: &str| fields.get(n).map(String::as_str).unwrap_or("");
    let input = UploadInput {
        file,
        fixture_open,
        fixture_short,
        fixture_topology: get("fixture_topology").to_string(),
        part_number: get("part_number").to_string(),
        lot: get("lot").to_string(),
        method: get("method").to_string(),
        z0_ohm: number("z0_ohm", get("z0_ohm"))?,
        dcr_ohm: number("dcr_ohm", get("dcr_ohm"))?,
        temperature_c: number("temperature_c", get("temperature_c"))?,
        operator: get("operator").to_string(),
        options: get("options").to_string(),
    };
    let accepted = accept_upload(&state, &caller.label, input).await?;
    Ok((StatusCode::ACCEPTED, Json(accepted)))
}

/// An upload as given (multipart text fields or a gRPC message), before any check.
#[derive(Debug, Clone, Default)]
pub struct UploadInput {
    pub file: Option<NamedFile>,
    pub fixture_open: Option<NamedFile>,
    pub fixture_short: Option<NamedFile>,
    /// Empty for the default topology (only with both fixture files).
    pub fixture_topology: String,
    pub part_number: String,
    pub lot: String,
    pub method: String,
    pub z0_ohm: Option<f64>,
    pub dcr_ohm: Option<f64>,
    pub temperature_c: Option<f64>,
    pub operator: String,
    /// Fit options as JSON text; empty for the defaults.
    pub options: String,
}

fn finite(name: &str, v: Option<f64>) -> ApiResult<Option<f64>> {
    match v {
        Some(x) if !x.is_finite() => Err(Problem::validation(format!(
            "{name} must be a finite number (got {x})"
        ))),
        other => Ok(other),
    }
}

/// Checks a named file as uploaded: a short name without control characters, and some bytes.
fn checked_file(f: NamedFile) -> ApiResult<NamedFile> {
    let named = NamedFile {
        name: short_text("file name", &f.name, 255, true)?,
        bytes: f.bytes,
    };
    if named.bytes.is_empty() {
        return Err(Problem::new(
            Kind::BadSweepFile,
            format!("{} is empty", named.name),
        ));
    }
    Ok(named)
}

/// An upload's metadata after its checks: everything but the files.
#[derive(Debug, Clone, PartialEq)]
pub struct UploadFields {
    pub topology: Option<FixtureTopology>,
    pub part_number: String,
    pub lot: String,
    pub method: Option<Method>,
    pub z0_ohm: Option<f64>,
    pub dcr_ohm: Option<f64>,
    pub temperature_c: Option<f64>,
    pub operator: String,
    /// The effective fit options (with the DC reading), as stored.
    pub options_json: String,
}

/// Checks an upload's text fields and fit options; `has_open` and `has_short` say which fixture files
/// came with it. Pure (no I/O, no state), so the fuzz target `upload_fields` can call it.
pub fn check_upload_fields(
    input: &UploadInput,
    has_open: bool,
    has_short: bool,
) -> ApiResult<UploadFields> {
    let topology = match (has_open, has_short) {
        (false, false) => {
            if !input.fixture_topology.trim().is_empty() {
                return Err(Problem::validation(
                    "fixture_topology is given without the fixture_open and fixture_short files",
                ));
            }
            None
        }
        (true, true) => Some(match input.fixture_topology.trim() {
            "" => FixtureTopology::Approximate,
            t => FixtureTopology::parse(t).ok_or_else(|| {
                Problem::validation(format!(
                    "fixture_topology must be one of {}, not {t:?}",
                    FixtureTopology::ALL.map(FixtureTopology::as_str).join(", ")
                ))
            })?,
        }),
        _ => {
            return Err(Problem::validation(
                "fixture compensation needs both fixture_open and fixture_short files",
            ));
        }
    };
    let part_number = short_text("part_number", &input.part_number, 64, true)?;
    crate::store::parts::validate_part_number(&part_number).map_err(Problem::validation)?;
    let lot = short_text("lot", &input.lot, 64, true)?;
    let method = match input.method.trim() {
        "" => None,
        m => Some(parse_method(m).ok_or_else(|| {
            Problem::validation(format!(
                "method must be reflection, series-thru, shunt-thru or direct, not {m:?}"
            ))
        })?),
    };
    let z0_ohm = positive("z0_ohm", finite("z0_ohm", input.z0_ohm)?)?;
    let dcr_ohm = positive("dcr_ohm", finite("dcr_ohm", input.dcr_ohm)?)?;
    let temperature_c = finite("temperature_c", input.temperature_c)?;
    if let Some(t) = temperature_c
        && !(-273.15..=1000.0).contains(&t)
    {
        return Err(Problem::validation(format!(
            "temperature_c must lie in -273.15..1000 (got {t})"
        )));
    }
    let operator = short_text("operator", &input.operator, 128, false)?;
    let options = effective_options(parse_options(&input.options)?, dcr_ohm);
    let options_json = serde_json::to_string(&options).map_err(Problem::internal)?;
    Ok(UploadFields {
        topology,
        part_number,
        lot,
        method,
        z0_ohm,
        dcr_ohm,
        temperature_c,
        operator,
        options_json,
    })
}

/// Checks an upload completely (metadata, options, the files through the engine's reader, a sweep
/// long enough to fit), stores it and queues its fit; nothing is stored when any check fails. Shared
/// by the HTTP and gRPC interfaces.
pub async fn accept_upload(
    state: &AppState,
    actor: &str,
    mut input: UploadInput,
) -> ApiResult<Accepted> {
    let file = input.file.take().map(checked_file).transpose()?;
    let fixture_open = input.fixture_open.take().map(checked_file).transpose()?;
    let fixture_short = input.fixture_short.take().map(checked_file).transpose()?;
    let file = file.ok_or_else(|| Problem::validation("the multipart field file is missing"))?;
    let UploadFields {
        topology,
        part_number,
        lot,
        method,
        z0_ohm,
        dcr_ohm,
        temperature_c,
        operator,
        options_json,
    } = check_upload_fields(&input, fixture_open.is_some(), fixture_short.is_some())?;

    // Reading the files, hashing them and keying the duplicate check are CPU work: off the runtime.
    let engine = state.engine.clone();
    let read = ReadOptions {
        method,
        z0_ohm,
        ..ReadOptions::default()
    };
    let new = tokio::task::spawn_blocking(move || {
        let fixture = topology
            .zip(fixture_open.as_ref().zip(fixture_short.as_ref()))
            .map(|(topology, (open, short))| FixtureFiles {
                open: input_file(open),
                short: input_file(short),
                topology,
            });
        let sweep = read_input(engine.as_ref(), input_file(&file), fixture, &read)?;
        // The readers accept any length (converting is not fitting); an upload is for a fit.
        sweep.check_fittable().map_err(|error| InputError {
            file_name: file.name.clone(),
            error,
        })?;
        let method_text = serde_json::to_value(sweep.method)
            .ok()
            .and_then(|v| v.as_str().map(str::to_string))
            .unwrap_or_default();
        let options_key =
            duplicate_key_with_fixture(&options_json, &method_text, z0_ohm, fixture.as_ref());
        Ok::<NewSweep, InputError>(NewSweep {
            part_number,
            lot,
            sha256: sha256_hex(&file.bytes),
            file,
            options_key,
            method: method_text,
            z0_ohm,
            dcr_ohm,
            temperature_c,
            operator,
            fixture_topology: topology.map(|t| t.as_str().to_string()),
            fixture_open,
            fixture_short,
            points: sweep.frequency_hz.len(),
            options_json,
        })
    })
    .await
    .map_err(Problem::internal)?
    .map_err(|e| Problem {
        kind: Kind::BadSweepFile,
        detail: format!("{}: {}", e.file_name, e.error.message),
        line: e.error.line,
    })?;
    let up = state.store.upload(actor, new).await?;
    if !up.duplicate {
        state.jobs.wake();
    }
    Ok(Accepted {
        fit_id: up.fit_id,
        sweep_id: up.sweep_id,
        status_url: format!("/api/v1/fits/{}", up.fit_id),
        duplicate: up.duplicate,
    })
}

/// The uploaded file, byte for byte.
#[utoipa::path(get, path = "/api/v1/sweeps/{sweep_id}/file", tag = "sweeps",
    params(("sweep_id" = i64, Path)),
    responses((status = 200, content_type = "application/octet-stream", body = Vec<u8>),
        (status = 404, body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn sweep_file(
    _: Reader,
    State(state): State<AppState>,
    Path(sweep_id): Path<i64>,
) -> ApiResult<impl IntoResponse> {
    let f = state.store.sweep_file(sweep_id).await?;
    Ok((
        [
            (header::CONTENT_TYPE, "application/octet-stream".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{}\"", safe_file_name(&f.name)),
            ),
        ],
        f.bytes,
    ))
}

/// A file name safe inside a quoted header parameter.
/// A download file name that cannot name a path or break the header: the last component of what was
/// uploaded (after any `/` or `\\`), letters, digits, `.`, `-` and `_` only (anything else becomes
/// `_`), no leading dot, at most 120 characters; `download` when nothing is left.
pub fn safe_file_name(name: &str) -> String {
    let last = name.rsplit(['/', '\\']).next().unwrap_or_default();
    let cleaned: String = last
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '.' | '-' | '_') {
                c
            } else {
                '_'
            }
        })
        .collect();
    let trimmed: String = cleaned.trim_start_matches('.').chars().take(120).collect();
    if trimmed.chars().all(|c| c == '_' || c == '.') {
        "download".into()
    } else {
        trimmed
    }
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(upload))
        .routes(routes!(sweep_file))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn download_names_cannot_name_a_path_or_break_the_header() {
        for (given, want) in [
            ("lot-7_reflection.s1p", "lot-7_reflection.s1p"),
            ("../../etc/passwd", "passwd"),
            ("..\\..\\boot.ini", "boot.ini"),
            ("a\"; filename=evil.exe", "a___filename_evil.exe"),
            ("..", "download"),
            ("/", "download"),
            (".hidden.csv", "hidden.csv"),
            ("messung äöü.csv", "messung____.csv"),
            ("x\r\nSet-Cookie: a=b", "x__Set-Cookie__a_b"),
        ] {
            assert_eq!(safe_file_name(given), want, "{given:?}");
        }
        assert_eq!(safe_file_name(&"a".repeat(500)).len(), 120);
    }

    #[test]
    fn stored_options_read_back_to_the_same_json() {
        // Found by the fuzz target upload_fields: with serde_json's default (not correctly rounded)
        // float parsing, the stored "1.9e+49" read back as 1.9000000000000002e49, so the options a
        // worker parses were not the ones validated and stored.
        for text in [
            r#"{"report_frequencies_hz": [19000000000000000000000000000018339220632604081024,0]}"#,
            r#"{"report_frequencies_hz": [1.9e49, 3.3e-7], "time_limit_s": 0.1}"#,
        ] {
            let stored = serde_json::to_string(&parse_options(text).unwrap()).unwrap();
            let again = serde_json::to_string(&parse_options(&stored).unwrap()).unwrap();
            assert_eq!(again, stored);
        }
        let options = parse_options(r#"{"report_frequencies_hz": [1.9e49]}"#).unwrap();
        assert_eq!(options.report_frequencies_hz, vec![1.9e49]);
    }
}
