//! Series, baselines and decisions on PostgreSQL.
//!
//! One daemon decides at a time: `Store::lock_engine` takes a session-level advisory lock
//! ([`ENGINE_LOCK`]) on a connection of its own, held from reading the pending lots to
//! committing the last pass of them, so each lot is decided once, in series order, against
//! the series state every earlier decision left, whichever daemon stored it. A daemon that
//! dies while holding it loses its connection, and the server releases the lock.

use std::collections::HashSet;

use futures_util::TryStreamExt;
use sqlx::pool::PoolConnection;
use sqlx::{Postgres, QueryBuilder, Row, Transaction};

use super::*;

/// The advisory lock key of engine passes ("lotd" and 2).
const ENGINE_LOCK: i64 = 0x6c6f_7464_0002;

type Tx = Transaction<'static, Postgres>;

/// The engine lock of one daemon: the connection whose session holds it.
pub(in crate::store) struct EngineLock(Option<PoolConnection<Postgres>>);

impl Drop for EngineLock {
    /// Not released by `unlock_engine` (an error on the way): the connection is closed
    /// instead of going back to the pool, and the server drops its lock with it.
    fn drop(&mut self) {
        if let Some(conn) = self.0.take() {
            drop(conn.detach());
        }
    }
}

impl Db {
    pub async fn lock_engine(&self) -> Result<EngineLock> {
        let mut conn = self.pool.acquire().await.doing("taking the engine lock")?;
        sqlx::query("SELECT pg_advisory_lock($1)")
            .bind(ENGINE_LOCK)
            .execute(&mut *conn)
            .await
            .doing("waiting for another site's engine pass")?;
        Ok(EngineLock(Some(conn)))
    }

    pub async fn unlock_engine(&self, mut lock: EngineLock) -> Result<()> {
        if let Some(mut conn) = lock.0.take() {
            sqlx::query("SELECT pg_advisory_unlock($1)")
                .bind(ENGINE_LOCK)
                .execute(&mut *conn)
                .await
                .doing("releasing the engine lock")?;
        }
        Ok(())
    }

    pub async fn pending_work(&self) -> Result<Vec<SeriesWork>> {
        let rows = sqlx::query(
            "SELECT s.id, src.name, ch.name, COALESCE(st.cusum_upper, 0.0), \
                    COALESCE(st.cusum_lower, 0.0), COALESCE(st.online_tests, 0), \
                    COALESCE(st.online_rejected, ''), st.lifecycle FROM series s \
             JOIN source src ON src.id = s.source_id \
             JOIN characteristic ch ON ch.id = s.characteristic_id \
             LEFT JOIN series_state st ON st.series_id = s.id \
             WHERE s.id IN (SELECT series_id FROM pending_sample) \
             ORDER BY src.name, ch.name",
        )
        .fetch_all(&self.pool)
        .await
        .doing("finding series with new lots")?;
        let mut work: Vec<SeriesWork> = rows.iter().map(series_work_from_row).collect();
        if work.is_empty() {
            return Ok(work);
        }
        let index: HashMap<i64, usize> = work
            .iter()
            .enumerate()
            .map(|(i, w)| (w.series_id, i))
            .collect();
        self.current_baselines(&mut work, &index).await?;
        self.open_alerts(&mut work, &index).await?;
        let mut rows = sqlx::query(
            "SELECT sm.series_id, sm.id, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value, sm.file_id \
             FROM pending_sample p JOIN sample sm ON sm.id = p.sample_id \
             JOIN lot l ON l.id = sm.lot_id \
             ORDER BY p.series_id, COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .fetch(&self.pool);
        while let Some(r) = rows.try_next().await.doing("loading new lots")? {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                work[*i].pending.push(SeriesSample {
                    sample_id: r.get(1),
                    lot_id: r.get(2),
                    lot: r.get(3),
                    order_time: r.get(4),
                    summary: summary_from_row(&r, 5)?,
                    evaluated: false,
                    file_id: r.get(10),
                });
            }
        }
        Ok(work)
    }

