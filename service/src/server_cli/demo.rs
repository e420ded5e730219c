//! `henrybook demo`: the service on a local demo database, loaded through its own HTTP API with the
//! invented parts and sweeps of `demo-data/manifest.json` (described in demo-data/README.md), then a table of
//! results and verdicts, a band query, and tokens to explore with; serves until Ctrl-C.
//! Running it again reuses the database: existing parts and identical uploads are recognised.

use crate::app::Application;
use crate::settings::Settings;
use crate::store::tokens::Role;
use anyhow::{Context, bail};
use serde_json::{Value, json};
use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::{Duration, Instant};

#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Folder for the demo database (created when missing).
    #[arg(long, default_value = ".henrybook-demo")]
    pub folder: PathBuf,
    /// The demo data folder holding manifest.json.
    #[arg(long, default_value = "demo-data")]
    pub data: PathBuf,
    /// Address to serve on.
    #[arg(long, env = "HENRYBOOK_LISTEN", default_value = "127.0.0.1:8480")]
    pub listen: SocketAddr,
    /// Address of the gRPC interface.
    #[arg(long, env = "HENRYBOOK_GRPC_LISTEN", default_value = "127.0.0.1:8481")]
    pub grpc_listen: SocketAddr,
    /// Load, print, and stop instead of serving until Ctrl-C.
    #[arg(long)]
    pub no_serve: bool,
}

struct Client {
    http: reqwest::Client,
    base: String,
}

impl Client {
    async fn json(&self, req: reqwest::RequestBuilder) -> anyhow::Result<(u16, Value)> {
        let r = req
            .send()
            .await
            .context("the demo cannot reach its own service")?;
        let status = r.status().as_u16();
        let body = r.json::<Value>().await.unwrap_or(Value::Null);
        Ok((status, body))
    }
    async fn get(&self, path: &str, token: &str) -> anyhow::Result<Value> {
        let (status, body) = self
            .json(
                self.http
                    .get(format!("{}{path}", self.base))
                    .bearer_auth(token),
            )
            .await?;
        if status != 200 {
            bail!("GET {path}: {status} {body}");
        }
        Ok(body)
    }
}

fn field(v: &Value) -> Option<String> {
    match v {
        Value::Null => None,
        Value::String(s) => Some(s.clone()),
        other => Some(other.to_string()),
    }
}

/// A value with an SI prefix chosen for it ([`crate::units::eng`]), or "-" when there is none.
fn fmt_si(v: Option<f64>, unit: &str) -> String {
    v.filter(|x| x.is_finite())
        .map_or_else(|| "-".to_string(), |x| crate::units::eng(x, unit))
}

/// One line of the demo's result table: a fit with its model, verdict and largest drift.
fn print_fit_row(part: &str, f: &Value) {
    let model = &f["report"]["model"];
    let failed: Vec<String> = f["verdict_checks"]
        .as_array()
        .cloned()
        .unwrap_or_default()
        .iter()
        .filter(|k| k["pass"] == false)
        .map(|k| k["limit"].as_str().unwrap_or_default().to_string())
        .collect();
    // The parameter that moved most against the baseline in units of its combined σ, with its
    // change in percent.
    let drift = f["drift"]["parameters"].as_array().and_then(|ps| {
        ps.iter()
            .filter_map(|p| {
                Some((
                    p["name"].as_str()?.to_string(),
                    p["percent"].as_f64()?,
                    p["sigma"].as_f64()?,
                ))
            })
            .max_by(|a, b| a.2.abs().total_cmp(&b.2.abs()))
    });
    let status = f["status"].as_str().unwrap_or_default();
    println!(
        "{:<14} {:<7} {:>4} {:>3} {:<8} {:<10} {:<5} {:>11} {:>11} {:>11} {:>6} {:<8} {:<26} {}",
        part,
        f["lot"].as_str().unwrap_or_default(),
        f["fit_id"],
        f["revision"],
        model["kind"].as_str().unwrap_or("-"),
        status,
        f["quality"].as_str().unwrap_or("-"),
        fmt_si(f["srf_hz"].as_f64(), "Hz"),
        fmt_si(model["l0_h"].as_f64(), "H"),
        fmt_si(model["rdc_ohm"].as_f64(), "Ω"),
        f["report"]["quality"]["rms_weighted"]
            .as_f64()
            .map_or("-".to_string(), |r| format!("{r:.2}")),
        f["verdict"].as_str().unwrap_or("-"),
        drift.map_or("-".to_string(), |(name, pct, sigma)| format!(
            "{name} {pct:+.1} % ({sigma:+.0}σ)"
        )),
        if status == "failed" {
            f["error"].as_str().unwrap_or_default().to_string()
        } else {
            failed.join(", ")
        }
    );
}

/// The demo's tokens, one per role (created in the demo database on every run).
struct Tokens {
    reader: String,
    inspector: String,
    engineer: String,
}

