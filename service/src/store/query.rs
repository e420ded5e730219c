//! Behavioural queries for design tools, answered from stored figures through indexes: SRF band,
//! series-resonance band, effective L at a frequency (interpolated on the stored grid), DCR at most,
//! |Z| at least over a band, core corner frequency in a band; approved baselines only or the newest
//! succeeded fit of every part; sorted, keyset-paginated. A fit without a core loss (a lossless core,
//! a rational model) has no core corner: a query that bounds the corner never matches it.

use super::pg::PgStore;
use super::{Store, StoreError, StoreResult};
use crate::registry::grid;
use crate::registry::ids::PartNumber;
use crate::registry::wire::{PartPage, PartSummary};
use sqlx::Row;

/// Sort keys; `descending` reverses the figure order (part numbers break ties ascending).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SortKey {
    PartNumber,
    SrfHz,
    L0H,
    RdcOhm,
    CoreCornerHz,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Sort {
    pub key: SortKey,
    pub descending: bool,
}

impl Sort {
    /// `part_number`, `srf_hz`, `l0_h`, `rdc_ohm`, `core_corner_hz`, each optionally prefixed by `-`
    /// for descending.
    pub fn parse(text: &str) -> Result<Sort, String> {
        let (descending, name) = match text.strip_prefix('-') {
            Some(rest) => (true, rest),
            None => (false, text),
        };
        let key = match name {
            "part_number" => SortKey::PartNumber,
            "srf_hz" => SortKey::SrfHz,
            "l0_h" => SortKey::L0H,
            "rdc_ohm" => SortKey::RdcOhm,
            "core_corner_hz" => SortKey::CoreCornerHz,
            _ => {
                return Err(format!(
                    "sort must be one of part_number, srf_hz, l0_h, rdc_ohm, core_corner_hz (with - \
                     for descending), not {text:?}"
                ));
            }
        };
        Ok(Sort { key, descending })
    }

    fn column(self) -> Option<&'static str> {
        match self.key {
            SortKey::PartNumber => None,
            SortKey::SrfHz => Some("f.srf_hz"),
            SortKey::L0H => Some("f.l0_h"),
            SortKey::RdcOhm => Some("f.rdc_ohm"),
            SortKey::CoreCornerHz => Some("f.core_corner_hz"),
        }
    }
}

/// Where the previous page ended.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Cursor {
    /// Sort value of the last item (absent when sorting by part number).
    pub v: Option<f64>,
    /// Part number of the last item (a cursor naming no valid part number does not decode).
    pub p: PartNumber,
}

impl Cursor {
    pub fn encode(&self) -> String {
        hex::encode(serde_json::to_vec(self).unwrap_or_default())
    }
    pub fn decode(text: &str) -> Result<Cursor, String> {
        hex::decode(text)
            .ok()
            .and_then(|b| serde_json::from_slice(&b).ok())
            .ok_or_else(|| "cursor is not one this service handed out".to_string())
    }
}

/// Which fit of each part a query answers from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum AnswerSource {
    /// The part's approved baseline (the default: what a design tool may build on).
    #[default]
    Approved,
    /// The newest succeeded fit, whatever its quality, verdict or approval.
    Latest,
    /// The newest succeeded fit whose model is `ok` and that does not fail the part's limits (a pass,
    /// or no limits) and was not rejected.
    LatestPassing,
}

impl AnswerSource {
    pub fn parse(text: &str) -> Result<AnswerSource, String> {
        match text {
            "approved" => Ok(AnswerSource::Approved),
            "latest" => Ok(AnswerSource::Latest),
            "latest-passing" => Ok(AnswerSource::LatestPassing),
            _ => Err(format!(
                "answer_from must be approved, latest or latest-passing, not {text:?}"
            )),
        }
    }
    pub fn as_str(self) -> &'static str {
        match self {
            AnswerSource::Approved => "approved",
            AnswerSource::Latest => "latest",
            AnswerSource::LatestPassing => "latest-passing",
        }
    }
}