    /// Fills in the current baseline of each series of `work`.
    async fn current_baselines(
        &self,
        work: &mut [SeriesWork],
        index: &HashMap<i64, usize>,
    ) -> Result<()> {
        let ids: Vec<i64> = work.iter().map(|w| w.series_id).collect();
        let rows = sqlx::query(&format!(
            "SELECT b.series_id, b.id, b.n, b.mean, b.m2, b.min_value, b.max_value, b.definition, \
             {DESIGN_COLUMNS} FROM baseline b WHERE b.retired_at IS NULL AND b.series_id = ANY($1)"
        ))
        .bind(&ids)
        .fetch_all(&self.pool)
        .await
        .doing("loading baselines")?;
        for r in &rows {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                let design = design_from_row(r, 8);
                work[*i].baseline = Some(BaselineRow {
                    id: r.get(1),
                    lot_count: design.re.m,
                    summary: summary_from_row(r, 2)?,
                    definition: r.get(7),
                    design,
                });
            }
        }
        Ok(())
    }

    /// Fills in the open alerts (mean and spread) of each series of `work`.
    async fn open_alerts(
        &self,
        work: &mut [SeriesWork],
        index: &HashMap<i64, usize>,
    ) -> Result<()> {
        let rows = sqlx::query(
            "SELECT a.series_id, a.id, a.in_control_run, a.kind, a.notified_at, \
                    a.notified_estimate, \
                    EXISTS (SELECT 1 FROM alert_ack k WHERE k.alert_id = a.id) \
             FROM alert a WHERE a.state = 'open'",
        )
        .fetch_all(&self.pool)
        .await
        .doing("loading open alerts")?;
        for r in &rows {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                let open = Some(OpenAlert {
                    id: r.get(1),
                    in_control_run: r.get(2),
                    notified_at: r
                        .get::<Option<String>, _>(4)
                        .and_then(|t| crate::time::parse_utc(&t)),
                    notified_estimate: r.get(5),
                    acknowledged: r.cell(6),
                });
                if r.get::<String, _>(3) == "spread" {
                    work[*i].open_spread = open;
                } else {
                    work[*i].open_mean = open;
                }
            }
        }
        Ok(())
    }

    pub async fn unit_values(&self, sample_ids: &[i64]) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        let rows = sqlx::query(
            "SELECT sample_id, unit_values FROM sample_values WHERE sample_id = ANY($1)",
        )
        .bind(sample_ids)
        .fetch_all(&self.pool)
        .await
        .doing("reading unit values")?;
        Ok(rows
            .iter()
            .map(|r| {
                let values: Vec<f64> = r.get(1);
                let units = values
                    .into_iter()
                    .enumerate()
                    .map(|(k, v)| (k as i64, v))
                    .collect();
                (r.get(0), units)
            })
            .collect())
    }

    pub async fn residuals(&self, sample_ids: &[i64]) -> Result<Vec<f64>> {
        sqlx::query_scalar(
            "SELECT u.v - s.mean FROM sample_values sv JOIN sample s ON s.id = sv.sample_id \
             CROSS JOIN LATERAL UNNEST(sv.unit_values) WITH ORDINALITY AS u(v, k) \
             WHERE sv.sample_id = ANY($1) ORDER BY sv.sample_id, u.k",
        )
        .bind(sample_ids)
        .fetch_all(&self.pool)
        .await
        .doing("reading baseline residuals")
    }

    pub async fn write_pass(&self, pass: &EnginePass, at: &str) -> Result<PassCounts> {
        let mut counts = PassCounts::default();
        let mut tx = self.pool.begin().await.doing("beginning an engine pass")?;
        let mut baseline_ids: HashMap<i64, i64> = HashMap::new();
        for b in &pass.baselines {
            baseline_ids.insert(b.series_id, insert_baseline(&mut tx, b, at).await?);
            counts.baselines += 1;
        }
        let missing: Vec<i64> = pass
            .decisions
            .iter()
            .map(|d| d.evaluation.series_id)
            .filter(|s| !baseline_ids.contains_key(s))
            .collect::<HashSet<_>>()
            .into_iter()
            .collect();
        let rows = sqlx::query(
            "SELECT series_id, id FROM baseline WHERE retired_at IS NULL AND series_id = ANY($1)",
        )
        .bind(&missing)
        .fetch_all(&mut *tx)
        .await
        .doing("looking up baselines")?;
        baseline_ids.extend(
            rows.iter()
                .map(|r| (r.get::<i64, _>(0), r.get::<i64, _>(1))),
        );
        let eval_ids = self
            .insert_evaluations(&mut tx, &pass.decisions, &baseline_ids, at)
            .await?;
        counts.evaluations += pass.decisions.len();
        alert_changes(&mut tx, pass, &eval_ids, at, &mut counts).await?;
        series_states(&mut tx, &pass.states).await?;
        counts.outliers = insert_outliers(&mut tx, &pass.outliers, at).await?;
        tx.commit().await.doing("committing decisions")?;
        Ok(counts)
    }

    /// Inserts every decision in one statement; returns each row's id by (sample id, kind).
    async fn insert_evaluations(
        &self,
        tx: &mut Tx,
        decisions: &[Decision],
        baseline_ids: &HashMap<i64, i64>,
        at: &str,
    ) -> Result<HashMap<(i64, &'static str), i64>> {
        if decisions.is_empty() {
            return Ok(HashMap::new());
        }
        let e: Vec<&NewEvaluation> = decisions.iter().map(|d| &d.evaluation).collect();
        let mut baselines = Vec::with_capacity(e.len());
        for x in &e {
            baselines.push(*baseline_ids.get(&x.series_id).ok_or_else(|| {
                StoreError::Corrupt(format!(
                    "decision for series {} without a baseline",
                    x.series_id
                ))
            })?);
        }
        let mut q = QueryBuilder::<Postgres>::new(
            "INSERT INTO evaluation (sample_id, series_id, baseline_id, kind, test, model, \
             alternative, delta, statistic, df, df2, p_value, p_adjusted, method, family_size, \
             level, significant, baseline_n, baseline_mean, baseline_sd, lot_n, lot_mean, lot_sd, \
             estimate, ci_low, ci_high, std_error, cusum_upper, cusum_lower, cusum_h, \
             cusum_signal, cpk, cpk_low, cpk_high, note, decided_at, site) \
             SELECT u.*, ",
        );
        q.push_bind(at).push(", ").push_bind(&self.site);
        q.push(" FROM UNNEST(");
        evaluation_columns(&mut q, &e, baselines);
        q.push(") AS u RETURNING id, sample_id, kind");
        let rows = q
            .build()
            .fetch_all(&mut **tx)
            .await
            .doing("recording decisions")?;
        let kind = |k: &str| if k == "spread" { "spread" } else { "mean" };
        Ok(rows
            .iter()
            .map(|r| ((r.get(1), kind(r.get::<&str, _>(2))), r.get(0)))
            .collect())
    }

    pub async fn series_samples(&self, series_id: i64) -> Result<Vec<SeriesSample>> {
        let rows = sqlx::query(
            "SELECT sm.id, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value, \
                    EXISTS (SELECT 1 FROM evaluation e WHERE e.sample_id = sm.id), sm.file_id \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id WHERE sm.series_id = $1 \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .bind(series_id)
        .fetch_all(&self.pool)
        .await
        .doing("reading a series")?;
        rows.iter()
            .map(|r| {
                Ok(SeriesSample {
                    sample_id: r.get(0),
                    lot_id: r.get(1),
                    lot: r.get(2),
                    order_time: r.get(3),
                    summary: summary_from_row(r, 4)?,
                    evaluated: r.cell(9),
                    file_id: r.get(10),
                })
            })
            .collect()
    }

    pub async fn baseline_of(
        &self,
        series_id: i64,
    ) -> Result<Option<(String, String, String, Vec<String>)>> {
        let Some(row) = sqlx::query(
            "SELECT id, definition, design_note, frozen_at FROM baseline \
             WHERE series_id = $1 AND retired_at IS NULL",
        )
        .bind(series_id)
        .fetch_optional(&self.pool)
        .await
        .doing("reading a baseline")?
        else {
            return Ok(None);
        };
        let lots: Vec<String> = sqlx::query_scalar(
            "SELECT l.code FROM baseline_lot bl JOIN sample sm ON sm.id = bl.sample_id \
             JOIN lot l ON l.id = sm.lot_id WHERE bl.baseline_id = $1 \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .bind(row.get::<i64, _>(0))
        .fetch_all(&self.pool)
        .await
        .doing("reading baseline lots")?;
        Ok(Some((row.get(1), row.get(2), row.get(3), lots)))
    }

    pub async fn change_baseline(
        &self,
        series_id: i64,
        new: Option<&NewBaseline>,
        new_definition: &str,
        by: &str,
        reason: &str,
        at: &str,
    ) -> Result<()> {
        let mut tx = self
            .pool
            .begin()
            .await
            .doing("beginning a baseline change")?;
        let old: Option<String> = sqlx::query_scalar(
            "UPDATE baseline SET retired_at = $1 WHERE series_id = $2 AND retired_at IS NULL \
             RETURNING definition",
        )
        .bind(at)
        .bind(series_id)
        .fetch_optional(&mut *tx)
        .await
        .doing("retiring a baseline")?;
        sqlx::query(
            "INSERT INTO baseline_change (series_id, changed_at, changed_by, reason, \
             old_definition, new_definition) VALUES ($1, $2, $3, $4, $5, $6)",
        )
        .bind(series_id)
        .bind(at)
        .bind(by)
        .bind(reason)
        .bind(old)
        .bind(new_definition)
        .execute(&mut *tx)
        .await
        .doing("recording a baseline change")?;
        sqlx::query(
            "INSERT INTO series_state (series_id, cusum_upper, cusum_lower) VALUES ($1, 0.0, 0.0) \
             ON CONFLICT (series_id) DO UPDATE SET cusum_upper = 0.0, cusum_lower = 0.0",
        )
        .bind(series_id)
        .execute(&mut *tx)
        .await
        .doing("restarting the CUSUM")?;
        if let Some(b) = new {
            insert_baseline(&mut tx, b, at).await?;
        }
        tx.commit().await.doing("committing a baseline change")
    }
}

/// A double as SQLite stores it: NaN becomes NULL there, so it does here.
fn real(v: Option<f64>) -> Option<f64> {
    v.filter(|v| !v.is_nan())
}

/// The 35 arrays of [`Db::insert_evaluations`]'s `UNNEST`, in its column order.
fn evaluation_columns(
    q: &mut QueryBuilder<'_, Postgres>,
    e: &[&NewEvaluation],
    baselines: Vec<i64>,
) {
    let int = |f: fn(&NewEvaluation) -> i64| -> Vec<i64> { e.iter().map(|x| f(x)).collect() };
    let num = |f: fn(&NewEvaluation) -> Option<f64>| -> Vec<Option<f64>> {
        e.iter().map(|x| real(f(x))).collect()
    };
    let text = |f: fn(&NewEvaluation) -> Option<&'static str>| -> Vec<Option<&'static str>> {
        e.iter().map(|x| f(x)).collect()
    };
    let finite = |v: f64| Some(v).filter(|v| v.is_finite());
    let mut s = q.separated(", ");
    s.push_bind(int(|x| x.sample_id))
        .push_unseparated("::bigint[]");
    s.push_bind(int(|x| x.series_id))
        .push_unseparated("::bigint[]");
    s.push_bind(baselines).push_unseparated("::bigint[]");
    s.push_bind(text(|x| Some(x.kind)))
        .push_unseparated("::text[]");
    s.push_bind(text(|x| Some(x.test)))
        .push_unseparated("::text[]");
    s.push_bind(text(|x| x.model)).push_unseparated("::text[]");
    s.push_bind(text(|x| Some(x.alternative)))
        .push_unseparated("::text[]");
    s.push_bind(num(|x| Some(x.delta)))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.statistic))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.df)).push_unseparated("::float8[]");
    s.push_bind(num(|x| x.df2)).push_unseparated("::float8[]");
    s.push_bind(num(|x| x.p_value))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.p_adjusted))
        .push_unseparated("::float8[]");
    s.push_bind(text(|x| Some(x.method)))
        .push_unseparated("::text[]");
    s.push_bind(int(|x| x.family_size))
        .push_unseparated("::bigint[]");
    s.push_bind(num(|x| Some(x.level)))
        .push_unseparated("::float8[]");
    s.push_bind(int(|x| x.significant as i64))
        .push_unseparated("::bigint[]");
    s.push_bind(int(|x| x.baseline.n() as i64))
        .push_unseparated("::bigint[]");
    s.push_bind(num(|x| Some(x.baseline_mean)))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.baseline.sd()))
        .push_unseparated("::float8[]");
    s.push_bind(int(|x| x.lot.n() as i64))
        .push_unseparated("::bigint[]");
    s.push_bind(num(|x| Some(x.lot.mean())))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.lot.sd()))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.estimate))
        .push_unseparated("::float8[]");
    let ci: Vec<(Option<f64>, Option<f64>)> = e
        .iter()
        .map(|x| {
            (
                x.ci.and_then(|c| finite(c.0)),
                x.ci.and_then(|c| finite(c.1)),
            )
        })
        .collect();
    s.push_bind(ci.iter().map(|c| c.0).collect::<Vec<_>>())
        .push_unseparated("::float8[]");
    s.push_bind(ci.iter().map(|c| c.1).collect::<Vec<_>>())
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.std_error))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.cusum.map(|c| c.0)))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.cusum.map(|c| c.1)))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.cusum.map(|c| c.2)))
        .push_unseparated("::float8[]");
    s.push_bind(int(|x| x.cusum_signal as i64))
        .push_unseparated("::bigint[]");
    s.push_bind(num(|x| x.cpk.map(|c| c.0)))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.cpk.map(|c| c.1)))
        .push_unseparated("::float8[]");
    s.push_bind(num(|x| x.cpk.map(|c| c.2)))
        .push_unseparated("::float8[]");
    let notes: Vec<Option<String>> = e.iter().map(|x| x.note.clone()).collect();
    s.push_bind(notes).push_unseparated("::text[]");
}

