//! The PostgreSQL store (henrybook::store::pg::PgStore) held to the SQLite store
//! (henrybook::store::Store), a module of the store test binary: each test runs the same
//! operations, in the same order, on a SQLite store in a temporary folder and
//! on a PostgreSQL store in a fresh database ([`henrybook_tests::pg::TestDb`]; the server must be
//! running: these tests fail, never skip, without it), and asserts the same answers: the same wire
//! values with timestamps masked (their presence is compared, not their value), and the same error kind
//! and message. Ids are compared as they are: both stores number from 1 and the sequences are the same.
//! The audit trails are compared row by row (all but the time and the chain hashes, which cover the
//! time), and the PostgreSQL chain is checked with the SQLite store's own hash.
//!
//! The fitted reports are fits of synthetic sweeps of the invented `power_choke` model
//! (henrybook_tests::synth), made once and written to both stores.

use henrybook::fit::{FitControl, FitOptions, FitReport, fit};
use henrybook::registry::assessment::assess;
use henrybook::registry::ids::{LotCode, PartNumber};
use henrybook::registry::limits::Limits;
use henrybook::registry::wire::PartSummary;
use henrybook::registry::wire::{FailureKind, FitStatus};
use henrybook::store::fits::FitFilter;
use henrybook::store::integrity::{AuditRow, GENESIS, IntegrityReport, row_hash};
use henrybook::store::jobs::{PartRef, Renewal};
use henrybook::store::pg::PgStore;
use henrybook::store::query::{AnswerSource, Cursor, PartQuery, Sort};
use henrybook::store::sweeps::{NamedFile, NewSweep, QueueBounds};
use henrybook::store::tokens::{LAST_USED_RESOLUTION_MS, Role};
use henrybook::store::{Backend, JobClaim, Store, StoreError, StoreResult, now_ms, sha256_hex};
use henrybook::sweep::Method;
use henrybook_tests::pg::TestDb;
use henrybook_tests::synth::{power_choke, synthetic_sweep};
use serde_json::{Value, json};
use sqlx::Row;
use std::sync::OnceLock;
use std::time::{Duration, Instant};

/// A SQLite store and a PostgreSQL store, both empty.
struct Both {
    sq: Store,
    pg: PgStore,
    dir: tempfile::TempDir,
    db: TestDb,
}

impl Both {
    async fn new() -> Both {
        let dir = tempfile::tempdir().unwrap();
        let sq = Store::open(&dir.path().join("parity.db")).await.unwrap();
        let db = TestDb::new().await;
        let pg = PgStore::new(db.pool.clone());
        Both { sq, pg, dir, db }
    }

    /// Every audit row of each store as (id, actor, action, part, fit, reason, result hash).
    async fn audit_rows(&self) -> (Vec<AuditView>, Vec<AuditView>) {
        let sqlite = sqlx::SqlitePool::connect(&format!(
            "sqlite://{}?mode=ro",
            self.dir.path().join("parity.db").display()
        ))
        .await
        .unwrap();
        let sql = "SELECT audit_id, actor, action, part_id, fit_id, reason, result_sha256 \
                   FROM audit ORDER BY audit_id";
        let a: Vec<AuditView> = sqlx::query_as(sql).fetch_all(&sqlite).await.unwrap();
        sqlite.close().await;
        let p: Vec<AuditView> = sqlx::query_as(sql).fetch_all(&self.db.pool).await.unwrap();
        (a, p)
    }

    /// The audit trails are the same row for row, and both chains hold.
    async fn assert_same_audit(&self) {
        let (a, p) = self.audit_rows().await;
        assert!(!a.is_empty());
        assert_eq!(a, p, "the audit trails differ");
        let report = self.sq.verify_integrity().await.unwrap();
        assert!(report.ok(), "{:?}", report.problems);
        assert_pg_chain_holds(&self.db.pool).await;
    }
}

type AuditView = (
    i64,
    String,
    String,
    Option<i64>,
    Option<i64>,
    Option<String>,
    Option<String>,
);

/// Checks the PostgreSQL audit chain with the SQLite store's hash ([`row_hash`]): ids 1..n without
/// gaps, each row's prev_hash the hash before it, each hash the row's own.
pub(crate) async fn assert_pg_chain_holds(pool: &sqlx::PgPool) {
    let rows = sqlx::query(
        "SELECT audit_id, at_ms, actor, action, part_id, fit_id, reason, result_sha256, prev_hash, \
         hash FROM audit ORDER BY audit_id",
    )
    .fetch_all(pool)
    .await
    .unwrap();
    let mut prev = GENESIS.to_string();
    for (i, r) in rows.iter().enumerate() {
        let row = AuditRow {
            audit_id: r.get("audit_id"),
            at_ms: r.get("at_ms"),
            actor: r.get("actor"),
            action: r.get("action"),
            part_id: r.get("part_id"),
            fit_id: r.get("fit_id"),
            reason: r.get("reason"),
            result_sha256: r.get("result_sha256"),
        };
        assert_eq!(row.audit_id, i as i64 + 1, "audit ids have no gap");
        let stored_prev: String = r.get("prev_hash");
        let hash: String = r.get("hash");
        assert_eq!(
            stored_prev, prev,
            "row {} follows the one before",
            row.audit_id
        );
        assert_eq!(hash, row_hash(&prev, &row), "row {} hashes", row.audit_id);
        prev = hash;
    }
}

/// A store error as the transports see it: its kind and message. A database error is not an answer.
fn error_view(e: &StoreError) -> Value {
    match e {
        StoreError::NotFound(m) => json!({"not_found": m}),
        StoreError::Conflict(m) => json!({"conflict": m}),
        StoreError::Invalid(m) => json!({"invalid": m}),
        StoreError::QueueFull { part, queued } => {
            json!({"queue_full": {"part": part, "queued": queued}})
        }
        other => panic!("a database error where a store answer was due: {other}"),
    }
}

const TIME_KEYS: [&str; 9] = [
    "created_at",
    "started_at",
    "finished_at",
    "at",
    "uploaded_at",
    "approved_at",
    "created_at_ms",
    "last_used_at_ms",
    "revoked_at_ms",
];

/// `v` with every timestamp replaced by a mark of its presence.
fn mask_times(v: Value) -> Value {
    match v {
        Value::Object(map) => Value::Object(
            map.into_iter()
                .map(|(k, v)| {
                    let v = if TIME_KEYS.contains(&k.as_str()) && !v.is_null() {
                        json!("<time>")
                    } else {
                        mask_times(v)
                    };
                    (k, v)
                })
                .collect(),
        ),
        Value::Array(items) => Value::Array(items.into_iter().map(mask_times).collect()),
        other => other,
    }
}

fn view<T, F: FnOnce(&T) -> Value>(r: &StoreResult<T>, f: F) -> Value {
    match r {
        Ok(v) => json!({"ok": mask_times(f(v))}),
        Err(e) => json!({"err": error_view(e)}),
    }
}

/// Runs the same call on both stores and asserts the same answer (seen through `$view`); the
/// SQLite store's result.
macro_rules! same {
    ($b:expr, $s:ident => $call:expr) => {
        same!($b, $s => $call, |v| serde_json::to_value(v).unwrap())
    };
    ($b:expr, $s:ident => $call:expr, $view:expr) => {{
        let a = {
            let $s = &$b.sq;
            $call.await
        };
        let p = {
            let $s = &$b.pg;
            $call.await
        };
        let (va, vp) = (view(&a, $view), view(&p, $view));
        assert_eq!(va, vp, "SQLite (left) and PostgreSQL (right) answer {}", stringify!($call));
        a
    }};
}

fn part_number(text: &str) -> PartNumber {
    PartNumber::parse(text).unwrap()
}