/// A sweep uploaded by the demo: its part, lot and fit.
struct Uploaded {
    part: String,
    fit_id: i64,
}

/// The longest the demo waits for its fits.
const FIT_DEADLINE: Duration = Duration::from_secs(300);

pub async fn run(args: DemoArgs) -> anyhow::Result<()> {
    super::init_tracing(crate::settings::LogFormat::Text);
    let manifest = read_manifest(&args.data)?;

    let mut settings = Settings::new(args.folder.join("henrybook-demo.db"));
    settings.listen = args.listen;
    settings.grpc_listen = args.grpc_listen;
    let app = Application::build(settings).await?;
    let base = format!("http://{}", app.address());
    let grpc_address = app.grpc_address();
    let tokens = demo_tokens(app.store()).await?;
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let serve_forever = !args.no_serve;
    let server = tokio::spawn(app.run(async move {
        if serve_forever {
            tokio::select! {
                _ = tokio::signal::ctrl_c() => {},
                _ = stop_rx => {},
            }
        } else {
            let _ = stop_rx.await;
        }
    }));
    let c = Client {
        http: reqwest::Client::new(),
        base: base.clone(),
    };

    if let Some(s) = manifest["scenario"].as_str() {
        println!("\n{s}\n");
    }
    let parts = manifest["parts"].as_array().cloned().unwrap_or_default();
    let (fits, to_approve) = upload_all(&c, &tokens, &parts, &args.data).await?;
    println!(
        "uploaded {} sweeps of {} parts through {base}/api/v1/sweeps; fitting…",
        fits.len(),
        parts.len()
    );
    let started = Instant::now();
    wait_for_fits(&c, &tokens.reader, &fits, started).await?;
    approve_lots(&c, &tokens, &fits, &to_approve).await?;
    wait_for_queue(&c, &tokens.reader, started).await?;

    let mut seen_parts = Vec::new();
    for f in &fits {
        if !seen_parts.contains(&f.part) {
            seen_parts.push(f.part.clone());
        }
    }
    print_results(&c, &tokens.reader, &seen_parts).await?;
    let query = print_band_query(&c, &tokens.reader).await?;
    print_out_of_control(&c, &tokens.reader, &seen_parts).await?;
    print_failing_reports(&c, &tokens.reader).await?;
    print_access(&base, grpc_address, &tokens, query);
    if serve_forever {
        println!(
            "\nServing until Ctrl-C (database: {}).",
            args.folder.display()
        );
    } else {
        let _ = stop_tx.send(());
    }
    server.await.context("the demo server stopped")??;
    Ok(())
}

fn read_manifest(data: &std::path::Path) -> anyhow::Result<Value> {
    let manifest_path = data.join("manifest.json");
    let bytes = std::fs::read(&manifest_path).with_context(|| {
        format!(
            "cannot read {} (run the demo from the repository root)",
            manifest_path.display()
        )
    })?;
    serde_json::from_slice(&bytes)
        .with_context(|| format!("{} is not JSON", manifest_path.display()))
}

async fn demo_tokens(store: &crate::store::Backend) -> anyhow::Result<Tokens> {
    let mut tokens = Vec::new();
    for role in Role::ALL {
        tokens.push(
            store
                .create_token(role, Some(&format!("demo-{}", role.as_str())))
                .await?
                .1,
        );
    }
    let [reader, inspector, engineer]: [String; 3] = tokens
        .try_into()
        .map_err(|_| anyhow::anyhow!("one token per role"))?;
    Ok(Tokens {
        reader,
        inspector,
        engineer,
    })
}

/// Creates every part of the manifest (or finds it) and uploads its sweeps; returns the fits in
/// upload order and those the manifest marks `"approve": true`.
async fn upload_all(
    c: &Client,
    tokens: &Tokens,
    parts: &[Value],
    data: &std::path::Path,
) -> anyhow::Result<(Vec<Uploaded>, Vec<i64>)> {
    let base = &c.base;
    let mut fits = Vec::new();
    // Fits the manifest marks `"approve": true`: the engineer releases those lots in upload order.
    let mut to_approve: Vec<i64> = Vec::new();
    for p in parts {
        let part_number = p["part_number"].as_str().unwrap_or_default().to_string();
        let (status, body) = c
            .json(
                c.http
                    .post(format!("{base}/api/v1/parts"))
                    .bearer_auth(&tokens.engineer)
                    .json(
                        &json!({"part_number": part_number, "description": p["description"],
                                  "limits": p["limits"]}),
                    ),
            )
            .await?;
        if status != 201 && status != 409 {
            bail!("creating part {part_number}: {status} {body}");
        }
        for s in p["sweeps"].as_array().cloned().unwrap_or_default() {
            let fit_id = upload_sweep(c, &tokens.inspector, &part_number, &s, data).await?;
            if s["approve"].as_bool() == Some(true) {
                to_approve.push(fit_id);
            }
            fits.push(Uploaded {
                part: part_number.clone(),
                fit_id,
            });
        }
    }
    Ok((fits, to_approve))
}