/// The alert changes of a pass, in decision order, with their events and outbox rows.
async fn alert_changes(
    tx: &mut Tx,
    pass: &EnginePass,
    eval_ids: &HashMap<(i64, &'static str), i64>,
    at: &str,
    counts: &mut PassCounts,
) -> Result<()> {
    // The open alert of each series and kind, looked up once and followed through the pass.
    let mut open: HashMap<(i64, &str), Option<i64>> = HashMap::new();
    for d in &pass.decisions {
        let (series_id, kind) = (d.evaluation.series_id, d.evaluation.kind);
        let eval_id = eval_ids[&(d.evaluation.sample_id, kind)];
        if !matches!(
            d.action,
            AlertAction::None | AlertAction::Open | AlertAction::Reopen
        ) && !open.contains_key(&(series_id, kind))
        {
            let id: Option<i64> = sqlx::query_scalar(
                "SELECT id FROM alert WHERE series_id = $1 AND kind = $2 AND state = 'open'",
            )
            .bind(series_id)
            .bind(kind)
            .fetch_optional(&mut **tx)
            .await
            .doing("looking up an open alert")?;
            open.insert((series_id, kind), id);
        }
        let event = alert_action(tx, d, eval_id, at, &mut open, counts).await?;
        if let Some((alert_id, event_kind)) = event {
            let recipients = pass
                .recipients
                .get(&series_id)
                .map(Vec::as_slice)
                .unwrap_or_default();
            alert_event(tx, alert_id, event_kind, eval_id, at, recipients).await?;
        }
    }
    Ok(())
}

/// What one decision does to its series' alert; returns the event to record, if any.
async fn alert_action(
    tx: &mut Tx,
    d: &Decision,
    eval_id: i64,
    at: &str,
    open: &mut HashMap<(i64, &'static str), Option<i64>>,
    counts: &mut PassCounts,
) -> Result<Option<(i64, &'static str)>> {
    let (series_id, kind) = (d.evaluation.series_id, d.evaluation.kind);
    let key = (series_id, kind);
    let current = open.get(&key).copied().flatten().ok_or_else(|| {
        StoreError::Corrupt(format!(
            "series {series_id} has no open {kind} alert to update"
        ))
    });
    let estimate = d.evaluation.estimate;
    let update = |sql: &'static str| sqlx::query(sql);
    Ok(match d.action {
        AlertAction::None => None,
        AlertAction::Open => {
            let alert_id: i64 = sqlx::query_scalar(
                "INSERT INTO alert (series_id, kind, state, opened_at, opening_evaluation, \
                 notified_at, notified_estimate) VALUES ($1, $2, 'open', $3, $4, $3, $5) \
                 RETURNING id",
            )
            .bind(series_id)
            .bind(kind)
            .bind(at)
            .bind(eval_id)
            .bind(estimate)
            .fetch_one(&mut **tx)
            .await
            .doing("opening an alert")?;
            counts.opened += 1;
            open.insert(key, Some(alert_id));
            Some((alert_id, "opened"))
        }
        AlertAction::Attach => {
            let alert_id = current?;
            update("UPDATE alert SET in_control_run = 0 WHERE id = $1")
                .bind(alert_id)
                .execute(&mut **tx)
                .await
                .doing("updating an alert")?;
            Some((alert_id, "attached"))
        }
        AlertAction::Repeat => {
            let alert_id = current?;
            update(
                "UPDATE alert SET in_control_run = 0, notified_at = $1, notified_estimate = $2 \
                 WHERE id = $3",
            )
            .bind(at)
            .bind(estimate)
            .bind(alert_id)
            .execute(&mut **tx)
            .await
            .doing("updating an alert")?;
            Some((alert_id, "repeated"))
        }
        AlertAction::InControl { run } => {
            update("UPDATE alert SET in_control_run = $1 WHERE id = $2")
                .bind(run)
                .bind(current?)
                .execute(&mut **tx)
                .await
                .doing("updating an alert")?;
            None
        }
        AlertAction::Reopen => {
            let alert_id = reopen(tx, series_id, kind, at, estimate).await?;
            counts.reopened += 1;
            open.insert(key, Some(alert_id));
            Some((alert_id, "opened"))
        }
        AlertAction::Resolve => {
            let alert_id = current?;
            open.insert(key, None);
            update(
                "UPDATE alert SET state = 'resolved', resolved_at = $1, in_control_run = 0 \
                 WHERE id = $2",
            )
            .bind(at)
            .bind(alert_id)
            .execute(&mut **tx)
            .await
            .doing("resolving an alert")?;
            counts.resolved += 1;
            Some((alert_id, "resolved"))
        }
    })
}

/// Opens again the series' latest resolved alert of `kind`; returns its id.
async fn reopen(
    tx: &mut Tx,
    series_id: i64,
    kind: &str,
    at: &str,
    estimate: Option<f64>,
) -> Result<i64> {
    sqlx::query_scalar(
        "UPDATE alert SET state = 'open', resolved_at = NULL, in_control_run = 0, \
         notified_at = $3, notified_estimate = $4 WHERE id = ( \
             SELECT id FROM alert WHERE series_id = $1 AND kind = $2 AND state = 'resolved' \
             ORDER BY resolved_at DESC, id DESC LIMIT 1) RETURNING id",
    )
    .bind(series_id)
    .bind(kind)
    .bind(at)
    .bind(estimate)
    .fetch_optional(&mut **tx)
    .await
    .doing("reopening an alert")?
    .ok_or_else(|| {
        StoreError::Corrupt(format!(
            "series {series_id} has no resolved {kind} alert to reopen"
        ))
    })
}

/// Records an alert event and, unless it only attaches a lot, queues its messages.
async fn alert_event(
    tx: &mut Tx,
    alert_id: i64,
    kind: &str,
    eval_id: i64,
    at: &str,
    recipients: &[(String, String)],
) -> Result<()> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO alert_event (alert_id, kind, at, evaluation_id) \
         VALUES ($1, $2, $3, $4) RETURNING id",
    )
    .bind(alert_id)
    .bind(kind)
    .bind(at)
    .bind(eval_id)
    .fetch_one(&mut **tx)
    .await
    .doing("recording an alert event")?;
    if kind == "attached" || recipients.is_empty() {
        return Ok(());
    }
    let (channels, to): (Vec<&str>, Vec<&str>) = recipients
        .iter()
        .map(|(c, r)| (c.as_str(), r.as_str()))
        .unzip();
    sqlx::query(
        "INSERT INTO outbox (alert_event_id, channel, recipient, state, created_at, \
         next_attempt_at) SELECT $1, c, r, 'pending', $4, $4 \
         FROM UNNEST($2::text[], $3::text[]) WITH ORDINALITY AS u(c, r, k) ORDER BY k",
    )
    .bind(event_id)
    .bind(&channels)
    .bind(&to)
    .bind(at)
    .execute(&mut **tx)
    .await
    .doing("queueing a message")?;
    Ok(())
}

