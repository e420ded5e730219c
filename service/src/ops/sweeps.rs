//! Uploads and stored sweep files: an upload is checked completely before anything is stored: every
//! metadata field, the options, and the file itself (read by the engine's sweep reader; its error and
//! line number go into the error), and that the sweep is long enough to fit. The text fields' checks
//! are pure functions ([`number`], [`check_upload_fields`]), which the fuzz target `upload_fields`
//! calls. HTTP (multipart) and gRPC (one message) both end in [`upload`].

use super::error::{ErrorKind, OpsError, OpsResult};
use super::exports::safe_file_name;
use crate::app::AppState;
use crate::fit::FitOptions;
use crate::jobs::engine::{FixtureFiles, FixtureTopology, InputError, InputFile, read_input};
use crate::jobs::{duplicate_key_with_fixture, effective_options, parse_method};
use crate::registry::ids::{LotCode, PART_NUMBER_MAX_CHARS, PartNumber};
use crate::store::jobs::PartRef;
use crate::store::sha256_hex;
use crate::store::sweeps::{NamedFile, NewSweep};
use crate::sweep::{Method, ReadOptions, Sweep};
use serde::Serialize;

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

/// A numeric multipart field: empty or `null` for none, else a finite number.
pub fn number(name: &str, text: &str) -> OpsResult<Option<f64>> {
    let t = text.trim();
    if t.is_empty() || t == "null" {
        return Ok(None);
    }
    t.parse::<f64>()
        .ok()
        .filter(|v| v.is_finite())
        .map(Some)
        .ok_or_else(|| OpsError::validation(format!("{name} must be a number, not {t:?}")))
}

fn positive(name: &str, v: Option<f64>) -> OpsResult<Option<f64>> {
    match v {
        Some(x) if x <= 0.0 => Err(OpsError::validation(format!(
            "{name} must be above zero (got {x})"
        ))),
        other => Ok(other),
    }
}

fn short_text(name: &str, text: &str, max: usize, required: bool) -> OpsResult<String> {
    let t = text.trim();
    if required && t.is_empty() {
        return Err(OpsError::validation(format!("{name} is required")));
    }
    if t.chars().count() > max || t.chars().any(char::is_control) {
        return Err(OpsError::validation(format!(
            "{name} must be at most {max} characters without control characters"
        )));
    }
    Ok(t.to_string())
}

/// Parses fit options, refusing keys the engine does not know (they would be silently ignored).
pub fn parse_options(text: &str) -> OpsResult<FitOptions> {
    if text.trim().is_empty() {
        return Ok(FitOptions::default());
    }
    let value: serde_json::Value = serde_json::from_str(text)
        .map_err(|e| OpsError::validation(format!("options is not JSON: {e}")))?;
    parse_options_value(value)
}