fn new_sweep(pn: &PartNumber, lot: &str, i: usize, options_key: &str) -> NewSweep {
    let bytes = format!("frequency_hz,z_real_ohm,z_imag_ohm\n{i},1,2\n").into_bytes();
    NewSweep {
        part_number: pn.clone(),
        lot: LotCode::parse(lot).unwrap(),
        sha256: sha256_hex(&bytes),
        file: NamedFile {
            name: format!("sweep-{i}.csv"),
            bytes,
        },
        method: "direct".into(),
        z0_ohm: Some(50.0),
        dcr_ohm: i.is_multiple_of(2).then_some(0.12),
        temperature_c: Some(23.5),
        operator: format!("bench {i}"),
        fixture_open: None,
        fixture_short: None,
        fixture_topology: None,
        points: 3,
        options_json: format!("{{\"key\":\"{options_key}\"}}"),
        options_key: options_key.into(),
    }
}

fn uploaded_view(u: &henrybook::store::sweeps::Uploaded) -> Value {
    json!([u.fit_id, u.sweep_id, u.duplicate])
}

fn debug_view<T: std::fmt::Debug>(v: &T) -> Value {
    json!(format!("{v:?}"))
}

fn unit(_: &()) -> Value {
    Value::Null
}

/// Two fitted reports of the invented power choke: its own DC resistance (0.12 Ω) and a copy wound
/// with a thinner wire (0.30 Ω).
fn reports() -> &'static (FitReport, FitReport) {
    static REPORTS: OnceLock<(FitReport, FitReport)> = OnceLock::new();
    REPORTS.get_or_init(|| {
        let run = |rdc_ohm: f64, seed: u64| {
            let mut model = power_choke();
            model.rdc_ohm = rdc_ohm;
            let sweep = synthetic_sweep(&model, 1e3, 100e6, 201, Method::Direct, seed);
            fit(&sweep, &FitOptions::default(), &FitControl::default()).unwrap()
        };
        (run(0.12, 1), run(0.30, 2))
    })
}

/// Claims the oldest runnable fit on both stores (the same one), starts it and writes `report` as its
/// result, assessed on each store against that store's part.
async fn succeed_next(b: &Both, report: &FitReport) -> i64 {
    let lease = Duration::from_secs(60);
    let a =
        b.sq.claim_job(lease, 3)
            .await
            .unwrap()
            .expect("a job on SQLite");
    let p =
        b.pg.queue()
            .claim_job(lease, 3)
            .await
            .unwrap()
            .expect("a job on PostgreSQL");
    assert_eq!(a.fit_id, p.fit_id);
    assert!(b.sq.mark_started(&a).await.unwrap());
    assert!(b.pg.queue().mark_started(&p).await.unwrap());
    let (basis_a, base_a) = b.sq.assessment_basis(a.fit_id).await.unwrap();
    let (basis_p, base_p) = b.pg.assessment_basis(p.fit_id).await.unwrap();
    assert_eq!((&basis_a, &base_a), (&basis_p, &base_p));
    let assessment = assess(report, basis_a, base_a.as_deref()).unwrap();
    assert!(
        b.sq.complete_succeeded(&a, report.clone(), assessment.clone())
            .await
            .unwrap()
    );
    assert!(
        b.pg.complete_succeeded(&p, report, &assessment)
            .await
            .unwrap()
    );
    // Written once: a second write of the same claim is refused on both.
    assert!(
        !b.sq
            .complete_succeeded(&a, report.clone(), assessment.clone())
            .await
            .unwrap()
    );
    assert!(
        !b.pg
            .complete_succeeded(&p, report, &assessment)
            .await
            .unwrap()
    );
    a.fit_id
}

#[tokio::test]
async fn parts_answer_the_same_on_both_stores() {
    let b = Both::new().await;
    let pn = part_number("PX-100");
    let limits = Limits {
        dcr_max_ohm: Some(0.2),
        srf_min_hz: Some(5e6),
        ..Limits::default()
    };
    same!(b, s => s.create_part("eng", &pn, "output choke", &limits), unit).unwrap();
    // A second part with the same number, bad limits, parts that do not exist.
    let again = same!(b, s => s.create_part("eng", &pn, "again", &Limits::default()), unit);
    assert!(matches!(again, Err(StoreError::Conflict(_))), "{again:?}");
    let bad = Limits {
        dcr_max_ohm: Some(-1.0),
        ..Limits::default()
    };
    let refused = same!(b, s => s.create_part("eng", &part_number("PX-101"), "", &bad), unit);
    assert!(
        matches!(refused, Err(StoreError::Invalid(_))),
        "{refused:?}"
    );
    let missing = part_number("PX-404");
    let none = same!(b, s => s.part(&missing));
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");
    let none = same!(b, s => s.part_row(&missing), debug_view);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");
    let none = same!(b, s => s.update_limits("eng", &missing, &limits), unit);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");
    let bad_update = same!(b, s => s.update_limits("eng", &pn, &bad), unit);
    assert!(
        matches!(bad_update, Err(StoreError::Invalid(_))),
        "{bad_update:?}"
    );

    // Lots are listed in byte order on both (PostgreSQL's locale would sort them otherwise).
    for (i, lot) in ["b", "B", "a", "2024 W17", "Ä-7", "a "]
        .into_iter()
        .enumerate()
    {
        let new = new_sweep(&pn, lot, i, "k");
        same!(b, s => s.upload("insp", new.clone()), uploaded_view).unwrap();
    }
    let part = same!(b, s => s.part(&pn)).unwrap();
    assert_eq!(part.lots, ["2024 W17", "B", "a", "b", "Ä-7"]);
    assert_eq!(part.fits.len(), 6);
    assert_eq!(part.limits, limits);
    let row = same!(b, s => s.part_row(&pn), debug_view).unwrap();
    assert_eq!((row.part_id, row.baseline_fit_id), (1, None));

    // New limits re-judge every succeeded fit.
    let (pass, _) = reports();
    assert_eq!(succeed_next(&b, pass).await, 1);
    let verdict_of_fit_1 = |part: &henrybook::registry::wire::Part| {
        let fit = part.fits.iter().find(|f| f.fit_id == 1).unwrap();
        fit.verdict.clone()
    };
    let part = same!(b, s => s.part(&pn)).unwrap();
    assert_eq!(verdict_of_fit_1(&part).as_deref(), Some("pass"));
    let tighter = Limits {
        dcr_max_ohm: Some(0.05),
        ..limits.clone()
    };
    same!(b, s => s.update_limits("eng", &pn, &tighter), unit).unwrap();
    let part = same!(b, s => s.part(&pn)).unwrap();
    assert_eq!(part.limits, tighter);
    assert_eq!(verdict_of_fit_1(&part).as_deref(), Some("fail"));

    // A result assessed before the limits changed is judged again when it is written.
    let lease = Duration::from_secs(60);
    let a = b.sq.claim_job(lease, 3).await.unwrap().unwrap();
    let p = b.pg.queue().claim_job(lease, 3).await.unwrap().unwrap();
    assert_eq!((a.fit_id, p.fit_id), (2, 2));
    let (basis, baseline) = b.sq.assessment_basis(2).await.unwrap();
    let stale = assess(pass, basis, baseline.as_deref()).unwrap();
    assert_eq!(
        stale.judgement.verdict,
        Some("fail"),
        "0.12 Ω against 0.05 Ω"
    );
    same!(b, s => s.update_limits("eng", &pn, &limits), unit).unwrap();
    assert!(
        b.sq.complete_succeeded(&a, pass.clone(), stale.clone())
            .await
            .unwrap()
    );
    assert!(b.pg.complete_succeeded(&p, pass, &stale).await.unwrap());
    let part = same!(b, s => s.part(&pn)).unwrap();
    let fit_2 = part.fits.iter().find(|f| f.fit_id == 2).unwrap();
    assert_eq!(
        fit_2.verdict.as_deref(),
        Some("pass"),
        "judged against 0.2 Ω"
    );
    let actions: Vec<&str> = part.audit.iter().map(|a| a.action.as_str()).collect();
    assert_eq!(actions.first(), Some(&"part-created"));
    assert_eq!(actions.last(), Some(&"fit-succeeded"));
    assert_eq!(
        actions.iter().filter(|a| **a == "limits-changed").count(),
        2
    );
    b.assert_same_audit().await;
}