/// A validated query (see [`PartQuery::validate`]).
#[derive(Debug, Clone)]
pub struct PartQuery {
    /// Substring of part number or description.
    pub q: Option<String>,
    pub source: AnswerSource,
    pub srf_min_hz: Option<f64>,
    pub srf_max_hz: Option<f64>,
    pub series_resonance_min_hz: Option<f64>,
    pub series_resonance_max_hz: Option<f64>,
    pub l_at_hz: Option<f64>,
    pub l_min_h: Option<f64>,
    pub l_max_h: Option<f64>,
    pub dcr_max_ohm: Option<f64>,
    pub z_min_ohm: Option<f64>,
    pub z_band_min_hz: Option<f64>,
    pub z_band_max_hz: Option<f64>,
    /// The core corner frequency lies in this band (either end may be open).
    pub core_corner_min_hz: Option<f64>,
    pub core_corner_max_hz: Option<f64>,
    pub sort: Sort,
    pub limit: i64,
    pub cursor: Option<Cursor>,
}

impl PartQuery {
    pub fn validate(&self) -> Result<(), String> {
        let positive = [
            ("srf_min_hz", self.srf_min_hz),
            ("srf_max_hz", self.srf_max_hz),
            ("series_resonance_min_hz", self.series_resonance_min_hz),
            ("series_resonance_max_hz", self.series_resonance_max_hz),
            ("l_at_hz", self.l_at_hz),
            ("l_min_h", self.l_min_h),
            ("l_max_h", self.l_max_h),
            ("dcr_max_ohm", self.dcr_max_ohm),
            ("z_min_ohm", self.z_min_ohm),
            ("z_band_min_hz", self.z_band_min_hz),
            ("z_band_max_hz", self.z_band_max_hz),
            ("core_corner_min_hz", self.core_corner_min_hz),
            ("core_corner_max_hz", self.core_corner_max_hz),
        ];
        for (name, v) in positive {
            if let Some(v) = v
                && !(v.is_finite() && v > 0.0)
            {
                return Err(format!("{name} must be a finite number above zero"));
            }
        }
        if (self.l_min_h.is_some() || self.l_max_h.is_some()) && self.l_at_hz.is_none() {
            return Err("l_min_h and l_max_h need l_at_hz".into());
        }
        if let Some(f) = self.l_at_hz
            && (grid::bracket(f).is_none()
                || !(grid::frequency_hz(0)..=grid::frequency_hz(grid::LAST_K)).contains(&f))
        {
            return Err(format!(
                "l_at_hz must lie in {}..{} Hz, the stored grid",
                grid::frequency_hz(0),
                grid::frequency_hz(grid::LAST_K)
            ));
        }
        if self.z_band_min_hz.is_some() != self.z_band_max_hz.is_some() {
            return Err("z_band_min_hz and z_band_max_hz come together".into());
        }
        if self.z_min_ohm.is_some() && self.z_band_min_hz.is_none() {
            return Err("z_min_ohm needs z_band_min_hz and z_band_max_hz".into());
        }
        if let (Some(a), Some(b)) = (self.z_band_min_hz, self.z_band_max_hz)
            && grid::cover_range(a, b).is_none()
        {
            return Err(format!(
                "the band {a}..{b} Hz must have z_band_min_hz < z_band_max_hz inside the stored grid \
                 ({}..{} Hz)",
                grid::frequency_hz(0),
                grid::frequency_hz(grid::LAST_K)
            ));
        }
        for (lo, hi, what) in [
            (self.srf_min_hz, self.srf_max_hz, "srf"),
            (
                self.series_resonance_min_hz,
                self.series_resonance_max_hz,
                "series_resonance",
            ),
            (self.l_min_h, self.l_max_h, "l"),
            (
                self.core_corner_min_hz,
                self.core_corner_max_hz,
                "core_corner",
            ),
        ] {
            if let (Some(lo), Some(hi)) = (lo, hi)
                && lo > hi
            {
                return Err(format!("{what} minimum is above its maximum"));
            }
        }
        if !(1..=500).contains(&self.limit) {
            return Err("limit must be 1 to 500".into());
        }
        Ok(())
    }
}