/// Each series' running state after the pass (CUSUM, online FDR, alert lifecycle).
async fn series_states(tx: &mut Tx, states: &[SeriesState]) -> Result<()> {
    if states.is_empty() {
        return Ok(());
    }
    let ids: Vec<i64> = states.iter().map(|s| s.series_id).collect();
    let upper: Vec<f64> = states.iter().map(|s| s.cusum_upper).collect();
    let lower: Vec<f64> = states.iter().map(|s| s.cusum_lower).collect();
    let tests: Vec<i64> = states.iter().map(|s| s.online_tests as i64).collect();
    let rejected: Vec<String> = states
        .iter()
        .map(|s| {
            let r: Vec<String> = s.online_rejected.iter().map(u64::to_string).collect();
            r.join(",")
        })
        .collect();
    let lifecycle: Vec<Option<String>> = states
        .iter()
        .map(|s| serde_json::to_string(&s.lifecycle).ok())
        .collect();
    sqlx::query(
        "INSERT INTO series_state (series_id, cusum_upper, cusum_lower, online_tests, \
         online_rejected, lifecycle) SELECT * FROM UNNEST($1::bigint[], $2::float8[], \
         $3::float8[], $4::bigint[], $5::text[], $6::text[]) \
         ON CONFLICT (series_id) DO UPDATE SET cusum_upper = excluded.cusum_upper, \
         cusum_lower = excluded.cusum_lower, online_tests = excluded.online_tests, \
         online_rejected = excluded.online_rejected, lifecycle = excluded.lifecycle",
    )
    .bind(&ids)
    .bind(&upper)
    .bind(&lower)
    .bind(&tests)
    .bind(&rejected)
    .bind(&lifecycle)
    .execute(&mut **tx)
    .await
    .doing("recording series state")?;
    Ok(())
}