#[tokio::test]
async fn uploads_duplicates_and_queue_bounds_answer_the_same_on_both_stores() {
    let b = Both::new().await;
    let pn = part_number("SW-1");
    let other = part_number("SW-2");
    let missing = part_number("SW-404");
    let refused = same!(b, s => s.upload("insp", new_sweep(&missing, "L1", 0, "k")), uploaded_view);
    assert!(
        matches!(refused, Err(StoreError::Invalid(_))),
        "{refused:?}"
    );
    same!(b, s => s.create_part("eng", &pn, "", &Limits::default()), unit).unwrap();
    same!(b, s => s.create_part("eng", &other, "", &Limits::default()), unit).unwrap();

    let first =
        same!(b, s => s.upload("insp", new_sweep(&pn, "L1", 0, "k")), uploaded_view).unwrap();
    assert!(!first.duplicate);
    // The same file with the same options: the existing fit, nothing stored.
    let dup = same!(b, s => s.upload("insp", new_sweep(&pn, "L2", 0, "k")), uploaded_view).unwrap();
    assert_eq!(
        (dup.fit_id, dup.sweep_id, dup.duplicate),
        (first.fit_id, first.sweep_id, true)
    );
    // The same file with other options, or for another part: stored.
    let other_options =
        same!(b, s => s.upload("insp", new_sweep(&pn, "L1", 0, "k2")), uploaded_view).unwrap();
    assert!(!other_options.duplicate && other_options.fit_id != first.fit_id);
    let other_part =
        same!(b, s => s.upload("insp", new_sweep(&other, "L1", 0, "k")), uploaded_view).unwrap();
    assert!(!other_part.duplicate);

    // Fixture sweeps are kept byte for byte and reach the worker.
    let mut with_fixture = new_sweep(&pn, "L3", 9, "k");
    with_fixture.fixture_open = Some(NamedFile {
        name: "open.s1p".into(),
        bytes: vec![0, 1, 2, 255],
    });
    with_fixture.fixture_short = Some(NamedFile {
        name: "short.s1p".into(),
        bytes: b"short".to_vec(),
    });
    with_fixture.fixture_topology = Some("series-then-shunt".into());
    let fixtured = same!(b, s => s.upload("insp", with_fixture.clone()), uploaded_view).unwrap();
    let input = same!(b, s => s.job_input(fixtured.fit_id), debug_view).unwrap();
    assert_eq!(input.fixture_open.unwrap().bytes, [0, 1, 2, 255]);
    assert_eq!(input.fixture_topology.as_deref(), Some("series-then-shunt"));
    let file = same!(b, s => s.sweep_file(fixtured.sweep_id), debug_view).unwrap();
    assert_eq!(file.bytes, with_fixture.file.bytes);
    let none = same!(b, s => s.sweep_file(99), debug_view);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");
    let none = same!(b, s => s.job_input(99), debug_view);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");

    // Bounds: SW-1 has 3 queued fits, there are 4 in all.
    let depth = same!(b, s => s.queue_depth(PartRef::Number(&pn)), debug_view).unwrap();
    assert_eq!((depth.all, depth.part), (4, 3));
    same!(b, s => s.queue_depth(PartRef::OfFit(other_part.fit_id)), debug_view).unwrap();
    same!(b, s => s.queue_depth(PartRef::Number(&missing)), debug_view).unwrap();
    same!(b, s => s.queue_depth(PartRef::Unnamed), debug_view).unwrap();
    let per_part = Some(QueueBounds { all: 10, part: 3 });
    let full = same!(b, s => s.upload_bounded("insp", new_sweep(&pn, "L1", 5, "k"), per_part), uploaded_view);
    assert!(
        matches!(
            full,
            Err(StoreError::QueueFull {
                part: true,
                queued: 3
            })
        ),
        "{full:?}"
    );
    let all = Some(QueueBounds { all: 4, part: 10 });
    let full = same!(b, s => s.upload_bounded("insp", new_sweep(&other, "L1", 5, "k"), all), uploaded_view);
    assert!(
        matches!(
            full,
            Err(StoreError::QueueFull {
                part: false,
                queued: 4
            })
        ),
        "{full:?}"
    );
    // A duplicate is answered whatever the bounds.
    let dup =
        same!(b, s => s.upload_bounded("insp", new_sweep(&pn, "L1", 0, "k"), all), uploaded_view)
            .unwrap();
    assert!(dup.duplicate);
    let room = Some(QueueBounds { all: 5, part: 4 });
    same!(b, s => s.upload_bounded("insp", new_sweep(&pn, "L1", 6, "k"), room), uploaded_view)
        .unwrap();
    let counts = same!(b, s => s.queue_counts()).unwrap();
    assert_eq!(counts.queued, 5);
    same!(b, s => s.part(&pn)).unwrap();
    same!(b, s => s.part(&other)).unwrap();
    b.assert_same_audit().await;
}

