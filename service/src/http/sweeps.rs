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
use crate::store::jobs::PartRef;
use crate::store::sha256_hex;
use crate::store::sweeps::{NamedFile, NewSweep};
use crate::sweep::{Method, ReadOptions};
use axum::Json;
use axum::extract::multipart::MultipartError;
use axum::extract::{Multipart, Path, State};
use axum::http::{HeaderMap, StatusCode, header};
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
    #[schema(pattern = r"^[A-Za-z0-9_.+/#-]{1,64}$")]
    part_number: String,
    /// 1 to 64 characters (surrounding spaces are trimmed), no control characters.
    #[schema(pattern = r"^\s*[^\x00-\x1f\x7f\s][^\x00-\x1f\x7f]{0,63}$")]
    lot: String,
    /// reflection, series-thru, shunt-thru or direct; needed for 2-port files.
    method: Option<String>,
    /// Overrides the file's reference impedance.
    #[schema(exclusive_minimum = 0.0)]
    z0_ohm: Option<f64>,
    /// A separate four-wire DC resistance reading.
    #[schema(exclusive_minimum = 0.0)]
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

/// A file field's bytes: spooled to an anonymous temporary file while they arrive (the body limit
/// applies to the stream), then read back once into a buffer of exactly their size, so an upload in
/// flight holds one copy of its file in memory, not the growing buffer and a copy of it.
async fn spool(mut field: axum::extract::multipart::Field<'_>) -> ApiResult<Vec<u8>> {
    use tokio::io::{AsyncReadExt, AsyncSeekExt, AsyncWriteExt};
    let spool = tempfile::tempfile().map_err(Problem::internal)?;
    let mut spool = tokio::fs::File::from_std(spool);
    let mut size = 0usize;
    while let Some(chunk) = field.chunk().await.map_err(multipart_problem)? {
        size += chunk.len();
        spool.write_all(&chunk).await.map_err(Problem::internal)?;
    }
    spool.flush().await.map_err(Problem::internal)?;
    spool
        .seek(std::io::SeekFrom::Start(0))
        .await
        .map_err(Problem::internal)?;
    let mut bytes = Vec::with_capacity(size);
    spool
        .read_to_end(&mut bytes)
        .await
        .map_err(Problem::internal)?;
    Ok(bytes)
}

/// `refusal`, after reading the rest of the body into the void (not into memory or a file): most
/// clients send the whole body before they read an answer, and one closed while it is still sending
/// sees a broken connection instead of the refusal and its Retry-After. The body limit and the request
/// timeout still bound what is read.
async fn drained(form: &mut Multipart, refusal: Problem) -> Problem {
    while let Ok(Some(mut field)) = form.next_field().await {
        while let Ok(Some(_)) = field.chunk().await {}
    }
    refusal
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

/// The largest reference impedance an upload may state. Common practice (no source): instruments and
/// fixtures use 50 Ω or 75 Ω; anything above 10 kΩ is a typing slip, not a measurement setup.
pub const MAX_Z0_OHM: f64 = 1e4;

/// The largest DC resistance reading an upload may state, the bound [`FitOptions::validate`] puts on a
/// DCR reading (an inductor's winding of more than 1 MΩ is no inductor).
pub const MAX_DCR_OHM: f64 = 1e6;

/// The options a fit will run with (the caller's, with the upload's DC reading), checked completely by
/// [`FitOptions::validate`] before anything is stored: the problem names the option and its range.
pub fn checked_options(options: FitOptions, dcr_ohm: Option<f64>) -> ApiResult<FitOptions> {
    let options = effective_options(options, dcr_ohm);
    options.validate().map_err(|e| match e {
        crate::fit::FitError::InvalidOptions(text) => {
            Problem::validation(format!("options: {text}"))
        }
        other => Problem::validation(other.to_string()),
    })?;
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
        (status = 422, description = "bad metadata or options, or a file the reader refuses (with its line)", body = super::problem::ProblemBody),
        (status = 429, description = "the part has as many fits queued as it may (Retry-After)", body = super::problem::ProblemBody),
        (status = 503, description = "the service's queue or upload bytes in flight are at their bound (Retry-After)", body = super::problem::ProblemBody)),
    security(("bearer" = [])))]