/// The SQL of either backend for what differs between them; everything else in a query is the same
/// text.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Dialect {
    Sqlite,
    Postgres,
}

/// One bound value of a [`Sql`] statement.
#[derive(Debug, Clone)]
enum Arg {
    F64(f64),
    I64(i64),
    Text(String),
}

impl From<f64> for Arg {
    fn from(v: f64) -> Arg {
        Arg::F64(v)
    }
}

impl From<i64> for Arg {
    fn from(v: i64) -> Arg {
        Arg::I64(v)
    }
}

impl From<String> for Arg {
    fn from(v: String) -> Arg {
        Arg::Text(v)
    }
}

/// A statement built for one dialect: its text with that dialect's placeholders (`?` or `$n`) and its
/// bound values, run by either store ([`Sql::query`]).
pub(crate) struct Sql {
    dialect: Dialect,
    text: String,
    args: Vec<Arg>,
}

impl Sql {
    fn new(dialect: Dialect, text: &str) -> Sql {
        Sql {
            dialect,
            text: text.to_string(),
            args: Vec::new(),
        }
    }

    fn push(&mut self, text: impl AsRef<str>) -> &mut Sql {
        self.text.push_str(text.as_ref());
        self
    }

    fn push_bind(&mut self, value: impl Into<Arg>) -> &mut Sql {
        self.args.push(value.into());
        match self.dialect {
            Dialect::Sqlite => self.text.push('?'),
            Dialect::Postgres => self.text.push_str(&format!("${}", self.args.len())),
        }
        self
    }

    /// A part-number expression compared and sorted in byte order, as SQLite's BINARY collation does
    /// (a PostgreSQL database may collate text by a language's rules).
    fn part_number(&self, column: &str) -> String {
        match self.dialect {
            Dialect::Sqlite => column.to_string(),
            Dialect::Postgres => format!("{column} COLLATE \"C\""),
        }
    }

    /// The statement with its values bound, for the store of its dialect.
    fn query<DB: sqlx::Database>(&self) -> sqlx::query::Query<'static, DB, DB::Arguments>
    where
        f64: for<'t> sqlx::Encode<'t, DB> + sqlx::Type<DB>,
        i64: for<'t> sqlx::Encode<'t, DB> + sqlx::Type<DB>,
        String: for<'t> sqlx::Encode<'t, DB> + sqlx::Type<DB>,
    {
        let mut q = sqlx::query(sqlx::AssertSqlSafe(self.text.clone()));
        for a in &self.args {
            q = match a {
                Arg::F64(v) => q.bind(*v),
                Arg::I64(v) => q.bind(*v),
                Arg::Text(v) => q.bind(v.clone()),
            };
        }
        q
    }
}