#[tokio::test]
async fn fits_revisions_and_approvals_answer_the_same_on_both_stores() {
    let b = Both::new().await;
    let (pass, fail) = reports();
    let pn = part_number("FX-7");
    let limits = Limits {
        dcr_max_ohm: Some(0.2),
        ..Limits::default()
    };
    same!(b, s => s.create_part("eng", &pn, "filter choke", &limits), unit).unwrap();
    for (i, lot) in ["L2", "L1", "L1", "L10"].into_iter().enumerate() {
        same!(b, s => s.upload("insp", new_sweep(&pn, lot, i, "k")), uploaded_view).unwrap();
    }
    assert_eq!(succeed_next(&b, pass).await, 1);
    assert_eq!(succeed_next(&b, fail).await, 2);
    let one = same!(b, s => s.fit_detail(1)).unwrap();
    assert_eq!(one.summary.status, FitStatus::Succeeded);
    assert_eq!(
        one.summary.verdict.as_deref(),
        Some("pass"),
        "{:?}",
        one.verdict_checks
    );
    let two = same!(b, s => s.fit_summary(2)).unwrap();
    assert_eq!(two.verdict.as_deref(), Some("fail"));

    // Cancel: a queued fit at once, a running one by request; the rest are conflicts.
    assert!(!same!(b, s => s.cancel_fit("insp", 3), debug_view).unwrap());
    let again = same!(b, s => s.cancel_fit("insp", 3), debug_view);
    assert!(matches!(again, Err(StoreError::Conflict(_))), "{again:?}");
    let none = same!(b, s => s.cancel_fit("insp", 99), debug_view);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");
    let lease = Duration::from_secs(60);
    let a =
        b.sq.claim_job(lease, 3)
            .await
            .unwrap()
            .expect("fit 4 runnable");
    let p =
        b.pg.queue()
            .claim_job(lease, 3)
            .await
            .unwrap()
            .expect("fit 4 runnable");
    assert_eq!((a.fit_id, p.fit_id), (4, 4));
    assert!(b.sq.mark_started(&a).await.unwrap() && b.pg.queue().mark_started(&p).await.unwrap());
    assert!(same!(b, s => s.cancel_fit("insp", 4), debug_view).unwrap());

    // Retry: only failed or cancelled fits, within the bounds.
    let full = same!(b, s => s.retry_fit("insp", 3, Some(QueueBounds { all: 10, part: 1 })), unit);
    assert!(
        matches!(
            full,
            Err(StoreError::QueueFull {
                part: true,
                queued: 1
            })
        ),
        "{full:?}"
    );
    same!(b, s => s.retry_fit("insp", 3, Some(QueueBounds { all: 10, part: 2 })), unit).unwrap();
    for id in [1, 3] {
        let refused = same!(b, s => s.retry_fit("insp", id, None), unit);
        assert!(
            matches!(refused, Err(StoreError::Conflict(_))),
            "{refused:?}"
        );
    }
    let none = same!(b, s => s.retry_fit("insp", 99, None), unit);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");

    // Approval: a failing fit needs an override with a reason; a baseline cannot be approved twice.
    let refused = same!(b, s => s.approve_fit("eng", 2, None, false), unit);
    assert!(
        matches!(refused, Err(StoreError::Conflict(_))),
        "{refused:?}"
    );
    let refused = same!(b, s => s.approve_fit("eng", 2, None, true), unit);
    assert!(
        matches!(refused, Err(StoreError::Invalid(_))),
        "{refused:?}"
    );
    same!(b, s => s.approve_fit("eng", 1, Some("first lot"), false), unit).unwrap();
    let twice = same!(b, s => s.approve_fit("eng", 1, None, false), unit);
    assert!(matches!(twice, Err(StoreError::Conflict(_))), "{twice:?}");
    // Fit 2 now drifts from the baseline fit 1.
    let drifting = same!(b, s => s.fit_detail(2)).unwrap();
    assert_eq!(drifting.drift.as_ref().map(|d| d.baseline_fit_id), Some(1));
    same!(b, s => s.approve_fit("eng", 2, Some("accepted at review"), true), unit).unwrap();
    let part = same!(b, s => s.part(&pn)).unwrap();
    assert_eq!(part.baseline_fit_id, Some(2));
    for id in [3, 99] {
        let refused = same!(b, s => s.approve_fit("eng", id, None, false), unit);
        assert!(refused.is_err(), "{refused:?}");
    }
    same!(b, s => s.reject_fit("eng", 2, "the winding was damaged"), unit).unwrap();
    let part = same!(b, s => s.part(&pn)).unwrap();
    assert_eq!(part.baseline_fit_id, None);
    for id in [3, 99] {
        let refused = same!(b, s => s.reject_fit("eng", id, "no"), unit);
        assert!(refused.is_err(), "{refused:?}");
    }

    // Refit: a new revision of the same sweep, within the bounds.
    let options = "{\"family\":\"rational\"}";
    let full = same!(b, s => s.refit("eng", 1, options, "r", Some(QueueBounds { all: 2, part: 10 })), debug_view);
    assert!(
        matches!(
            full,
            Err(StoreError::QueueFull {
                part: false,
                queued: 2
            })
        ),
        "{full:?}"
    );
    let new_id = same!(b, s => s.refit("eng", 1, options, "r", None), debug_view).unwrap();
    let revision = same!(b, s => s.fit_summary(new_id)).unwrap();
    assert_eq!((revision.revision, revision.sweep_id), (2, 1));
    let none = same!(b, s => s.refit("eng", 99, options, "r", None), debug_view);
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");

    // Every read of every fit, the lists, the counts, the part and its trend.
    for id in 1..=new_id + 1 {
        // The last id has no fit: NotFound from each.
        let found = same!(b, s => s.fit_summary(id)).is_ok();
        assert_eq!(found, id <= new_id);
        let _ = same!(b, s => s.fit_detail(id));
        let _ = same!(b, s => s.fit_report(id));
        let _ = same!(b, s => s.fit_sweep_id(id), debug_view);
        let _ = same!(b, s => s.fit_provenance(id), debug_view_masked);
    }
    let filters = [
        FitFilter {
            limit: 50,
            ..FitFilter::default()
        },
        FitFilter {
            limit: 2,
            ..FitFilter::default()
        },
        FitFilter {
            limit: 2,
            before_fit_id: Some(4),
            ..FitFilter::default()
        },
        FitFilter {
            status: Some(FitStatus::Succeeded),
            limit: 50,
            ..FitFilter::default()
        },
        FitFilter {
            error_kind: Some(FailureKind::Cancelled),
            limit: 50,
            ..FitFilter::default()
        },
        FitFilter {
            lot: Some(LotCode::parse("L1").unwrap()),
            limit: 50,
            ..FitFilter::default()
        },
        FitFilter {
            part_number: Some(pn.clone()),
            since_ms: Some(0),
            limit: 50,
            ..FitFilter::default()
        },
        FitFilter {
            part_number: Some(part_number("NONE")),
            limit: 50,
            ..FitFilter::default()
        },
    ];
    for filter in &filters {
        same!(b, s => s.list_fits(filter)).unwrap();
    }
    let page = same!(b, s => s.list_fits(&filters[1])).unwrap();
    assert_eq!(page.next_cursor.as_deref(), Some("4"));
    let counts = same!(b, s => s.queue_counts()).unwrap();
    assert_eq!((counts.succeeded, counts.queued, counts.running), (2, 2, 1));
    let trend = same!(b, s => s.lot_fits(1), |v| lot_fits_view(v)).unwrap();
    // Fit 1 was approved and then superseded (still counts); fit 2 was rejected.
    let approved: Vec<(i64, bool)> = trend.iter().map(|f| (f.fit_id, f.approved)).collect();
    assert_eq!(approved, [(2, false), (1, true)]);
    let provenance = same!(b, s => s.fit_provenance(2), debug_view_masked).unwrap();
    assert_eq!(provenance.approved_by.as_deref(), Some("eng"));
    let part = same!(b, s => s.part(&pn)).unwrap();
    assert!(part.audit.iter().any(|a| a.action == "approval-superseded"));
    b.assert_same_audit().await;
}

/// Debug text with the RFC 3339 timestamps masked.
fn debug_view_masked<T: std::fmt::Debug>(v: &T) -> Value {
    let text = format!("{v:?}");
    let masked: String = text
        .split('"')
        .map(|piece| {
            if henrybook::store::parse_rfc3339(piece).is_some() {
                "<time>"
            } else {
                piece
            }
        })
        .collect::<Vec<_>>()
        .join("\"");
    json!(masked)
}

fn lot_fits_view(v: &[henrybook::registry::trend::LotFit]) -> Value {
    Value::Array(
        v.iter()
            .map(|f| {
                json!({
                    "fit_id": f.fit_id, "lot": f.lot, "lot_order": f.lot_order,
                    "approved": f.approved, "uploaded_at": f.uploaded_at,
                    "report": serde_json::to_value(&f.report).unwrap(),
                })
            })
            .collect(),
    )
}

