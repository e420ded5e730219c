//! Behavioural queries for design tools, answered from stored figures through indexes: SRF band,
//! series-resonance band, effective L at a frequency (interpolated on the stored grid), DCR at most,
//! |Z| at least over a band, core corner frequency in a band; approved baselines only or the newest
//! succeeded fit of every part; sorted, keyset-paginated. A fit without a core loss (a lossless core,
//! a rational model) has no core corner: a query that bounds the corner never matches it.

use super::{Store, StoreError, StoreResult};
use crate::registry::grid;
use crate::registry::ids::PartNumber;
use crate::registry::wire::{PartPage, PartSummary};
use sqlx::{QueryBuilder, Row, Sqlite};

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

impl Store {
    pub async fn query_parts(&self, query: &PartQuery) -> StoreResult<PartPage> {
        query.validate().map_err(StoreError::Invalid)?;
        let plan = Plan::of(query);
        // Two steps in one statement: the inner query filters, sorts and cuts the page carrying only
        // keys and the computed figures (so the sort over thousands of matches stays small), the outer
        // one fetches the page's rows.
        let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
            "SELECT p.part_number, p.description, p.baseline_fit_id, p.latest_fit_id, \
             CASE WHEN lf.quality = 'poor' AND lf.verdict_json IS NOT NULL \
             AND lf.verdict_json <> '[]' THEN 'withheld' ELSE lf.verdict END AS latest_verdict, \
             lf.drift_max_sigma AS drift_max_sigma, \
             (SELECT json_extract(d.value, '$.percent') FROM json_each(lf.drift_json, '$.parameters') d \
              WHERE json_extract(d.value, '$.name') = 'l0_h') AS drift_l0_percent, \
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

        let rows = q.build().fetch_all(&self.reader).await?;
        let mut items = Vec::with_capacity(rows.len());
        let mut sort_values = Vec::with_capacity(rows.len());
        for row in &rows {
            sort_values.push(row.try_get::<Option<f64>, _>("sort_value")?);
            items.push(summary_of(row)?);
        }
        let next_cursor = cut_page(&mut items, &sort_values, query.limit)?;
        self.attach_series_resonances(&mut items).await?;
        Ok(PartPage {
            items,
            next_cursor,
            answer_from: query.source.as_str().to_string(),
        })
    }

    /// Fills every item's series resonances (ascending) from its answering fit.
    async fn attach_series_resonances(&self, items: &mut [PartSummary]) -> StoreResult<()> {
        if items.is_empty() {
            return Ok(());
        }
        let mut r: QueryBuilder<Sqlite> = QueryBuilder::new(
            "SELECT fit_id, frequency_hz FROM fit_resonances WHERE kind = 'series' AND fit_id IN (",
        );
        let mut sep = r.separated(", ");
        for it in items.iter() {
            sep.push_bind(it.answered_from_fit_id);
        }
        r.push(") ORDER BY frequency_hz");
        let res: Vec<(i64, f64)> = r.build_query_as().fetch_all(&self.reader).await?;
        for it in items.iter_mut() {
            it.series_resonances_hz = res
                .iter()
                .filter(|(id, _)| Some(*id) == it.answered_from_fit_id)
                .map(|(_, f)| *f)
                .collect();
        }
        Ok(())
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
    fn push_computed_columns(&self, q: &mut QueryBuilder<Sqlite>) {
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
    fn push_grid_joins(&self, q: &mut QueryBuilder<Sqlite>) {
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
    fn push_l_filter(&self, q: &mut QueryBuilder<Sqlite>) {
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
    fn push_z_filter(&self, q: &mut QueryBuilder<Sqlite>) {
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
    fn push_after_cursor(&self, q: &mut QueryBuilder<Sqlite>, c: &Cursor) {
        match (&self.sort_expr, c.v) {
            (Some(e), Some(v)) => {
                let cmp = if self.query.sort.descending { "<" } else { ">" };
                q.push(format!(" AND ({e} {cmp} "))
                    .push_bind(v)
                    .push(format!(" OR ({e} = "))
                    .push_bind(v)
                    .push(" AND p.part_number > ")
                    .push_bind(c.p.as_str().to_owned())
                    .push("))");
            }
            _ => {
                q.push(" AND p.part_number > ")
                    .push_bind(c.p.as_str().to_owned());
            }
        }
    }

    fn push_inner_order(&self, q: &mut QueryBuilder<Sqlite>) {
        match &self.sort_expr {
            Some(e) => {
                let dir = if self.query.sort.descending {
                    "DESC"
                } else {
                    "ASC"
                };
                q.push(format!(" ORDER BY {e} {dir}, p.part_number ASC"));
            }
            None => {
                q.push(" ORDER BY p.part_number ASC");
            }
        }
    }

    fn push_outer_order(&self, q: &mut QueryBuilder<Sqlite>) {
        match &self.sort_expr {
            Some(_) => {
                let dir = if self.query.sort.descending {
                    "DESC"
                } else {
                    "ASC"
                };
                q.push(format!(" ORDER BY k.sort_value {dir}, k.part_number ASC"));
            }
            None => {
                q.push(" ORDER BY k.part_number ASC");
            }
        }
    }
}

/// Which fit of each part answers: the approved baseline, the newest, or the newest that passes.
fn push_source(q: &mut QueryBuilder<Sqlite>, source: AnswerSource) {
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

/// The text in the part number or the description (LIKE, with its wildcards escaped).
fn push_text_filter(q: &mut QueryBuilder<Sqlite>, text: &str) {
    let like = format!(
        "%{}%",
        text.replace('\\', "\\\\")
            .replace('%', "\\%")
            .replace('_', "\\_")
    );
    q.push(" AND (p.part_number LIKE ")
        .push_bind(like.clone())
        .push(" ESCAPE '\\' OR p.description LIKE ")
        .push_bind(like)
        .push(" ESCAPE '\\')");
}

fn push_srf_filter(q: &mut QueryBuilder<Sqlite>, min_hz: Option<f64>, max_hz: Option<f64>) {
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
fn push_series_resonance_filter(
    q: &mut QueryBuilder<Sqlite>,
    min_hz: Option<f64>,
    max_hz: Option<f64>,
) {
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
fn push_figure_bounds(q: &mut QueryBuilder<Sqlite>, query: &PartQuery) {
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
fn summary_of(row: &sqlx::sqlite::SqliteRow) -> Result<PartSummary, sqlx::Error> {
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
fn push_z_min(q: &mut QueryBuilder<Sqlite>, lo: f64, hi: f64) {
    const NONE: f64 = 1e308;
    let (kl, kh) = grid::cover_range(lo, hi).unwrap_or((0, -1));
    q.push("NULLIF(MIN(COALESCE((SELECT MIN(CASE WHEN g.z_floor_at_hz BETWEEN ")
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