/// The statement of one page of `query`: two steps in one statement. The inner query filters, sorts
/// and cuts the page carrying only keys and the computed figures (so the sort over thousands of
/// matches stays small), the outer one fetches the page's rows.
fn page_sql(dialect: Dialect, query: &PartQuery) -> Sql {
    let plan = Plan::of(query);
    let drift_l0 = match dialect {
        Dialect::Sqlite => {
            "(SELECT json_extract(d.value, '$.percent') FROM json_each(lf.drift_json, '$.parameters') d \
             WHERE json_extract(d.value, '$.name') = 'l0_h')"
        }
        Dialect::Postgres => {
            "(SELECT (d ->> 'percent')::float8 \
             FROM json_array_elements(lf.drift_json::json -> 'parameters') d \
             WHERE d ->> 'name' = 'l0_h' LIMIT 1)"
        }
    };
    let mut q = Sql::new(
        dialect,
        "SELECT p.part_number, p.description, p.baseline_fit_id, p.latest_fit_id, \
         CASE WHEN lf.quality = 'poor' AND lf.verdict_json IS NOT NULL \
         AND lf.verdict_json <> '[]' THEN 'withheld' ELSE lf.verdict END AS latest_verdict, \
         lf.drift_max_sigma AS drift_max_sigma, ",
    );
    q.push(drift_l0);
    q.push(
        " AS drift_l0_percent, \
         p.l_tolerance_percent AS l_tolerance_percent, \
         f.fit_id AS answered, f.srf_hz, f.l0_h, f.rdc_ohm, f.core_corner_hz, \
         k.l_eff_h, k.z_min_ohm, k.sort_value FROM (\
         SELECT p.part_id AS part_id, f.fit_id AS fit_id, p.part_number AS part_number",
    );
    plan.push_computed_columns(&mut q);
    push_source(&mut q, query.source);
    plan.push_grid_joins(&mut q);
    q.push(" WHERE 1 = 1");
    if let Some(text) = &query.q {
        push_text_filter(&mut q, text);
    }
    push_srf_filter(&mut q, query.srf_min_hz, query.srf_max_hz);
    push_series_resonance_filter(
        &mut q,
        query.series_resonance_min_hz,
        query.series_resonance_max_hz,
    );
    push_figure_bounds(&mut q, query);
    plan.push_l_filter(&mut q);
    plan.push_z_filter(&mut q);
    if let Some(c) = &query.cursor {
        plan.push_after_cursor(&mut q, c);
    }
    plan.push_inner_order(&mut q);
    q.push(" LIMIT ").push_bind(query.limit + 1);
    q.push(
        ") AS k JOIN parts p ON p.part_id = k.part_id JOIN fits f ON f.fit_id = k.fit_id \
         LEFT JOIN fits lf ON lf.fit_id = p.latest_fit_id",
    );
    plan.push_outer_order(&mut q);
    q
}

/// The page's items and cursor from the rows of [`page_sql`] (of either backend); the items' series
/// resonances come from [`resonances_sql`].
fn page_of<R>(rows: &[R], limit: i64) -> StoreResult<(Vec<PartSummary>, Option<String>)>
where
    R: Row,
    for<'r> &'r str: sqlx::ColumnIndex<R>,
    for<'r> f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    for<'r> i64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    for<'r> String: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    let mut items = Vec::with_capacity(rows.len());
    let mut sort_values = Vec::with_capacity(rows.len());
    for row in rows {
        sort_values.push(row.try_get::<Option<f64>, _>("sort_value")?);
        items.push(summary_of(row)?);
    }
    let next_cursor = cut_page(&mut items, &sort_values, limit)?;
    Ok((items, next_cursor))
}

/// The series resonances of the items' answering fits, lowest first (none when there are no items).
fn resonances_sql(dialect: Dialect, items: &[PartSummary]) -> Option<Sql> {
    if items.is_empty() {
        return None;
    }
    let mut r = Sql::new(
        dialect,
        "SELECT fit_id, frequency_hz FROM fit_resonances WHERE kind = 'series' AND fit_id IN (",
    );
    for (i, it) in items.iter().enumerate() {
        if i > 0 {
            r.push(", ");
        }
        match it.answered_from_fit_id {
            Some(id) => r.push_bind(id),
            None => r.push("NULL"),
        };
    }
    r.push(") ORDER BY frequency_hz");
    Some(r)
}

/// Fills every item's series resonances (ascending) from `(fit_id, frequency_hz)` rows.
fn attach_series_resonances(items: &mut [PartSummary], res: &[(i64, f64)]) {
    for it in items.iter_mut() {
        it.series_resonances_hz = res
            .iter()
            .filter(|(id, _)| Some(*id) == it.answered_from_fit_id)
            .map(|(_, f)| *f)
            .collect();
    }
}

/// `(fit_id, frequency_hz)` rows of [`resonances_sql`] (of either backend).
fn pairs<R>(rows: &[R]) -> Result<Vec<(i64, f64)>, sqlx::Error>
where
    R: Row,
    usize: sqlx::ColumnIndex<R>,
    for<'r> f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    for<'r> i64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    rows.iter()
        .map(|row| Ok((row.try_get(0)?, row.try_get(1)?)))
        .collect()
}

fn page(items: Vec<PartSummary>, next_cursor: Option<String>, query: &PartQuery) -> PartPage {
    PartPage {
        items,
        next_cursor,
        answer_from: query.source.as_str().to_string(),
    }
}