#[tokio::test]
async fn tokens_answer_the_same_on_both_stores() {
    let b = Both::new().await;
    let mut plain = Vec::new();
    for (role, label) in [
        (Role::Inspector, Some("  bench 3 ")),
        (Role::Reader, None),
        (Role::Engineer, Some("   ")),
    ] {
        let a = b.sq.create_token(role, label).await.unwrap();
        let p = b.pg.create_token(role, label).await.unwrap();
        assert_eq!(a.0, p.0, "the same id");
        assert!(p.1.starts_with("hbk_") && p.1.len() == 4 + 64 && p.1 != a.1);
        plain.push((a, p));
    }
    let list = same!(b, s => s.list_tokens()).unwrap();
    let labels: Vec<&str> = list.iter().map(|t| t.label.as_str()).collect();
    assert_eq!(labels, ["bench 3", "reader-2", "engineer-3"]);
    // Only the hash is stored.
    let stored: Vec<String> =
        sqlx::query_scalar("SELECT token_sha256 FROM tokens ORDER BY token_id")
            .fetch_all(&b.db.pool)
            .await
            .unwrap();
    let hashes: Vec<String> = plain
        .iter()
        .map(|(_, p)| sha256_hex(p.1.as_bytes()))
        .collect();
    assert_eq!(stored, hashes);

    for (a, p) in &plain {
        let callers = (
            b.sq.authenticate(&a.1).await.unwrap(),
            b.pg.authenticate(&p.1).await.unwrap(),
        );
        assert!(callers.0.is_some());
        assert_eq!(callers.0, callers.1);
    }
    for token in ["hbk_nope", ""] {
        same!(b, s => s.authenticate(token), debug_view).unwrap();
    }
    let revoked = same!(b, s => s.revoke_token("admin", 1)).unwrap();
    assert!(revoked.revoked_at_ms.is_some());
    let again = same!(b, s => s.revoke_token("admin", 1));
    assert!(matches!(again, Err(StoreError::Conflict(_))), "{again:?}");
    let none = same!(b, s => s.revoke_token("admin", 99));
    assert!(matches!(none, Err(StoreError::NotFound(_))), "{none:?}");
    let (a, p) = (&plain[0].0.1, &plain[0].1.1);
    assert_eq!(b.sq.authenticate(a).await.unwrap(), None);
    assert_eq!(b.pg.authenticate(p).await.unwrap(), None);
    let list = same!(b, s => s.list_tokens()).unwrap();
    // Each token authenticated once before the revocation: each has its last use.
    assert!(list.iter().all(|t| t.last_used_at_ms.is_some()));
    b.assert_same_audit().await;
}

/// A tokens file applied to both stores: the same tokens added, changed, revoked and left alone,
/// the same reports and the same audit rows; applied again it changes nothing.
#[tokio::test]
async fn a_tokens_file_is_applied_alike_on_both_stores() {
    use henrybook::store::token_file::parse;
    let b = Both::new().await;
    let (hand_sq, hand_pg) = (
        b.sq.create_token(Role::Engineer, Some("by hand"))
            .await
            .unwrap(),
        b.pg.create_token(Role::Engineer, Some("by hand"))
            .await
            .unwrap(),
    );
    let [t1, t2, t3] = ["1", "2", "3"].map(|d| d.repeat(40));
    let first = parse(&format!(
        "engineer lead {t1}\nreader tool {t2}\ninspector bench {t3}\n"
    ))
    .unwrap();
    let sync = same!(b, s => s.sync_tokens("tokens file", &first), debug_view).unwrap();
    assert_eq!((sync.added.len(), sync.unchanged), (3, 0), "{sync:?}");
    // The second version raises tool's role, drops bench and keeps lead.
    let second = parse(&format!("engineer lead {t1}\ninspector tool {t2}\n")).unwrap();
    let sync = same!(b, s => s.sync_tokens("tokens file", &second), debug_view).unwrap();
    assert_eq!(
        sync.summary(),
        "0 added, 1 changed, 1 revoked, 1 unchanged; changed: tool (inspector); revoked: bench \
         (inspector)"
    );
    let again = same!(b, s => s.sync_tokens("tokens file", &second), debug_view).unwrap();
    assert_eq!(
        again.summary(),
        "0 added, 0 changed, 0 revoked, 2 unchanged"
    );
    // bench's token is revoked and stays so when it comes back; the hand-made token is untouched.
    let back = parse(&format!(
        "engineer lead {t1}\ninspector tool {t2}\nreader bench {t3}\n"
    ))
    .unwrap();
    let sync = same!(b, s => s.sync_tokens("tokens file", &back), debug_view).unwrap();
    assert_eq!(sync.still_revoked, ["bench (line 3, token 4)"]);
    for (store, hand) in [
        (Backend::Sqlite(b.sq.clone()), &hand_sq.1),
        (Backend::Postgres(b.pg.clone()), &hand_pg.1),
    ] {
        let role_of = async |token: &str| store.authenticate(token).await.unwrap().map(|c| c.role);
        assert_eq!(role_of(&t1).await, Some(Role::Engineer));
        assert_eq!(role_of(&t2).await, Some(Role::Inspector));
        assert_eq!(role_of(&t3).await, None);
        assert_eq!(role_of(hand).await, Some(Role::Engineer));
    }
    let list = same!(b, s => s.list_tokens()).unwrap();
    let from_file: Vec<bool> = list.iter().map(|t| t.from_file).collect();
    assert_eq!(from_file, [false, true, true, true]);
    b.assert_same_audit().await;
}

#[tokio::test]
async fn a_postgresql_token_records_its_last_use_at_most_once_a_minute() {
    let db = TestDb::new().await;
    let store = PgStore::new(db.pool.clone());
    let (id, token) = store.create_token(Role::Reader, None).await.unwrap();
    let last_used = || async {
        let list = store.list_tokens().await.unwrap();
        list.iter()
            .find(|t| t.token_id == id)
            .unwrap()
            .last_used_at_ms
    };
    let set = |at_ms: i64| {
        sqlx::query("UPDATE tokens SET last_used_at_ms = $1 WHERE token_id = $2")
            .bind(at_ms)
            .bind(id)
            .execute(&db.pool)
    };
    assert_eq!(last_used().await, None);
    let before = now_ms();
    assert!(store.authenticate(&token).await.unwrap().is_some());
    let first = last_used().await.expect("set by the first use");
    assert!((before..=now_ms()).contains(&first), "{first}");
    // Used 30 s ago: not written again within the minute.
    set(first - 30_000).await.unwrap();
    assert!(store.authenticate(&token).await.unwrap().is_some());
    assert_eq!(last_used().await, Some(first - 30_000));
    // Used more than a minute ago: written.
    set(first - LAST_USED_RESOLUTION_MS - 1_000).await.unwrap();
    let before = now_ms();
    assert!(store.authenticate(&token).await.unwrap().is_some());
    let again = last_used().await.unwrap();
    assert!((before..=now_ms()).contains(&again), "{again}");
    // A failing write of the last use does not fail the request.
    sqlx::raw_sql(
        "CREATE FUNCTION frozen() RETURNS trigger LANGUAGE plpgsql AS $$ \
         BEGIN RAISE EXCEPTION 'read-only for this test'; END; $$; \
         CREATE TRIGGER tokens_frozen BEFORE UPDATE OF last_used_at_ms ON tokens \
         FOR EACH ROW EXECUTE FUNCTION frozen();",
    )
    .execute(&db.pool)
    .await
    .unwrap();
    set(0).await.expect_err("the column is frozen");
    assert_eq!(
        store
            .authenticate(&token)
            .await
            .unwrap()
            .map(|c| c.token_id),
        Some(id)
    );
    assert_eq!(last_used().await, Some(again));
}