/// Records outliers (a unit already recorded is left as it is).
async fn insert_outliers(tx: &mut Tx, outliers: &[NewOutlier], at: &str) -> Result<usize> {
    if outliers.is_empty() {
        return Ok(0);
    }
    let int = |f: fn(&NewOutlier) -> i64| -> Vec<i64> { outliers.iter().map(f).collect() };
    let num = |f: fn(&NewOutlier) -> f64| -> Vec<f64> { outliers.iter().map(f).collect() };
    let rules: Vec<&str> = outliers.iter().map(|o| o.rule).collect();
    sqlx::query(
        "INSERT INTO outlier (sample_id, seq, value, lot_median, distance, fence, rule, \
         set_aside, found_at) SELECT s, q, v, m, d, f, r, a, $9 FROM UNNEST($1::bigint[], \
         $2::bigint[], $3::float8[], $4::float8[], $5::float8[], $6::float8[], $7::text[], \
         $8::bigint[]) WITH ORDINALITY AS u(s, q, v, m, d, f, r, a, k) ORDER BY k \
         ON CONFLICT (sample_id, seq) DO NOTHING",
    )
    .bind(int(|o| o.sample_id))
    .bind(int(|o| o.seq))
    .bind(num(|o| o.value))
    .bind(num(|o| o.lot_median))
    .bind(num(|o| o.distance))
    .bind(num(|o| o.fence))
    .bind(&rules)
    .bind(int(|o| o.set_aside as i64))
    .bind(at)
    .execute(&mut **tx)
    .await
    .doing("recording outliers")?;
    Ok(outliers.len())
}