impl Store {
    pub async fn query_parts(&self, query: &PartQuery) -> StoreResult<PartPage> {
        query.validate().map_err(StoreError::Invalid)?;
        let rows = page_sql(Dialect::Sqlite, query)
            .query()
            .fetch_all(&self.reader)
            .await?;
        let (mut items, next_cursor) = page_of(&rows, query.limit)?;
        if let Some(r) = resonances_sql(Dialect::Sqlite, &items) {
            let res = pairs(&r.query().fetch_all(&self.reader).await?)?;
            attach_series_resonances(&mut items, &res);
        }
        Ok(page(items, next_cursor, query))
    }
}

impl PgStore {
    /// [`Store::query_parts`] on PostgreSQL: the same statement in its dialect, read in one snapshot
    /// (the page and its resonances agree).
    pub async fn query_parts(&self, query: &PartQuery) -> StoreResult<PartPage> {
        query.validate().map_err(StoreError::Invalid)?;
        let mut tx = super::pg::parts::snapshot(&self.pool).await?;
        let rows = page_sql(Dialect::Postgres, query)
            .query()
            .fetch_all(&mut *tx)
            .await?;
        let (mut items, next_cursor) = page_of(&rows, query.limit)?;
        if let Some(r) = resonances_sql(Dialect::Postgres, &items) {
            let res = pairs(&r.query().fetch_all(&mut *tx).await?)?;
            attach_series_resonances(&mut items, &res);
        }
        tx.commit().await?;
        Ok(page(items, next_cursor, query))
    }
}

/// What the filters of one query share: the sort expression, the grid bracket of `l_at_hz` and the
/// |Z| band.
struct Plan<'a> {
    query: &'a PartQuery,
    sort_expr: Option<String>,
    l_bracket: Option<(i64, f64)>,
    z_band: Option<(f64, f64)>,
}