/// Uploads one sweep of the manifest as a multipart form; returns its fit's id.
async fn upload_sweep(
    c: &Client,
    inspector: &str,
    part_number: &str,
    s: &Value,
    data: &std::path::Path,
) -> anyhow::Result<i64> {
    let rel = s["file"].as_str().unwrap_or_default();
    let path = data.join(rel);
    let bytes = std::fs::read(&path).with_context(|| format!("cannot read {}", path.display()))?;
    let file_name = path
        .file_name()
        .map(|n| n.to_string_lossy().to_string())
        .unwrap_or_else(|| rel.to_string());
    let lot = field(&s["lot"]).unwrap_or_default();
    let mut form = reqwest::multipart::Form::new()
        .part(
            "file",
            reqwest::multipart::Part::bytes(bytes).file_name(file_name),
        )
        .text("part_number", part_number.to_string())
        .text("lot", lot);
    for key in ["method", "z0_ohm", "dcr_ohm", "temperature_c", "operator"] {
        if let Some(v) = field(&s[key]) {
            form = form.text(key, v);
        }
    }
    let (status, body) = c
        .json(
            c.http
                .post(format!("{}/api/v1/sweeps", c.base))
                .bearer_auth(inspector)
                .multipart(form),
        )
        .await?;
    if status != 202 {
        bail!("uploading {rel}: {status} {body}");
    }
    Ok(body["fit_id"].as_i64().unwrap_or_default())
}