/// Inserts a frozen baseline and its lots; returns its id.
async fn insert_baseline(tx: &mut Tx, b: &NewBaseline, at: &str) -> Result<i64> {
    let s = &b.summary;
    let d = &b.design;
    let id: i64 = sqlx::query_scalar(
        "INSERT INTO baseline (series_id, frozen_at, definition, lot_count, n, mean, m2, \
         min_value, max_value, last_order_key, mean_of_means, msb, msw, df_between, \
         df_within, n0, n_harmonic, var_between, var_within, between_p, normality_p, \
         level_mean, level_spread, cusum_k, cusum_h, design_note, outlier_scale, \
         outlier_fence, heavy_tailed, spread_mean, spread_sd, spread_lots, spread_n, \
         log_scale, spread_kurtosis) VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, \
         $12, $13, $14, $15, $16, $17, $18, $19, $20, $21, $22, $23, $24, $25, $26, $27, $28, \
         $29, $30, $31, $32, $33, $34, $35) RETURNING id",
    )
    .bind(b.series_id)
    .bind(at)
    .bind(&b.definition)
    .bind(b.sample_ids.len() as i64)
    .bind(s.n() as i64)
    .bind(s.mean())
    .bind(s.m2())
    .bind(s.min())
    .bind(s.max())
    .bind(&b.last_order_time)
    .bind(d.re.mean_of_means)
    .bind(d.re.msb)
    .bind(d.re.msw)
    .bind(d.re.df_between)
    .bind(d.re.df_within)
    .bind(d.re.n0)
    .bind(d.re.n_harmonic)
    .bind(d.re.var_between)
    .bind(d.re.var_within)
    .bind(d.re.p_value)
    .bind(real(d.normality_p))
    .bind(d.level_mean)
    .bind(d.level_spread)
    .bind(d.cusum.map(|c| c.0))
    .bind(d.cusum.map(|c| c.1))
    .bind(&b.note)
    .bind(d.outliers.map(|o| o.scale))
    .bind(d.outliers.map(|o| o.fence))
    .bind(d.outliers.map(|o| o.heavy_tailed as i64))
    .bind(d.spread_base.map(|b| b.mean))
    .bind(d.spread_base.map(|b| b.sd))
    .bind(d.spread_base.map(|b| b.lots as i64))
    .bind(d.spread_base.map(|b| b.n))
    .bind(d.log_scale as i64)
    .bind(real(d.spread_base.and_then(|b| b.kurtosis)))
    .fetch_one(&mut **tx)
    .await
    .doing("freezing a baseline")?;
    sqlx::query(
        "INSERT INTO baseline_lot (baseline_id, sample_id) SELECT $1, UNNEST($2::bigint[])",
    )
    .bind(id)
    .bind(&b.sample_ids)
    .execute(&mut **tx)
    .await
    .doing("recording baseline lots")?;
    Ok(id)
}