impl Plan<'_> {
    fn of(query: &PartQuery) -> Plan<'_> {
        let sort_expr = query.sort.column().map(|c| {
            let fill = if query.sort.descending {
                "-1e308"
            } else {
                "1e308"
            };
            format!("COALESCE({c}, {fill})")
        });
        let z_band = match (query.z_band_min_hz, query.z_band_max_hz) {
            (Some(a), Some(b)) => Some((a, b)),
            _ => None,
        };
        Plan {
            query,
            sort_expr,
            l_bracket: query.l_at_hz.and_then(grid::bracket),
            z_band,
        }
    }

    /// The inner query's computed columns: L at `l_at_hz`, the lowest |Z| over the band, the sort value.
    fn push_computed_columns(&self, q: &mut Sql) {
        match self.l_bracket {
            Some((_, w)) if w > 0.0 => {
                q.push(", (g1.l_eff_h * (1 - ")
                    .push_bind(w)
                    .push(") + g2.l_eff_h * ")
                    .push_bind(w)
                    .push(") AS l_eff_h");
            }
            Some(_) => {
                q.push(", g1.l_eff_h AS l_eff_h");
            }
            None => {
                q.push(", NULL AS l_eff_h");
            }
        }
        match self.z_band {
            Some((lo, hi)) => {
                q.push(", ");
                push_z_min(q, lo, hi);
                q.push(" AS z_min_ohm");
            }
            None => {
                q.push(", NULL AS z_min_ohm");
            }
        }
        match &self.sort_expr {
            Some(e) => q.push(format!(", {e} AS sort_value")),
            None => q.push(", NULL AS sort_value"),
        };
    }

    /// The grid rows L at `l_at_hz` is interpolated between.
    fn push_grid_joins(&self, q: &mut Sql) {
        if let Some((k, w)) = self.l_bracket {
            q.push(" JOIN fit_grid g1 ON g1.fit_id = f.fit_id AND g1.k = ")
                .push_bind(k);
            if w > 0.0 {
                q.push(" JOIN fit_grid g2 ON g2.fit_id = f.fit_id AND g2.k = ")
                    .push_bind(k + 1);
            }
        }
    }

    /// L at `l_at_hz` between its bounds (only with `l_at_hz`).
    fn push_l_filter(&self, q: &mut Sql) {
        let Some((_, w)) = self.l_bracket else {
            return;
        };
        let expr = if w > 0.0 {
            format!("(g1.l_eff_h * (1 - {w:e}) + g2.l_eff_h * {w:e})")
        } else {
            "g1.l_eff_h".to_string()
        };
        if let Some(lo) = self.query.l_min_h {
            q.push(format!(" AND {expr} >= ")).push_bind(lo);
        }
        if let Some(hi) = self.query.l_max_h {
            q.push(format!(" AND {expr} <= ")).push_bind(hi);
        }
    }

    /// The |Z| band inside the fit's sweep, and its lowest |Z| at least `z_min_ohm`.
    fn push_z_filter(&self, q: &mut Sql) {
        let Some((lo, hi)) = self.z_band else {
            return;
        };
        // The whole band must lie inside the fit's sweep.
        q.push(" AND f.band_min_hz <= ")
            .push_bind(lo * (1.0 + 1e-9))
            .push(" AND f.band_max_hz >= ")
            .push_bind(hi * (1.0 - 1e-9));
        if let Some(zmin) = self.query.z_min_ohm {
            q.push(" AND ");
            push_z_min(q, lo, hi);
            q.push(" >= ").push_bind(zmin);
        }
    }

    /// Keyset pagination: only rows after the cursor in the query's order.
    fn push_after_cursor(&self, q: &mut Sql, c: &Cursor) {
        match (&self.sort_expr, c.v) {
            (Some(e), Some(v)) => {
                let cmp = if self.query.sort.descending { "<" } else { ">" };
                let pn = q.part_number("p.part_number");
                q.push(format!(" AND ({e} {cmp} "))
                    .push_bind(v)
                    .push(format!(" OR ({e} = "))
                    .push_bind(v)
                    .push(format!(" AND {pn} > "))
                    .push_bind(c.p.as_str().to_owned())
                    .push("))");
            }
            _ => {
                let pn = q.part_number("p.part_number");
                q.push(format!(" AND {pn} > "))
                    .push_bind(c.p.as_str().to_owned());
            }
        }
    }

    fn push_inner_order(&self, q: &mut Sql) {
        let pn = q.part_number("p.part_number");
        self.push_order(q, self.sort_expr.as_deref(), &pn);
    }

    fn push_outer_order(&self, q: &mut Sql) {
        let pn = q.part_number("k.part_number");
        let sort = self.sort_expr.as_ref().map(|_| "k.sort_value");
        self.push_order(q, sort, &pn);
    }

    /// `ORDER BY` the sort value in the query's direction (when sorting by a figure), then the part
    /// number ascending.
    fn push_order(&self, q: &mut Sql, sort: Option<&str>, part_number: &str) {
        match sort {
            Some(e) => {
                let dir = if self.query.sort.descending {
                    "DESC"
                } else {
                    "ASC"
                };
                q.push(format!(" ORDER BY {e} {dir}, {part_number} ASC"));
            }
            None => {
                q.push(format!(" ORDER BY {part_number} ASC"));
            }
        }
    }
}

/// Which fit of each part answers: the approved baseline, the newest, or the newest that passes.
fn push_source(q: &mut Sql, source: AnswerSource) {
    q.push(match source {
        AnswerSource::Approved => " FROM parts p JOIN fits f ON f.fit_id = p.baseline_fit_id",
        AnswerSource::Latest => " FROM parts p JOIN fits f ON f.fit_id = p.latest_fit_id",
        AnswerSource::LatestPassing => {
            " FROM parts p JOIN fits f ON f.fit_id = (SELECT MAX(fp.fit_id) FROM fits fp \
             WHERE fp.part_id = p.part_id AND fp.status = 'succeeded' AND fp.quality = 'ok' \
             AND (fp.verdict = 'pass' OR fp.verdict IS NULL) \
             AND (fp.approval IS NULL OR fp.approval <> 'rejected'))"
        }
    });
}

