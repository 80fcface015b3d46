//! Reads both backends run with the same text: written once here, not once per backend.
//!
//! SQLite reads `$1, $2, ...` placeholders as PostgreSQL does, so a statement that needs no
//! function or type of one backend only (no JSON, no arrays, no `string_agg`) is one string;
//! its rows are read through [`Cells`], the same on both. Statements that differ live in the
//! backends' rooms.

use super::*;

/// A value bound to a portable statement.
pub(super) enum Arg<'a> {
    Int(i64),
    Text(&'a str),
}

/// A row type read the same way from either backend's row.
pub(super) trait FromCells: Sized {
    fn from_cells(r: &impl Cells) -> Self;
}

impl<A: Cell> FromCells for (A,) {
    fn from_cells(r: &impl Cells) -> Self {
        (r.cell(0),)
    }
}

impl<A: Cell, B: Cell> FromCells for (A, B) {
    fn from_cells(r: &impl Cells) -> Self {
        (r.cell(0), r.cell(1))
    }
}

impl<A: Cell, B: Cell, C: Cell, D: Cell, E: Cell> FromCells for (A, B, C, D, E) {
    fn from_cells(r: &impl Cells) -> Self {
        (r.cell(0), r.cell(1), r.cell(2), r.cell(3), r.cell(4))
    }
}

impl FromCells for UndeliveredRow {
    fn from_cells(r: &impl Cells) -> Self {
        UndeliveredRow {
            id: r.cell(0),
            channel: r.cell(1),
            recipient: r.cell(2),
            state: r.cell(3),
            attempts: r.cell(4),
            last_error: r.cell(5),
            message: r.cell(6),
        }
    }
}

impl FromCells for SilentSource {
    fn from_cells(r: &impl Cells) -> Self {
        SilentSource {
            source: r.cell(0),
            since: r.cell(1),
            last_lot_at: r.cell(2),
            threshold_days: r.cell(3),
        }
    }
}

impl FromCells for HealthRow {
    fn from_cells(r: &impl Cells) -> Self {
        health_from_row(r)
    }
}

/// (source, characteristic, design) of [`Store::series_designs`].
struct NamedDesign(String, String, Design);

impl FromCells for NamedDesign {
    fn from_cells(r: &impl Cells) -> Self {
        NamedDesign(r.cell(0), r.cell(1), design_from_row(r, 2))
    }
}