async fn upload(
    Inspector(caller): Inspector,
    State(state): State<AppState>,
    headers: HeaderMap,
    mut form: Multipart,
) -> ApiResult<impl IntoResponse> {
    // The bytes this upload may bring (its stated length, else the body limit) are reserved before any
    // is read, and a full queue is refused before reading the body at all.
    let stated = headers
        .get(header::CONTENT_LENGTH)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.parse::<u64>().ok())
        .unwrap_or(state.settings.max_body_bytes as u64)
        .min(state.settings.max_body_bytes as u64);
    let _bytes = match state.backpressure.reserve_upload_bytes(stated) {
        Ok(permit) => permit,
        Err(p) => return Err(drained(&mut form, p).await),
    };
    if let Err(p) = state
        .backpressure
        .check_queue(&state.store, PartRef::Number(""))
        .await
    {
        return Err(drained(&mut form, p).await);
    }
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
                let named = NamedFile {
                    name: file_name,
                    bytes: spool(field).await?,
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
                // Read as bytes and checked: `text()` would replace invalid UTF-8 silently.
                let bytes = field.bytes().await.map_err(multipart_problem)?;
                let text = String::from_utf8(bytes.to_vec()).map_err(|e| {
                    Problem::validation(format!(
                        "the field {name} is not UTF-8 text (invalid byte at position {})",
                        e.utf8_error().valid_up_to()
                    ))
                })?;
                // A part already at its bound is refused before its file is spooled or read, when
                // the form names the part first.
                if name == "part_number"
                    && file.is_none()
                    && let Err(p) = state
                        .backpressure
                        .check_queue(&state.store, PartRef::Number(text.trim()))
                        .await
                {
                    return Err(drained(&mut form, p).await);
                }
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
    if let Some(r) = dcr_ohm
        && r > MAX_DCR_OHM
    {
        return Err(Problem::validation(format!(
            "dcr_ohm must be at most {MAX_DCR_OHM} Ω (got {r})"
        )));
    }
    if let Some(z0) = z0_ohm
        && z0 > MAX_Z0_OHM
    {
        return Err(Problem::validation(format!(
            "z0_ohm must be at most {MAX_Z0_OHM} Ω (got {z0})"
        )));
    }
    let operator = short_text("operator", &input.operator, 128, false)?;
    let options = checked_options(parse_options(&input.options)?, dcr_ohm)?;
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
    state
        .backpressure
        .check_queue(&state.store, PartRef::Number(&part_number))
        .await?;
    // Reading waits for one of a few slots: uploads never take the CPU the fits need.
    let _reading = state.backpressure.reading_slot().await;

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
        line: e.error.line,
        ..Problem::new(
            Kind::BadSweepFile,
            format!("{}: {}", e.file_name, e.error.message),
        )
    })?;
    let bounds = state.backpressure.queue_bounds();
    let up = state.store.upload_bounded(actor, new, Some(bounds)).await?;
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

// Describes `FitOptions` in the OpenAPI document only: requests are read into `FitOptions` by
// `parse_options_value`, and `fit_options_body_names_every_option` keeps the two field lists the same.
/// The fit options: every field optional (absent fields take the defaults), unknown fields refused.
/// Relations between fields are checked too, though they cannot be written here: a toroid's inner
/// diameter below its outer, a gap shorter than the magnetic path, a DCR σ at most ten times the
/// reading, a rational order the sweep's points can carry.
#[allow(dead_code)]
#[derive(Debug, serde::Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct FitOptionsBody {
    /// `lumped` (default) or `rational`.
    #[schema(pattern = r"^(lumped|rational)$")]
    pub family: Option<String>,
    /// A four-wire DC resistance reading that pins `rdc_ohm`.
    pub dcr: Option<DcrReadingBody>,
    /// Most extra resonant sections model selection may add (default 3).
    #[schema(minimum = 0, maximum = 3)]
    pub max_sections: Option<u32>,
    /// Default 200.
    #[schema(minimum = 1, maximum = 100000)]
    pub max_iterations: Option<u32>,
    /// Wall-clock bound for the whole fit, in seconds (default 10).
    #[schema(exclusive_minimum = 0.0, maximum = 3600.0)]
    pub time_limit_s: Option<f64>,
    /// Frequencies at which the report gives effective L and Q (at most 1000, each above 0 and at most
    /// 1 THz).
    #[schema(max_items = 1000, inline)]
    pub report_frequencies_hz: Option<Vec<PositiveFrequency>>,
    /// Rational fits: a fixed order; absent or null grows the order automatically.
    #[schema(minimum = 1, maximum = 60)]
    pub rational_order: Option<u32>,
    /// Rational fits: the highest order automatic selection tries (default 30).
    #[schema(minimum = 2, maximum = 60)]
    pub rational_max_order: Option<u32>,
    /// Rational fits: automatic selection stops at the first order at or below this weighted RMS
    /// error (default 1).
    #[schema(exclusive_minimum = 0.0)]
    pub rational_target_rms_weighted: Option<f64>,
    /// Rational fits: most pole relocations per order (default 30).
    #[schema(minimum = 1, maximum = 1000)]
    pub rational_max_relocations: Option<u32>,
    /// Rational fits: the fraction by which passivity enforcement may raise the weighted RMS error
    /// (default 0.1).
    #[schema(minimum = 0.0, maximum = 10.0)]
    pub passivity_rms_allowance: Option<f64>,
    /// For the service: a lumped fit whose weighted RMS error ends above this is followed by a
    /// rational fit of the same sweep (default 3; null never).
    #[schema(exclusive_minimum = 0.0)]
    pub rational_fallback_above_rms_weighted: Option<f64>,
    /// How the part is built: turns and core, for the core material's permeability spectrum.
    pub construction: Option<ConstructionBody>,
}