/// The text in the part number or the description (LIKE, with its wildcards escaped). SQLite's LIKE
/// ignores the case of ASCII letters; PostgreSQL's ILIKE does so too (and of other letters as well).
fn push_text_filter(q: &mut Sql, text: &str) {
    let like_op = match q.dialect {
        Dialect::Sqlite => "LIKE",
        Dialect::Postgres => "ILIKE",
    };
    let like = format!(
        "%{}%",
        text.replace('\\', "\\\\")
            .replace('%', "\\%")
            .replace('_', "\\_")
    );
    q.push(format!(" AND (p.part_number {like_op} "))
        .push_bind(like.clone())
        .push(format!(" ESCAPE '\\' OR p.description {like_op} "))
        .push_bind(like)
        .push(" ESCAPE '\\')");
}

fn push_srf_filter(q: &mut Sql, min_hz: Option<f64>, max_hz: Option<f64>) {
    match (min_hz, max_hz) {
        (Some(lo), Some(hi)) => {
            q.push(" AND f.srf_hz BETWEEN ")
                .push_bind(lo)
                .push(" AND ")
                .push_bind(hi);
        }
        (Some(lo), None) => {
            // An SRF above the sweep counts when the sweep's top already clears the minimum.
            q.push(" AND (f.srf_hz >= ")
                .push_bind(lo)
                .push(" OR (f.srf_hz IS NULL AND f.srf_above_hz >= ")
                .push_bind(lo)
                .push("))");
        }
        (None, Some(hi)) => {
            q.push(" AND f.srf_hz <= ").push_bind(hi);
        }
        (None, None) => {}
    }
}

/// A series resonance inside the band (either end may be open).
fn push_series_resonance_filter(q: &mut Sql, min_hz: Option<f64>, max_hz: Option<f64>) {
    if min_hz.is_none() && max_hz.is_none() {
        return;
    }
    q.push(
        " AND EXISTS (SELECT 1 FROM fit_resonances r WHERE r.fit_id = f.fit_id \
         AND r.kind = 'series' AND r.frequency_hz BETWEEN ",
    )
    .push_bind(min_hz.unwrap_or(0.0))
    .push(" AND ")
    .push_bind(max_hz.unwrap_or(f64::MAX))
    .push(")");
}

/// DCR at most, and the core corner between its bounds.
fn push_figure_bounds(q: &mut Sql, query: &PartQuery) {
    if let Some(max) = query.dcr_max_ohm {
        q.push(" AND f.rdc_ohm <= ").push_bind(max);
    }
    // NULL (no core corner) fails both comparisons: such a fit never matches.
    if let Some(lo) = query.core_corner_min_hz {
        q.push(" AND f.core_corner_hz >= ").push_bind(lo);
    }
    if let Some(hi) = query.core_corner_max_hz {
        q.push(" AND f.core_corner_hz <= ").push_bind(hi);
    }
}

/// One row of the outer query as a summary (its series resonances come later).
fn summary_of<R>(row: &R) -> Result<PartSummary, sqlx::Error>
where
    R: Row,
    for<'r> &'r str: sqlx::ColumnIndex<R>,
    for<'r> f64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    for<'r> i64: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
    for<'r> String: sqlx::Decode<'r, R::Database> + sqlx::Type<R::Database>,
{
    Ok(PartSummary {
        part_number: row.try_get("part_number")?,
        description: row.try_get("description")?,
        approved_fit_id: row.try_get("baseline_fit_id")?,
        latest_fit_id: row.try_get("latest_fit_id")?,
        latest_verdict: row.try_get("latest_verdict")?,
        drift_max_sigma: row.try_get("drift_max_sigma")?,
        drift_l0_percent: row.try_get("drift_l0_percent")?,
        l_tolerance_percent: row.try_get("l_tolerance_percent")?,
        srf_hz: row.try_get("srf_hz")?,
        series_resonances_hz: Vec::new(),
        l0_h: row.try_get("l0_h")?,
        rdc_ohm: row.try_get("rdc_ohm")?,
        core_corner_hz: row.try_get("core_corner_hz")?,
        l_eff_h: row.try_get("l_eff_h")?,
        z_min_ohm: row.try_get("z_min_ohm")?,
        answered_from_fit_id: row.try_get("answered")?,
    })
}