impl Store {
    /// Every row of a portable statement.
    async fn rows<T: FromCells>(
        &self,
        sql: &str,
        args: &[Arg<'_>],
        doing: &'static str,
    ) -> Result<Vec<T>> {
        match &self.db {
            Backend::Sqlite(db) => db.rows(sql, args, doing).await,
            Backend::Postgres(db) => db.rows(sql, args, doing).await,
        }
    }

    /// The first row of a portable statement, if any.
    async fn first<T: FromCells>(
        &self,
        sql: &str,
        args: &[Arg<'_>],
        doing: &'static str,
    ) -> Result<Option<T>> {
        Ok(self.rows(sql, args, doing).await?.into_iter().next())
    }

    /// Messages that could not be delivered (failed permanently or expired).
    pub async fn undelivered(&self) -> Result<Vec<UndeliveredRow>> {
        self.rows(
            "SELECT id, channel, recipient, state, attempts, last_error, \
             CASE WHEN digest_id IS NOT NULL THEN 'digest' \
             WHEN silence_event_id IS NOT NULL THEN 'silence' \
             WHEN health_event_id IS NOT NULL THEN 'health' ELSE 'alert' END FROM outbox \
             WHERE state IN ('failed', 'expired') ORDER BY id",
            &[],
            "listing undelivered messages",
        )
        .await
    }

    /// Lots stored per source (for summaries), by source name.
    pub async fn lots_per_source(&self) -> Result<Vec<(String, i64)>> {
        self.rows(
            "SELECT s.name, COUNT(l.id) FROM source s LEFT JOIN lot l ON l.source_id = s.id \
             GROUP BY s.name ORDER BY s.name",
            &[],
            "counting lots per source",
        )
        .await
    }

    /// Quarantined files with their reasons, oldest first.
    pub async fn quarantined(&self) -> Result<Vec<(String, String)>> {
        self.rows(
            "SELECT file_name, reason FROM quarantined_file ORDER BY quarantined_at, id",
            &[],
            "listing quarantined files",
        )
        .await
    }

    /// True when a source of that name is stored.
    pub async fn source_exists(&self, name: &str) -> Result<bool> {
        let found: Option<(i64,)> = self
            .first(
                "SELECT id FROM source WHERE name = $1",
                &[Arg::Text(name)],
                "looking up a source",
            )
            .await?;
        Ok(found.is_some())
    }

    /// The series of a source and characteristic, if stored.
    pub async fn series_named(&self, source: &str, characteristic: &str) -> Result<Option<i64>> {
        let found: Option<(i64,)> = self
            .first(
                "SELECT se.id FROM series se JOIN source src ON src.id = se.source_id \
                 JOIN characteristic ch ON ch.id = se.characteristic_id \
                 WHERE src.name = $1 AND ch.name = $2",
                &[Arg::Text(source), Arg::Text(characteristic)],
                "looking up a series",
            )
            .await?;
        Ok(found.map(|(id,)| id))
    }

    /// The audit trail of a series' baseline changes: (when, who, why, old, new).
    pub async fn baseline_changes(
        &self,
        series_id: i64,
    ) -> Result<Vec<(String, String, String, Option<String>, String)>> {
        self.rows(
            "SELECT changed_at, changed_by, reason, old_definition, new_definition \
             FROM baseline_change WHERE series_id = $1 ORDER BY id",
            &[Arg::Int(series_id)],
            "reading baseline changes",
        )
        .await
    }

    /// The samples of a baseline.
    pub async fn baseline_samples(&self, baseline_id: i64) -> Result<Vec<i64>> {
        let rows: Vec<(i64,)> = self
            .rows(
                "SELECT sample_id FROM baseline_lot WHERE baseline_id = $1",
                &[Arg::Int(baseline_id)],
                "reading baseline lots",
            )
            .await?;
        Ok(rows.into_iter().map(|(id,)| id).collect())
    }

    /// The frozen design of every series that has one, by source and characteristic.
    pub async fn series_designs(&self) -> Result<Vec<(String, String, Design)>> {
        let rows: Vec<NamedDesign> = self
            .rows(
                &format!(
                    "SELECT src.name, ch.name, {DESIGN_COLUMNS} \
                     FROM baseline b JOIN series se ON se.id = b.series_id \
                     AND b.retired_at IS NULL JOIN source src ON src.id = se.source_id \
                     JOIN characteristic ch ON ch.id = se.characteristic_id \
                     ORDER BY src.name, ch.name"
                ),
                &[],
                "reading series designs",
            )
            .await?;
        Ok(rows.into_iter().map(|d| (d.0, d.1, d.2)).collect())
    }

    /// Sources with an open silence, longest silent first.
    pub async fn silent_sources(&self) -> Result<Vec<SilentSource>> {
        self.rows(
            "SELECT s.name, si.opened_at, si.last_lot_at, si.threshold_days FROM silence si \
             JOIN source s ON s.id = si.source_id WHERE si.resolved_at IS NULL \
             ORDER BY si.last_lot_at, s.name",
            &[],
            "listing silent sources",
        )
        .await
    }

    /// The health of every component, "ingest" first. On PostgreSQL the rows are shared by
    /// the daemons of every site in this version.
    pub async fn health(&self) -> Result<Vec<HealthRow>> {
        self.rows(
            "SELECT component, failing_since, failures, last_error, last_error_at, \
             recovered_at, notice_event_id IS NOT NULL FROM health \
             ORDER BY component = 'delivery', component",
            &[],
            "reading the health of ingest and delivery",
        )
        .await
    }

    /// The local date of the newest digest made, if any.
    pub async fn latest_digest_date(&self) -> Result<Option<String>> {
        let row: Option<(Option<String>,)> = self
            .first("SELECT MAX(local_date) FROM digest", &[], "reading digests")
            .await?;
        Ok(row.and_then(|(d,)| d))
    }
}

/// Binds `args` to a statement of either backend.
macro_rules! bind_args {
    ($query:expr, $args:expr) => {{
        let mut q = $query;
        for a in $args {
            q = match a {
                Arg::Int(v) => q.bind(*v),
                Arg::Text(s) => q.bind(*s),
            };
        }
        q
    }};
}

/// `rows`: runs `sql` with `args` and reads every row through [`FromCells`]. The same body for
/// both backends; only the row type behind `fetch_all` differs.
macro_rules! impl_rows {
    ($db:ty) => {
        impl $db {
            pub(super) async fn rows<T: FromCells>(
                &self,
                sql: &str,
                args: &[Arg<'_>],
                doing: &'static str,
            ) -> Result<Vec<T>> {
                let rows = bind_args!(sqlx::query(sql), args)
                    .fetch_all(self.pool())
                    .await
                    .doing(doing)?;
                Ok(rows.iter().map(T::from_cells).collect())
            }
        }
    };
}

impl_rows!(sqlite::Db);
impl_rows!(postgres::Db);