#[tokio::test]
async fn replicas_uploading_at_once_store_one_duplicate_once_and_keep_the_bound() {
    let db = TestDb::new().await;
    let stores = [
        PgStore::new(db.pool.clone()),
        PgStore::new(db.replica().await),
    ];
    let parts: Vec<PartNumber> = (0..3).map(|i| part_number(&format!("RP-{i}"))).collect();
    for pn in &parts {
        stores[0]
            .create_part("eng", pn, "", &Limits::default())
            .await
            .unwrap();
    }
    // The same file 16 times at once from two replicas: stored once, every answer names that fit.
    let mut set = tokio::task::JoinSet::new();
    for i in 0..16 {
        let store = stores[i % 2].clone();
        let new = new_sweep(&parts[0], "L1", 0, "k");
        set.spawn(async move { store.upload("insp", new).await.unwrap() });
    }
    let mut answers = Vec::new();
    while let Some(a) = set.join_next().await {
        answers.push(a.unwrap());
    }
    assert_eq!(answers.iter().filter(|a| !a.duplicate).count(), 1);
    assert!(answers.iter().all(|a| a.fit_id == answers[0].fit_id));

    // 60 different files at once on three parts under a bound of 25 in all: exactly 25 queued.
    let bound = Some(QueueBounds { all: 25, part: 100 });
    let started = Instant::now();
    let mut set = tokio::task::JoinSet::new();
    for i in 0..60 {
        let store = stores[i % 2].clone();
        let new = new_sweep(&parts[i % 3], "L1", 100 + i, "k");
        set.spawn(async move { store.upload_bounded("insp", new, bound).await });
    }
    let (mut stored, mut full) = (0, 0);
    while let Some(r) = set.join_next().await {
        match r.unwrap() {
            Ok(u) => {
                assert!(!u.duplicate);
                stored += 1;
            }
            Err(StoreError::QueueFull {
                part: false,
                queued,
            }) => {
                assert_eq!(queued, 25);
                full += 1;
            }
            Err(e) => panic!("{e}"),
        }
    }
    let elapsed = started.elapsed();
    assert_eq!(
        (stored, full),
        (24, 36),
        "1 fit was queued before: 24 more reach the bound of 25"
    );
    let counts = stores[1].queue_counts().await.unwrap();
    assert_eq!(counts.queued, 25);
    let fits: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM fits")
        .fetch_one(&db.pool)
        .await
        .unwrap();
    assert_eq!(fits, 25);
    eprintln!(
        "60 bounded uploads from 2 replicas (24 stored, 36 refused) in {:.1} ms",
        elapsed.as_secs_f64() * 1e3
    );
    assert_pg_chain_holds(&db.pool).await;
    let audit: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM audit")
        .fetch_one(&db.pool)
        .await
        .unwrap();
    assert_eq!(audit, 3 + 25, "three parts created, 25 uploads");
}

#[tokio::test]
async fn two_hundred_uploads_at_once_give_one_chain_on_each_store() {
    let b = Both::new().await;
    let replica = PgStore::new(b.db.replica().await);
    let pn = part_number("TP-1");
    same!(b, s => s.create_part("eng", &pn, "", &Limits::default()), unit).unwrap();
    let n = 200;
    // SQLite: every request waiting at once shares a group commit.
    let started = Instant::now();
    let mut set = tokio::task::JoinSet::new();
    for i in 0..n {
        let store = b.sq.clone();
        let new = new_sweep(&pn, "L1", i, "k");
        set.spawn(async move { store.upload("insp", new).await.unwrap() });
    }
    while let Some(u) = set.join_next().await {
        assert!(!u.unwrap().duplicate);
    }
    let sqlite = started.elapsed();
    // PostgreSQL: one transaction per upload from two replicas' pools, the audit appends in turn.
    let started = Instant::now();
    let mut set = tokio::task::JoinSet::new();
    for i in 0..n {
        let store = if i % 2 == 0 {
            b.pg.clone()
        } else {
            replica.clone()
        };
        let new = new_sweep(&pn, "L1", i, "k");
        set.spawn(async move { store.upload("insp", new).await.unwrap() });
    }
    while let Some(u) = set.join_next().await {
        assert!(!u.unwrap().duplicate);
    }
    let postgres = started.elapsed();
    eprintln!(
        "{n} concurrent uploads: SQLite {:.0} ms, PostgreSQL (2 pools of 8) {:.0} ms",
        sqlite.as_secs_f64() * 1e3,
        postgres.as_secs_f64() * 1e3
    );
    // The same fits (ids aside: they follow the order the uploads arrived in) and two intact chains.
    let counts = same!(b, s => s.queue_counts()).unwrap();
    assert_eq!(counts.queued, n as i64);
    let (a, p) = b.audit_rows().await;
    assert_eq!((a.len(), p.len()), (n + 1, n + 1));
    let reasons = |rows: &[AuditView]| {
        let mut r: Vec<Option<String>> = rows.iter().map(|r| r.5.clone()).collect();
        r.sort();
        r
    };
    assert_eq!(reasons(&a), reasons(&p));
    assert!(b.sq.verify_integrity().await.unwrap().ok());
    assert_pg_chain_holds(&b.db.pool).await;
}

#[tokio::test]
async fn approvals_limits_and_results_racing_on_two_replicas_leave_one_consistent_state() {
    let db = TestDb::new().await;
    let (a, b) = (
        PgStore::new(db.pool.clone()),
        PgStore::new(db.replica().await),
    );
    let (pass, fail) = reports();
    let pn = part_number("RC-1");
    let old = Limits {
        dcr_max_ohm: Some(0.2),
        ..Limits::default()
    };
    a.create_part("eng", &pn, "", &old).await.unwrap();
    for i in 0..6 {
        a.upload("insp", new_sweep(&pn, "L1", i, "k"))
            .await
            .unwrap();
    }
    let lease = Duration::from_secs(60);
    // Fits 1-3 succeed; 4-6 are running, their results assessed against the old limits (0.30 Ω
    // fails 0.2 Ω).
    let mut running = Vec::new();
    for i in 0..6 {
        let claim = a.queue().claim_job(lease, 3).await.unwrap().unwrap();
        assert!(a.queue().mark_started(&claim).await.unwrap());
        let report = if i < 3 { pass } else { fail };
        let (basis, baseline) = a.assessment_basis(claim.fit_id).await.unwrap();
        let assessment = assess(report, basis, baseline.as_deref()).unwrap();
        if i < 3 {
            assert!(
                a.complete_succeeded(&claim, report, &assessment)
                    .await
                    .unwrap()
            );
        } else {
            assert_eq!(assessment.judgement.verdict, Some("fail"));
            running.push((claim, assessment));
        }
    }
    // At once, on two replicas: two approvals, new limits under which 0.30 Ω passes, three results.
    let new = Limits {
        dcr_max_ohm: Some(0.35),
        ..Limits::default()
    };
    let mut set = tokio::task::JoinSet::new();
    for (store, fit_id) in [(a.clone(), 1), (b.clone(), 2)] {
        set.spawn(async move { store.approve_fit("eng", fit_id, None, false).await });
    }
    {
        let (store, pn, new) = (b.clone(), pn.clone(), new.clone());
        set.spawn(async move { store.update_limits("eng", &pn, &new).await });
    }
    for (i, (claim, assessment)) in running.into_iter().enumerate() {
        let store = if i % 2 == 0 { a.clone() } else { b.clone() };
        set.spawn(async move {
            assert!(store.complete_succeeded(&claim, fail, &assessment).await?);
            Ok(())
        });
    }
    while let Some(r) = set.join_next().await {
        r.unwrap().unwrap();
    }
    // One approved fit, the part's baseline; every verdict under the new limits; every drift from
    // that baseline.
    let approved: Vec<i64> =
        sqlx::query_scalar("SELECT fit_id FROM fits WHERE approval = 'approved'")
            .fetch_all(&db.pool)
            .await
            .unwrap();
    let baseline = a.part_row(&pn).await.unwrap().baseline_fit_id;
    assert_eq!(approved.len(), 1);
    assert_eq!(baseline, Some(approved[0]));
    let rows: Vec<(i64, String, Option<String>, Option<String>)> = sqlx::query_as(
        "SELECT fit_id, report_json, verdict, drift_json FROM fits WHERE status = 'succeeded' \
         ORDER BY fit_id",
    )
    .fetch_all(&db.pool)
    .await
    .unwrap();
    assert_eq!(rows.len(), 6);
    for (fit_id, json, verdict, drift) in rows {
        let report: FitReport = serde_json::from_str(&json).unwrap();
        let checks = henrybook::registry::verdict::checks(&new, &report);
        let want = henrybook::registry::verdict::overall(&checks, &report);
        assert_eq!(verdict.as_deref(), want, "fit {fit_id}");
        assert_eq!(want, Some("pass"), "fit {fit_id}");
        let from: Option<i64> = drift.map(|d| {
            serde_json::from_str::<Value>(&d).unwrap()["baseline_fit_id"]
                .as_i64()
                .unwrap()
        });
        if Some(fit_id) == baseline {
            assert_eq!(from, None, "the baseline has no drift");
        } else {
            assert_eq!(from, baseline, "fit {fit_id}'s drift is from the baseline");
        }
    }
    assert_pg_chain_holds(&db.pool).await;
}