/// Cuts the one row fetched beyond the page and returns the cursor after the page's last item (none
/// when nothing follows).
fn cut_page(
    items: &mut Vec<PartSummary>,
    sort_values: &[Option<f64>],
    limit: i64,
) -> StoreResult<Option<String>> {
    if items.len() as i64 <= limit {
        return Ok(None);
    }
    items.truncate(limit as usize);
    let Some(last) = items.last() else {
        return Ok(None);
    };
    // Stored part numbers passed `PartNumber::parse` on the way in; one that does not now is a
    // stored value that does not decode, an internal error rather than a cursor that never could.
    let p = PartNumber::parse(&last.part_number)
        .map_err(|e| StoreError::Database(sqlx::Error::Decode(e.into())))?;
    Ok(Some(
        Cursor {
            v: sort_values[limit as usize - 1],
            p,
        }
        .encode(),
    ))
}

/// Pushes the SQL for the lowest |Z| of the fit `f` over `[lo, hi]`, from its grid rows (see
/// `registry::grid`): the stored floor of every grid interval touching the band whose lowest point lies
/// inside the band, the grid points inside the band, and |Z| at the band's ends interpolated linearly
/// (in log f) between their neighbouring grid points. Caller checks `grid::cover_range(lo, hi)`.
fn push_z_min(q: &mut Sql, lo: f64, hi: f64) {
    const NONE: f64 = 1e308;
    let (kl, kh) = grid::cover_range(lo, hi).unwrap_or((0, -1));
    // The lowest of three values: SQLite's MIN with several arguments, PostgreSQL's LEAST (no
    // argument is NULL, so they agree).
    let least = match q.dialect {
        Dialect::Sqlite => "MIN",
        Dialect::Postgres => "LEAST",
    };
    q.push(format!(
        "NULLIF({least}(COALESCE((SELECT MIN(CASE WHEN g.z_floor_at_hz BETWEEN "
    ))
    .push_bind(lo)
    .push(" AND ")
    .push_bind(hi)
    .push(" THEN g.z_mag_floor_ohm");
    if let Some((a, b)) = grid::index_range(lo, hi) {
        q.push(" WHEN g.k BETWEEN ")
            .push_bind(a)
            .push(" AND ")
            .push_bind(b)
            .push(" THEN g.z_mag_ohm");
    }
    q.push(" END) FROM fit_grid g WHERE g.fit_id = f.fit_id AND g.k BETWEEN ")
        .push_bind(kl)
        .push(" AND ")
        .push_bind(kh)
        .push("), ")
        .push_bind(NONE)
        .push(")");
    for end in [lo, hi] {
        q.push(", ");
        match grid::bracket(end) {
            Some((k, w)) if w > 0.0 => {
                q.push(
                    "COALESCE((SELECT e1.z_mag_ohm * (1 - ",
                )
                .push_bind(w)
                .push(") + e2.z_mag_ohm * ")
                .push_bind(w)
                .push(
                    " FROM fit_grid e1 JOIN fit_grid e2 ON e2.fit_id = e1.fit_id AND e2.k = e1.k + 1 \
                     WHERE e1.fit_id = f.fit_id AND e1.k = ",
                )
                .push_bind(k)
                .push("), ")
                .push_bind(NONE)
                .push(")");
            }
            _ => {
                q.push_bind(NONE);
            }
        }
    }
    q.push("), ").push_bind(NONE).push(")");
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_cursor_decodes_only_to_a_valid_part_number() {
        let c = Cursor {
            v: Some(4.7e-6),
            p: PartNumber::parse("CH-1205/47u").unwrap(),
        };
        assert_eq!(Cursor::decode(&c.encode()), Ok(c));
        // Well-formed hex JSON, but the part number has a space: not a cursor this service hands out.
        let forged = hex::encode(br#"{"v":null,"p":"CH 1205"}"#);
        assert!(Cursor::decode(&forged).is_err());
        assert!(Cursor::decode("zz").is_err());
    }
}