async fn wait_for_fits(
    c: &Client,
    reader: &str,
    fits: &[Uploaded],
    started: Instant,
) -> anyhow::Result<()> {
    for f in fits {
        loop {
            let f = c.get(&format!("/api/v1/fits/{}", f.fit_id), reader).await?;
            let st = f["status"].as_str().unwrap_or_default();
            if st != "queued" && st != "running" {
                break;
            }
            if started.elapsed() > FIT_DEADLINE {
                bail!("the fits did not finish within 5 minutes");
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }
    Ok(())
}

/// The first lot of each part, and every lot the manifest marks, is approved in upload order (the
/// newest approved lot is the baseline design tools are answered from), so a later lot shows drift
/// and the part's trend has control limits. A lot that fails its limits or whose model is poor is
/// not approved: the service refuses it without an override, and the demo says so.
async fn approve_lots(
    c: &Client,
    tokens: &Tokens,
    fits: &[Uploaded],
    to_approve: &[i64],
) -> anyhow::Result<()> {
    let mut baseline_done = std::collections::HashSet::new();
    for Uploaded { part, fit_id: id } in fits {
        let first = baseline_done.insert(part.clone());
        if !(first || to_approve.contains(id)) {
            continue;
        }
        let part_now = c
            .get(&format!("/api/v1/parts/{part}"), &tokens.reader)
            .await?;
        if first && !part_now["baseline_fit_id"].is_null() {
            continue;
        }
        let (status, body) = c
            .json(
                c.http
                    .post(format!("{}/api/v1/fits/{id}/approve", c.base))
                    .bearer_auth(&tokens.engineer)
                    .json(&json!({"reason": if first {
                        "demo: the first lot is the qualification baseline"
                    } else {
                        "demo: lot released at incoming inspection"
                    }})),
            )
            .await?;
        if status != 200 {
            println!(
                "  (could not approve fit {id} of {part}: {status} {})",
                body["detail"]
            );
        }
    }
    Ok(())
}

/// Lumped fits that miss their data queue a rational revision: waits for those too.
async fn wait_for_queue(c: &Client, reader: &str, started: Instant) -> anyhow::Result<()> {
    loop {
        let q = c.get("/api/v1/queue", reader).await?;
        let busy = q["queued"].as_i64().unwrap_or(0) + q["running"].as_i64().unwrap_or(0);
        if busy == 0 {
            return Ok(());
        }
        if started.elapsed() > FIT_DEADLINE {
            bail!("the fits did not finish within 5 minutes");
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// The table of every fit of every part, revisions included.
async fn print_results(c: &Client, reader: &str, parts: &[String]) -> anyhow::Result<()> {
    println!(
        "\n{:<14} {:<7} {:>4} {:>3} {:<8} {:<10} {:<5} {:>11} {:>11} {:>11} {:>6} {:<8} {:<26} failed limits",
        "part",
        "lot",
        "fit",
        "rev",
        "family",
        "status",
        "fit",
        "SRF",
        "L0",
        "Rdc",
        "RMS/σ",
        "verdict",
        "largest drift vs baseline"
    );
    for part in parts {
        let p = c.get(&format!("/api/v1/parts/{part}"), reader).await?;
        let mut ids: Vec<i64> = p["fits"]
            .as_array()
            .cloned()
            .unwrap_or_default()
            .iter()
            .filter_map(|f| f["fit_id"].as_i64())
            .collect();
        ids.sort_unstable();
        for id in ids {
            let f = c.get(&format!("/api/v1/fits/{id}"), reader).await?;
            print_fit_row(part, &f);
        }
    }
    Ok(())
}

/// A band query on the approved baselines; returns the query's path for the curl example.
async fn print_band_query(c: &Client, reader: &str) -> anyhow::Result<&'static str> {
    let query = "/api/v1/parts?srf_min_hz=1e7&srf_max_hz=1e8&sort=srf_hz";
    let band = c.get(query, reader).await?;
    println!(
        "\nApproved parts whose self-resonant frequency lies in 10–100 MHz (GET {query}; add \
         answer_from=latest for the newest fits):"
    );
    let items = band["items"].as_array().cloned().unwrap_or_default();
    if items.is_empty() {
        println!("  none");
    }
    for p in items {
        println!(
            "  {:<14} SRF {:>12}   {}",
            p["part_number"].as_str().unwrap_or_default(),
            fmt_si(p["srf_hz"].as_f64(), "Hz"),
            p["description"].as_str().unwrap_or_default()
        );
    }
    Ok(query)
}

/// Every lot a part's trend flags: beyond the control limits, in a run on one side, or in a zone test.
async fn print_out_of_control(c: &Client, reader: &str, parts: &[String]) -> anyhow::Result<()> {
    println!(
        "\nLots out of statistical control (GET /api/v1/parts/{{part}}/trend; control limits = mean \
         ± 3σ of the approved lots):"
    );
    let mut any = false;
    for part in parts {
        let t = c
            .get(&format!("/api/v1/parts/{part}/trend"), reader)
            .await?;
        let lots = t["lots"].as_array().cloned().unwrap_or_default();
        for f in t["figures"].as_array().cloned().unwrap_or_default() {
            for p in f["points"].as_array().cloned().unwrap_or_default() {
                let flagged = [
                    "out_of_control",
                    "in_run",
                    "beyond_2_sigma_2_of_3",
                    "beyond_1_sigma_4_of_5",
                ];
                if flagged.iter().any(|k| p[*k] == true) {
                    any = true;
                    let lot = &lots[p["lot_index"].as_u64().unwrap_or(0) as usize];
                    let unit = match f["unit"].as_str().unwrap_or("") {
                        "ohm" => "Ω",
                        "1" => "",
                        u => u,
                    };
                    let v = |x: &Value| fmt_si(x.as_f64(), unit).trim_end().to_string();
                    println!(
                        "  {part:<14} lot {:<7} {}: {} (control limits {} to {})",
                        lot["lot"].as_str().unwrap_or_default(),
                        f["label"].as_str().unwrap_or_default(),
                        v(&p["value"]),
                        v(&f["control_low"]),
                        v(&f["control_high"])
                    );
                }
            }
        }
    }
    if !any {
        println!("  none");
    }
    Ok(())
}

/// The report address of every succeeded fit that fails its part's limits.
async fn print_failing_reports(c: &Client, reader: &str) -> anyhow::Result<()> {
    let page = c
        .get("/api/v1/fits?status=succeeded&limit=500", reader)
        .await?;
    let failing: Vec<i64> = page["items"]
        .as_array()
        .cloned()
        .unwrap_or_default()
        .iter()
        .filter(|f| f["verdict"] == "fail")
        .filter_map(|f| f["fit_id"].as_i64())
        .collect();
    for id in &failing {
        println!(
            "Printable inspection report of failing fit {id}: {}/api/v1/fits/{id}/report \
             (PDF: …/report.pdf); the dashboard's part page links every lot's report.",
            c.base
        );
    }
    Ok(())
}

/// Where the API is, the tokens of this run, and the caution.
fn print_access(base: &str, grpc_address: SocketAddr, tokens: &Tokens, query: &str) {
    let Tokens {
        reader,
        inspector,
        engineer,
    } = tokens;
    println!("\nThe API is at {base}/api/v1 (description: api/openapi.yaml). Tokens for this run:");
    println!("  reader:    {reader}");
    println!("  inspector: {inspector}");
    println!("  engineer:  {engineer}");
    println!("e.g. curl -H 'Authorization: Bearer {reader}' '{base}{query}'");
    println!(
        "gRPC (api/henrybook.proto, package henrybook.v1) is at {grpc_address}; the same tokens go \
         in `authorization: Bearer <token>` metadata."
    );
    println!(
        "Caution: measuring energised power parts or parts at high voltage is hazardous; follow local \
         codes and licensed practice. The demo data is invented."
    );
}