/// A query of `source` with no filter, sorted by part number, 50 to a page.
fn part_query(source: AnswerSource) -> PartQuery {
    PartQuery {
        q: None,
        source,
        srf_min_hz: None,
        srf_max_hz: None,
        series_resonance_min_hz: None,
        series_resonance_max_hz: None,
        l_at_hz: None,
        l_min_h: None,
        l_max_h: None,
        dcr_max_ohm: None,
        z_min_ohm: None,
        z_band_min_hz: None,
        z_band_max_hz: None,
        core_corner_min_hz: None,
        core_corner_max_hz: None,
        sort: Sort::parse("part_number").unwrap(),
        limit: 50,
        cursor: None,
    }
}

/// Runs `query` on both stores page by page (following the cursors, asserting the same pages,
/// cursors included); the SQLite store's items of all pages.
async fn same_pages(b: &Both, mut query: PartQuery) -> Vec<PartSummary> {
    let mut all = Vec::new();
    for _ in 0..20 {
        let page = same!(b, s => s.query_parts(&query)).unwrap();
        all.extend(page.items);
        match page.next_cursor {
            Some(c) => query.cursor = Some(Cursor::decode(&c).unwrap()),
            None => return all,
        }
    }
    panic!("more than 20 pages");
}

fn numbers(items: &[PartSummary]) -> Vec<&str> {
    items.iter().map(|i| i.part_number.as_str()).collect()
}

#[tokio::test]
async fn part_queries_answer_the_same_on_both_stores() {
    let b = Both::new().await;
    let (pass, fail) = reports();
    let limits = Limits {
        dcr_max_ohm: Some(0.2),
        ..Limits::default()
    };
    // Part numbers whose byte order differs from a language's order (upper case before lower case,
    // punctuation counted), and descriptions that differ in case or hold LIKE's wildcards.
    let parts = [
        ("b-1", "Output Choke"),
        ("B-2", "output choke"),
        ("a_3", "filter 50%_x"),
        ("A.4", "filter 50 x"),
        ("a-5", "common mode"),
    ];
    for (i, (number, description)) in parts.iter().enumerate() {
        let pn = part_number(number);
        same!(b, s => s.create_part("eng", &pn, description, &limits), unit).unwrap();
        same!(b, s => s.upload("insp", new_sweep(&pn, "L1", i, "k")), uploaded_view).unwrap();
    }
    // Fits 1..5 in part order: b-1 and a_3 fail their limits (the thinner wire), the others pass.
    for i in 0..parts.len() {
        let report = if i % 2 == 0 && i != 4 { fail } else { pass };
        assert_eq!(succeed_next(&b, report).await, i as i64 + 1);
    }
    // Approved baselines: B-2 and A.4 (passing), and b-1 by override.
    same!(b, s => s.approve_fit("eng", 2, None, false), unit).unwrap();
    same!(b, s => s.approve_fit("eng", 4, None, false), unit).unwrap();
    same!(b, s => s.approve_fit("eng", 1, Some("bench check"), true), unit).unwrap();

    let latest = same_pages(&b, part_query(AnswerSource::Latest)).await;
    assert_eq!(numbers(&latest), ["A.4", "B-2", "a-5", "a_3", "b-1"]);
    assert!(latest.iter().all(|i| i.l_eff_h.is_none()));
    let approved = same_pages(&b, part_query(AnswerSource::Approved)).await;
    assert_eq!(numbers(&approved), ["A.4", "B-2", "b-1"]);
    let passing = same_pages(&b, part_query(AnswerSource::LatestPassing)).await;
    assert_eq!(numbers(&passing), ["A.4", "B-2", "a-5"]);

    // Pages of two, by part number and by figures both ways (ties broken by part number).
    for sort in [
        "part_number",
        "-part_number",
        "rdc_ohm",
        "-rdc_ohm",
        "srf_hz",
        "-l0_h",
    ] {
        let mut q = part_query(AnswerSource::Latest);
        q.sort = Sort::parse(sort).unwrap();
        q.limit = 2;
        let items = same_pages(&b, q).await;
        assert_eq!(items.len(), 5, "{sort}");
    }
    let mut by_dcr = part_query(AnswerSource::Latest);
    by_dcr.sort = Sort::parse("-rdc_ohm").unwrap();
    by_dcr.limit = 2;
    let items = same_pages(&b, by_dcr).await;
    // The thinner wire first, then the rest, each group in byte order.
    assert_eq!(numbers(&items), ["a_3", "b-1", "A.4", "B-2", "a-5"]);

    // Text: the case of ASCII letters is ignored, LIKE's wildcards are plain characters.
    let mut text = part_query(AnswerSource::Latest);
    text.q = Some("OUTPUT".into());
    assert_eq!(numbers(&same_pages(&b, text.clone()).await), ["B-2", "b-1"]);
    text.q = Some("50%_".into());
    assert_eq!(numbers(&same_pages(&b, text.clone()).await), ["a_3"]);
    text.q = Some("a_".into());
    assert_eq!(numbers(&same_pages(&b, text).await), ["a_3"]);

    // Figures: DCR at most, L at a frequency on the grid, |Z| over a band, SRF and resonance bands.
    let mut dcr = part_query(AnswerSource::Latest);
    dcr.dcr_max_ohm = Some(0.2);
    assert_eq!(numbers(&same_pages(&b, dcr).await), ["A.4", "B-2", "a-5"]);
    let mut l = part_query(AnswerSource::Latest);
    l.l_at_hz = Some(123_456.0);
    let with_l = same_pages(&b, l.clone()).await;
    assert!(with_l.iter().all(|i| i.l_eff_h.is_some_and(|h| h > 0.0)));
    let l_eff = with_l[0].l_eff_h.unwrap();
    l.l_min_h = Some(l_eff * 0.9);
    l.l_max_h = Some(l_eff * 1.1);
    assert_eq!(same_pages(&b, l.clone()).await.len(), 5);
    l.l_min_h = Some(l_eff * 2.0);
    l.l_max_h = None;
    assert!(same_pages(&b, l).await.is_empty());
    let mut z = part_query(AnswerSource::Approved);
    z.z_band_min_hz = Some(20e3);
    z.z_band_max_hz = Some(2e6);
    let banded = same_pages(&b, z.clone()).await;
    assert_eq!(banded.len(), 3);
    let z_min = banded[0].z_min_ohm.expect("the lowest |Z| over the band");
    z.z_min_ohm = Some(z_min * 0.5);
    assert_eq!(same_pages(&b, z.clone()).await.len(), 3);
    z.z_min_ohm = Some(z_min * 1e3);
    assert!(same_pages(&b, z).await.is_empty());
    // An SRF of at least 1 Hz (or above the sweep, which clears it): every part.
    let mut s = part_query(AnswerSource::Latest);
    s.srf_min_hz = Some(1.0);
    s.sort = Sort::parse("-srf_hz").unwrap();
    assert_eq!(same_pages(&b, s).await.len(), 5);
    // A series resonance, a core corner anywhere: the parts whose answering fit has one.
    let mut r = part_query(AnswerSource::Latest);
    r.series_resonance_min_hz = Some(1.0);
    let resonant = same_pages(&b, r).await;
    let want: Vec<&str> = latest
        .iter()
        .filter(|i| !i.series_resonances_hz.is_empty())
        .map(|i| i.part_number.as_str())
        .collect();
    assert_eq!(numbers(&resonant), want);
    let mut c = part_query(AnswerSource::Latest);
    c.core_corner_min_hz = Some(1.0);
    let cornered = same_pages(&b, c).await;
    let want: Vec<&str> = latest
        .iter()
        .filter(|i| i.core_corner_hz.is_some())
        .map(|i| i.part_number.as_str())
        .collect();
    assert_eq!(numbers(&cornered), want);

    // A newer fit of B-2 against its approved baseline: its drift shows on the latest answers.
    let b2 = part_number("B-2");
    same!(b, s => s.upload("insp", new_sweep(&b2, "L2", 9, "k")), uploaded_view).unwrap();
    assert_eq!(succeed_next(&b, fail).await, 6);
    let drifted = same_pages(&b, part_query(AnswerSource::Latest)).await;
    let b2_row = drifted.iter().find(|i| i.part_number == "B-2").unwrap();
    assert_eq!(b2_row.answered_from_fit_id, Some(6));
    assert!(b2_row.drift_l0_percent.is_some(), "{b2_row:?}");
    assert_eq!(b2_row.latest_verdict.as_deref(), Some("fail"));

    // A bad query is refused the same way by both.
    let mut bad = part_query(AnswerSource::Latest);
    bad.l_min_h = Some(1e-6);
    let refused = same!(b, s => s.query_parts(&bad));
    assert!(
        matches!(refused, Err(StoreError::Invalid(_))),
        "{refused:?}"
    );
}

