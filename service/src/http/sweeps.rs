//! `POST /api/v1/sweeps` (upload a sweep, queue its fit) and `GET /api/v1/sweeps/{sweep_id}/file`.
//!
//! The handler reads the multipart form into an [`UploadInput`] (spooling files, refusing early when
//! the service or the named part is at a bound) and hands it to [`ops::sweeps::upload`], which checks
//! it completely before anything is stored.

use super::auth::{Inspector, Reader};
use crate::app::AppState;
use crate::ops::sweeps::{Accepted, UploadInput, number};
use crate::ops::{self, OpsError, OpsResult};
use crate::registry::ids::PartNumber;
use crate::store::jobs::PartRef;
use crate::store::sweeps::NamedFile;
use axum::Json;
use axum::extract::multipart::MultipartError;
use axum::extract::{Multipart, Path, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::IntoResponse;
use utoipa_axum::{router::OpenApiRouter, routes};

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
    /// Free text; no NUL character (U+0000).
    #[schema(pattern = r"^[^\x00]*$")]
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

fn multipart_problem(e: MultipartError) -> OpsError {
    if e.status() == StatusCode::PAYLOAD_TOO_LARGE {
        OpsError::new(ops::ErrorKind::PayloadTooLarge, e.body_text())
    } else {
        OpsError::validation(format!("the multipart body: {}", e.body_text()))
    }
}

/// A file field's bytes: spooled to an anonymous temporary file while they arrive (the body limit
/// applies to the stream), then read back once into a buffer of exactly their size, so an upload in
/// flight holds one copy of its file in memory, not the growing buffer and a copy of it.
async fn spool(mut field: axum::extract::multipart::Field<'_>) -> OpsResult<Vec<u8>> {
    use tokio::io::{AsyncReadExt, AsyncSeekExt, AsyncWriteExt};
    let spool = tempfile::tempfile().map_err(OpsError::internal)?;
    let mut spool = tokio::fs::File::from_std(spool);
    let mut size = 0usize;
    while let Some(chunk) = field.chunk().await.map_err(multipart_problem)? {
        size += chunk.len();
        spool.write_all(&chunk).await.map_err(OpsError::internal)?;
    }
    spool.flush().await.map_err(OpsError::internal)?;
    spool
        .seek(std::io::SeekFrom::Start(0))
        .await
        .map_err(OpsError::internal)?;
    let mut bytes = Vec::with_capacity(size);
    spool
        .read_to_end(&mut bytes)
        .await
        .map_err(OpsError::internal)?;
    Ok(bytes)
}

/// `refusal`, after reading the rest of the body into the void (not into memory or a file): most
/// clients send the whole body before they read an answer, and one closed while it is still sending
/// sees a broken connection instead of the refusal and its Retry-After. The body limit and the request
/// timeout still bound what is read.
async fn drained(form: &mut Multipart, refusal: OpsError) -> OpsError {
    while let Ok(Some(mut field)) = form.next_field().await {
        while let Ok(Some(_)) = field.chunk().await {}
    }
    refusal
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
) -> OpsResult<impl IntoResponse> {
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
        .check_queue(&state.store, PartRef::Unnamed)
        .await
    {
        return Err(drained(&mut form, p).await);
    }
    let input = read_form(&state, &mut form).await?;
    let accepted = ops::sweeps::upload(&state, &caller.label, input).await?;
    Ok((StatusCode::ACCEPTED, Json(accepted)))
}

/// The multipart form as an [`UploadInput`]: files spooled, text fields checked to be UTF-8 and given
/// once, unknown fields refused. A part already at its bound is refused before its file is spooled or
/// read, when the form names the part first.
async fn read_form(state: &AppState, form: &mut Multipart) -> OpsResult<UploadInput> {
    let mut file: Option<NamedFile> = None;
    let mut fixture_open: Option<NamedFile> = None;
    let mut fixture_short: Option<NamedFile> = None;
    let mut fields = std::collections::HashMap::<String, String>::new();
    while let Some(field) = form.next_field().await.map_err(multipart_problem)? {
        let name = field.name().unwrap_or_default().to_string();
        match name.as_str() {
            "file" | "fixture_open" | "fixture_short" => {
                let file_name = field.file_name().map(str::to_string).ok_or_else(|| {
                    OpsError::validation(format!(
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
                    return Err(OpsError::validation(format!(
                        "the field {name} is given twice"
                    )));
                }
                *slot = Some(named);
            }
            "part_number" | "lot" | "method" | "z0_ohm" | "dcr_ohm" | "temperature_c"
            | "operator" | "options" | "fixture_topology" => {
                if fields.contains_key(&name) {
                    return Err(OpsError::validation(format!(
                        "the field {name} is given twice"
                    )));
                }
                // Read as bytes and checked: `text()` would replace invalid UTF-8 silently.
                let bytes = field.bytes().await.map_err(multipart_problem)?;
                let text = String::from_utf8(bytes.to_vec()).map_err(|e| {
                    OpsError::validation(format!(
                        "the field {name} is not UTF-8 text (invalid byte at position {})",
                        e.utf8_error().valid_up_to()
                    ))
                })?;
                // A part number that does not parse names no part: only the service's bound
                // applies until the upload is refused for it.
                if name == "part_number"
                    && file.is_none()
                    && let Err(p) = state
                        .backpressure
                        .check_queue(
                            &state.store,
                            PartNumber::parse(text.trim())
                                .as_ref()
                                .map_or(PartRef::Unnamed, PartRef::Number),
                        )
                        .await
                {
                    return Err(drained(form, p).await);
                }
                fields.insert(name, text);
            }
            other => {
                return Err(OpsError::validation(format!(
                    "unknown multipart field {other:?}"
                )));
            }
        }
    }
    let get = |n: &str| fields.get(n).map(String::as_str).unwrap_or("");
    Ok(UploadInput {
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
) -> OpsResult<impl IntoResponse> {
    let f = ops::sweeps::sweep_file(&state, sweep_id).await?;
    Ok((
        [
            (header::CONTENT_TYPE, "application/octet-stream".to_string()),
            (
                header::CONTENT_DISPOSITION,
                format!("attachment; filename=\"{}\"", f.name),
            ),
        ],
        f.bytes,
    ))
}

pub fn router() -> OpenApiRouter<AppState> {
    OpenApiRouter::new()
        .routes(routes!(upload))
        .routes(routes!(sweep_file))
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