/// A frequency above 0 Hz and at most 1 THz.
#[allow(dead_code)]
#[derive(Debug, serde::Deserialize, utoipa::ToSchema)]
#[schema(value_type = f64, exclusive_minimum = 0.0, maximum = 1e12)]
pub struct PositiveFrequency(pub f64);

#[allow(dead_code)]
#[derive(Debug, serde::Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct DcrReadingBody {
    #[schema(exclusive_minimum = 0.0, maximum = 1e6)]
    pub value_ohm: f64,
    /// Standard uncertainty; when absent, 0.5 % of the value plus 1 mΩ.
    #[schema(exclusive_minimum = 0.0)]
    pub sigma_ohm: Option<f64>,
}

#[allow(dead_code)]
#[derive(Debug, serde::Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields)]
pub struct ConstructionBody {
    #[schema(minimum = 1.0, maximum = 100000.0)]
    pub turns: f64,
    pub core: CoreShapeBody,
    /// Air gap, shorter than the magnetic path.
    #[schema(minimum = 0.0)]
    pub gap_m: Option<f64>,
    #[schema(minimum = 1.0, maximum = 1000000.0)]
    pub nominal_initial_permeability: Option<f64>,
}

/// A toroid by its three dimensions, or any core by its effective area and path.
#[allow(dead_code)]
#[derive(Debug, serde::Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum CoreShapeBody {
    Toroid {
        #[schema(minimum = 0.00001, maximum = 10.0)]
        outer_diameter_m: f64,
        #[schema(minimum = 0.00001, maximum = 10.0)]
        inner_diameter_m: f64,
        #[schema(minimum = 0.00001, maximum = 10.0)]
        height_m: f64,
    },
    Effective {
        #[schema(minimum = 0.000000000001, maximum = 1.0)]
        area_m2: f64,
        #[schema(minimum = 0.00001, maximum = 10.0)]
        path_m: f64,
    },
}

#[cfg(test)]
mod options_body_tests {
    use crate::fit::FitOptions;

    /// Every option the engine reads is in the documented body, and nothing else.
    #[test]
    fn fit_options_body_names_every_option() {
        let options = FitOptions {
            construction: Some(crate::model::material::Construction {
                turns: 1.0,
                core: crate::model::material::CoreShape::Effective {
                    area_m2: 1e-5,
                    path_m: 0.05,
                },
                gap_m: None,
                nominal_initial_permeability: None,
            }),
            ..FitOptions::default()
        };
        let engine: std::collections::BTreeSet<String> = serde_json::to_value(&options)
            .unwrap()
            .as_object()
            .unwrap()
            .keys()
            .cloned()
            .collect();
        let api = crate::http::openapi();
        let doc = serde_json::to_value(&api).unwrap();
        let documented: std::collections::BTreeSet<String> =
            doc["components"]["schemas"]["FitOptionsBody"]["properties"]
                .as_object()
                .expect("FitOptionsBody is documented")
                .keys()
                .cloned()
                .collect();
        assert_eq!(engine, documented);
    }
}