#[tokio::test]
async fn integrity_checks_answer_the_same_and_see_a_changed_row_on_postgresql() {
    let b = Both::new().await;
    let (pass, fail) = reports();
    let pn = part_number("IX-1");
    let limits = Limits {
        dcr_max_ohm: Some(0.2),
        ..Limits::default()
    };
    same!(b, s => s.create_part("eng", &pn, "", &limits), unit).unwrap();
    for i in 0..2 {
        same!(b, s => s.upload("insp", new_sweep(&pn, "L1", i, "k")), uploaded_view).unwrap();
    }
    succeed_next(&b, pass).await;
    succeed_next(&b, fail).await;
    same!(b, s => s.approve_fit("eng", 1, None, false), unit).unwrap();
    let whole = same!(b, s => s.verify_integrity(), |r: &IntegrityReport| {
        json!([r.audit_rows, r.verdicts_checked, r.problems])
    })
    .unwrap();
    assert!(whole.ok() && whole.verdicts_checked == 2, "{whole:?}");
    assert_eq!(b.pg.readiness().await, (true, true));
    let (ok, head) = b.pg.audit_chain_ok().await;
    assert!(ok);
    assert_eq!(head, b.pg.verify_integrity().await.unwrap().head_hash);

    // Around the store (the triggers switched off, as only the database's owner can): a changed audit
    // row, and a stored verdict that is not what its result gives.
    sqlx::raw_sql(
        "ALTER TABLE audit DISABLE TRIGGER USER; \
         UPDATE audit SET actor = 'someone else' WHERE audit_id = 2; \
         UPDATE fits SET verdict = 'pass' WHERE fit_id = 2",
    )
    .execute(&b.db.pool)
    .await
    .unwrap();
    let report = b.pg.verify_integrity().await.unwrap();
    assert_eq!(
        report.problems,
        [
            "audit row 2 was changed after it was written",
            "fit 2's stored verdict (pass) is not what its result and the part's limits give (fail)"
        ]
    );
    // /readyz's check goes on from the last row it checked (so it does not see row 2): a row written
    // since and then changed it sees, and it stays broken.
    assert!(b.pg.audit_chain_ok().await.0);
    b.pg.create_part("eng", &part_number("IX-2"), "", &Limits::default())
        .await
        .unwrap();
    sqlx::raw_sql(
        "UPDATE audit SET reason = 'x' WHERE audit_id = (SELECT MAX(audit_id) FROM audit)",
    )
    .execute(&b.db.pool)
    .await
    .unwrap();
    assert!(!b.pg.audit_chain_ok().await.0);
    assert!(!b.pg.audit_chain_ok().await.0);
    // Readiness names a missing migration.
    sqlx::raw_sql("DELETE FROM _sqlx_migrations WHERE version = 11")
        .execute(&b.db.pool)
        .await
        .unwrap();
    assert_eq!(b.pg.readiness().await, (true, false));
}

#[tokio::test]
async fn worker_outcomes_through_the_backend_answer_the_same_on_both_stores() {
    let b = Both::new().await;
    let pn = part_number("WX-1");
    same!(b, s => s.create_part("eng", &pn, "", &Limits::default()), unit).unwrap();
    for i in 0..3 {
        same!(b, s => s.upload("insp", new_sweep(&pn, "L1", i, "k")), uploaded_view).unwrap();
    }
    // The worker pool's calls, on each store through the one interface the service uses.
    let backends = [
        Backend::Sqlite(b.sq.clone()),
        Backend::Postgres(b.pg.clone()),
    ];
    let lease = Duration::from_secs(60);
    for store in &backends {
        let claims = store.claim_jobs(lease, 3, 3).await.unwrap();
        let ids: Vec<i64> = claims.iter().map(JobClaim::fit_id).collect();
        assert_eq!(ids, [1, 2, 3], "{}", store.kind());
        for c in &claims {
            assert!(store.mark_started(c).await.unwrap());
            assert_eq!(
                store.renew_lease(c, lease, 0.5).await.unwrap(),
                Renewal::Held {
                    cancel_requested: false
                }
            );
        }
        let cancelled = store.complete_unsuccessful(
            &claims[0],
            true,
            FailureKind::Cancelled,
            "cancelled on request",
        );
        assert!(cancelled.await.unwrap());
        let failed = store.complete_unsuccessful(
            &claims[1],
            false,
            FailureKind::NotAnInductor,
            "the sweep is capacitive",
        );
        assert!(failed.await.unwrap());
        assert!(store.release_job(&claims[2]).await.unwrap());
        // Written once: the same claims write nothing more.
        assert!(!store.release_job(&claims[0]).await.unwrap());
        assert!(
            !store
                .complete_unsuccessful(&claims[1], false, FailureKind::Internal, "again")
                .await
                .unwrap()
        );
    }
    // A claim handed to the other store is refused.
    let sqlite_claim = backends[0].claim_jobs(lease, 3, 1).await.unwrap();
    let foreign = backends[1].release_job(&sqlite_claim[0]).await;
    assert!(
        matches!(foreign, Err(StoreError::Invalid(_))),
        "{foreign:?}"
    );
    assert!(backends[0].release_job(&sqlite_claim[0]).await.unwrap());
    for id in 1..=3 {
        same!(b, s => s.fit_detail(id)).unwrap();
    }
    // Pruning takes the two finished jobs (cancelled, failed), never the queued one; the fits answer
    // as before, a cancel of a pruned fit conflicts, and a retry queues it again.
    let later = henrybook::store::now_ms() + 60_000;
    let pruned = same!(b, s => s.prune_finished_jobs(later, 10), debug_view).unwrap();
    assert_eq!(pruned, 2);
    same!(b, s => s.prune_finished_jobs(later, 10), debug_view).unwrap();
    for id in 1..=3 {
        same!(b, s => s.fit_detail(id)).unwrap();
    }
    let refused = same!(b, s => s.cancel_fit("insp", 1), debug_view);
    assert!(
        matches!(refused, Err(StoreError::Conflict(_))),
        "{refused:?}"
    );
    same!(b, s => s.retry_fit("insp", 2, None), unit).unwrap();
    same!(b, s => s.fit_detail(2)).unwrap();
    for store in &backends {
        let claims = store.claim_jobs(lease, 3, 3).await.unwrap();
        let ids: Vec<i64> = claims.iter().map(JobClaim::fit_id).collect();
        assert_eq!(ids, [2, 3], "{}", store.kind());
    }
    b.assert_same_audit().await;
}