pub fn parse_options_value(value: serde_json::Value) -> OpsResult<FitOptions> {
    if value.is_null() {
        return Ok(FitOptions::default());
    }
    let Some(given) = value.as_object() else {
        return Err(OpsError::validation("options must be a JSON object"));
    };
    let options: FitOptions = serde_json::from_value(value.clone())
        .map_err(|e| OpsError::validation(format!("options: {e}")))?;
    let known = serde_json::to_value(&options).map_err(OpsError::internal)?;
    if let Some(unknown) = given.keys().find(|k| known.get(k.as_str()).is_none()) {
        return Err(OpsError::validation(format!(
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
pub fn checked_options(options: FitOptions, dcr_ohm: Option<f64>) -> OpsResult<FitOptions> {
    let options = effective_options(options, dcr_ohm);
    options.validate().map_err(|e| match e {
        crate::fit::FitError::InvalidOptions(text) => {
            OpsError::validation(format!("options: {text}"))
        }
        other => OpsError::validation(other.to_string()),
    })?;
    Ok(options)
}

fn input_file(f: &NamedFile) -> InputFile<'_> {
    InputFile {
        name: &f.name,
        bytes: &f.bytes,
    }
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

fn finite(name: &str, v: Option<f64>) -> OpsResult<Option<f64>> {
    match v {
        Some(x) if !x.is_finite() => Err(OpsError::validation(format!(
            "{name} must be a finite number (got {x})"
        ))),
        other => Ok(other),
    }
}

/// Checks a named file as uploaded: a short name without control characters, and some bytes.
fn checked_file(f: NamedFile) -> OpsResult<NamedFile> {
    let named = NamedFile {
        name: short_text("file name", &f.name, 255, true)?,
        bytes: f.bytes,
    };
    if named.bytes.is_empty() {
        return Err(OpsError::new(
            ErrorKind::BadSweepFile,
            format!("{} is empty", named.name),
        ));
    }
    Ok(named)
}

/// An upload's metadata after its checks: everything but the files.
#[derive(Debug, Clone, PartialEq)]
pub struct UploadFields {
    pub topology: Option<FixtureTopology>,
    pub part_number: PartNumber,
    pub lot: LotCode,
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
) -> OpsResult<UploadFields> {
    let topology = match (has_open, has_short) {
        (false, false) => {
            if !input.fixture_topology.trim().is_empty() {
                return Err(OpsError::validation(
                    "fixture_topology is given without the fixture_open and fixture_short files",
                ));
            }
            None
        }
        (true, true) => Some(match input.fixture_topology.trim() {
            "" => FixtureTopology::Approximate,
            t => FixtureTopology::parse(t).ok_or_else(|| {
                OpsError::validation(format!(
                    "fixture_topology must be one of {}, not {t:?}",
                    FixtureTopology::ALL.map(FixtureTopology::as_str).join(", ")
                ))
            })?,
        }),
        _ => {
            return Err(OpsError::validation(
                "fixture compensation needs both fixture_open and fixture_short files",
            ));
        }
    };
    // Trimmed and refused as any text field is (required, short, no control characters), then
    // parsed: the part number rule itself is `PartNumber::parse`.
    let part_number = short_text(
        "part_number",
        &input.part_number,
        PART_NUMBER_MAX_CHARS,
        true,
    )?;
    let part_number = PartNumber::parse(&part_number).map_err(OpsError::validation)?;
    let lot = LotCode::parse(&input.lot).map_err(OpsError::validation)?;
    let method = match input.method.trim() {
        "" => None,
        m => Some(parse_method(m).ok_or_else(|| {
            OpsError::validation(format!(
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
        return Err(OpsError::validation(format!(
            "temperature_c must lie in -273.15..1000 (got {t})"
        )));
    }
    if let Some(r) = dcr_ohm
        && r > MAX_DCR_OHM
    {
        return Err(OpsError::validation(format!(
            "dcr_ohm must be at most {MAX_DCR_OHM} Ω (got {r})"
        )));
    }
    if let Some(z0) = z0_ohm
        && z0 > MAX_Z0_OHM
    {
        return Err(OpsError::validation(format!(
            "z0_ohm must be at most {MAX_Z0_OHM} Ω (got {z0})"
        )));
    }
    let operator = short_text("operator", &input.operator, 128, false)?;
    let options = checked_options(parse_options(&input.options)?, dcr_ohm)?;
    let options_json = serde_json::to_string(&options).map_err(OpsError::internal)?;
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
pub async fn upload(state: &AppState, actor: &str, mut input: UploadInput) -> OpsResult<Accepted> {
    let file = input.file.take().map(checked_file).transpose()?;
    let fixture_open = input.fixture_open.take().map(checked_file).transpose()?;
    let fixture_short = input.fixture_short.take().map(checked_file).transpose()?;
    let file = file.ok_or_else(|| OpsError::validation("the multipart field file is missing"))?;
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
    // Reading waits for one of a few slots: uploads never take the CPU the fits need. The slot is
    // held for the reading only, not for the write after it, so the writes of several uploads can
    // share a commit while the next upload is read.
    let reading = state.backpressure.reading_slot().await;

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
        let new = NewSweep {
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
        };
        Ok::<(NewSweep, Sweep), InputError>((new, sweep))
    })
    .await
    .map_err(OpsError::internal)?
    .map_err(|e| OpsError {
        line: e.error.line,
        ..OpsError::new(
            ErrorKind::BadSweepFile,
            format!("{}: {}", e.file_name, e.error.message),
        )
    })?;
    drop(reading);
    let (new, sweep) = new;
    let bounds = state.backpressure.queue_bounds();
    let up = state.store.upload_bounded(actor, new, Some(bounds)).await?;
    if !up.duplicate {
        // Left for this process's worker, which then need not read the stored files again.
        state.jobs.leave_read_sweep(up.fit_id, sweep);
        state.jobs.wake();
    }
    Ok(Accepted {
        fit_id: up.fit_id,
        sweep_id: up.sweep_id,
        status_url: format!("/api/v1/fits/{}", up.fit_id),
        duplicate: up.duplicate,
    })
}

/// A stored sweep's file, byte for byte, with the name offered for download ([`safe_file_name`]).
pub async fn sweep_file(state: &AppState, sweep_id: i64) -> OpsResult<NamedFile> {
    let f = state.store.sweep_file(sweep_id).await?;
    Ok(NamedFile {
        name: safe_file_name(&f.name),
        bytes: f.bytes,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fields(part_number: &str, lot: &str) -> OpsResult<UploadFields> {
        let input = UploadInput {
            part_number: part_number.into(),
            lot: lot.into(),
            ..UploadInput::default()
        };
        check_upload_fields(&input, false, false)
    }

    #[test]
    fn an_uploads_part_number_and_lot_are_trimmed_then_parsed_with_their_own_refusals() {
        let f = fields(" PC-100 ", "  2024 W17 ").unwrap();
        assert_eq!(f.part_number.as_str(), "PC-100");
        assert_eq!(f.lot.as_str(), "2024 W17");
        for (part_number, lot, detail) in [
            ("", "L", "part_number is required".to_string()),
            (
                &"P".repeat(65)[..],
                "L",
                "part_number must be at most 64 characters without control characters".into(),
            ),
            (
                "bad part",
                "L",
                r#"part_number "bad part" must be 1 to 64 characters of letters, digits and -_.+/#"#
                    .into(),
            ),
            ("P-1", " ", "lot is required".into()),
            (
                "P-1",
                "L\u{0}1",
                "lot must be at most 64 characters without control characters".into(),
            ),
        ] {
            let e = fields(part_number, lot).unwrap_err();
            assert_eq!(e.kind, ErrorKind::Validation, "{part_number:?} {lot:?}");
            assert_eq!(e.detail, detail);
        }
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
