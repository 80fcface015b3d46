//! Series, baselines and decisions on SQLite.

use super::*;

impl Db {
    /// Everything the engine needs for the series that have undecided samples, or no frozen
    /// baseline yet. Series are returned by source, then characteristic.
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

        for r in sqlx::query(&format!(
            "SELECT b.series_id, b.id, b.n, b.mean, b.m2, b.min_value, b.max_value, b.definition, \
             {DESIGN_COLUMNS} FROM baseline b WHERE b.retired_at IS NULL \
             AND b.series_id IN (SELECT series_id FROM pending_sample)"
        ))
        .fetch_all(&self.pool)
        .await
        .doing("loading baselines")?
        {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                let design = design_from_row(&r, 8);
                work[*i].baseline = Some(BaselineRow {
                    id: r.get(1),
                    lot_count: design.re.m,
                    summary: summary_from_row(&r, 2)?,
                    definition: r.get(7),
                    design,
                });
            }
        }
        for r in sqlx::query(
            "SELECT a.series_id, a.id, a.in_control_run, a.kind, a.notified_at, \
                    a.notified_estimate, \
                    EXISTS (SELECT 1 FROM alert_ack k WHERE k.alert_id = a.id) \
             FROM alert a WHERE a.state = 'open'",
        )
        .fetch_all(&self.pool)
        .await
        .doing("loading open alerts")?
        {
            if let Some(i) = index.get(&r.get::<i64, _>(0)) {
                let open = Some(OpenAlert {
                    id: r.get(1),
                    in_control_run: r.get(2),
                    notified_at: r
                        .get::<Option<String>, _>(4)
                        .and_then(|t| crate::time::parse_utc(&t)),
                    notified_estimate: r.get(5),
                    acknowledged: r.get::<i64, _>(6) != 0,
                });
                if r.get::<String, _>(3) == "spread" {
                    work[*i].open_spread = open;
                } else {
                    work[*i].open_mean = open;
                }
            }
        }
        // Every pending sample, read on the connection's own handle in the queue's order (see
        // `bulk::pending_samples`) and put in series order here: SQLite's sort of the whole
        // queue and sqlx's copy of every cell cost a backfill more than the rest of the read.
        let mut conn = self.pool.acquire().await.doing("loading new lots")?;
        let mut handle = conn.lock_handle().await.doing("loading new lots")?;
        bulk::pending_samples(handle.as_raw_handle(), |series_id, sample| {
            if let Some(i) = index.get(&series_id) {
                work[*i].pending.push(sample);
            }
        })?;
        for w in &mut work {
            // Byte order, as SQLite's BINARY collation orders text.
            w.pending
                .sort_unstable_by(|a, b| (&a.order_time, &a.lot).cmp(&(&b.order_time, &b.lot)));
        }
        Ok(work)
    }

    /// (seq, value) of every unit of the given pending samples: those kept since this process
    /// stored them (see [`super::fresh`]), the rest read as [`Db::unit_values`] does.
    pub async fn pending_values(
        &self,
        samples: &[SeriesSample],
    ) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        let wanted: Vec<(i64, i64)> = samples.iter().map(|s| (s.sample_id, s.file_id)).collect();
        let (mut found, missing) = self.fresh.lock().expect("fresh values lock").take(&wanted);
        if !missing.is_empty() {
            found.extend(self.unit_values(&missing).await?);
        }
        Ok(found)
    }

    /// (seq, value) of every unit of the given samples, in seq order (see [`bulk`]).
    pub async fn unit_values(&self, sample_ids: &[i64]) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        let mut conn = self.pool.acquire().await.doing("reading unit values")?;
        let mut handle = conn.lock_handle().await.doing("reading unit values")?;
        bulk::unit_values(handle.as_raw_handle(), sample_ids)
    }

    /// Within-lot residuals (value − its lot's mean) of the given samples, in sample and
    /// unit order.
    pub async fn residuals(&self, sample_ids: &[i64]) -> Result<Vec<f64>> {
        let mut out = Vec::new();
        for chunk in sample_ids.chunks(ROWS_PER_INSERT) {
            let mut q = in_list(
                "SELECT v.value - s.mean FROM sample_values sv \
                 JOIN sample s ON s.id = sv.sample_id JOIN json_each(sv.values_json) v \
                 WHERE sv.sample_id IN",
                chunk,
                " ORDER BY sv.sample_id, v.key",
            );
            for r in q
                .build()
                .fetch_all(&self.pool)
                .await
                .doing("reading baseline residuals")?
            {
                out.push(r.get::<f64, _>(0));
            }
        }
        Ok(out)
    }

    /// Writes one engine pass (baselines, decisions, alert changes, outbox rows, CUSUM state)
    /// in one transaction, so an alert is never decided without its message queued.
    pub async fn write_pass(&self, pass: &EnginePass, at: &str) -> Result<PassCounts> {
        let mut counts = PassCounts::default();
        if pass.baselines.is_empty() && pass.decisions.is_empty() && pass.outliers.is_empty() {
            return Ok(counts);
        }
        let mut tx = self.begin().await?;
        let mut baseline_ids: HashMap<i64, i64> = HashMap::new();
        for b in &pass.baselines {
            let id = insert_baseline(&mut tx, b, at).await?;
            baseline_ids.insert(b.series_id, id);
            counts.baselines += 1;
        }
        // Baselines frozen in earlier passes.
        let missing: Vec<i64> = pass
            .decisions
            .iter()
            .map(|d| d.evaluation.series_id)
            .filter(|s| !baseline_ids.contains_key(s))
            .collect::<HashSet<_>>()
            .into_iter()
            .collect();
        for chunk in missing.chunks(ROWS_PER_INSERT) {
            let mut q = in_list(
                "SELECT series_id, id FROM baseline WHERE retired_at IS NULL AND series_id IN",
                chunk,
                "",
            );
            for r in q
                .build()
                .fetch_all(&mut *tx)
                .await
                .doing("looking up baselines")?
            {
                baseline_ids.insert(r.get(0), r.get(1));
            }
        }

        // Evaluations, one prepared statement on the raw handle (see `bulk`).
        let eval_ids = {
            let mut handle = tx
                .lock_handle()
                .await
                .doing("taking the connection for the decisions")?;
            bulk::insert_evaluations(
                handle.as_raw_handle(),
                &pass.decisions,
                &baseline_ids,
                at,
                &self.site,
            )?
        };
        counts.evaluations += pass.decisions.len();

        // Alert changes, in decision order. The open alert of each series and kind is looked
        // up once and followed through the pass.
        let mut open: HashMap<(i64, &str), Option<i64>> = HashMap::new();
        for d in &pass.decisions {
            let kind = d.evaluation.kind;
            let eval_id = eval_ids[&(d.evaluation.sample_id, kind)];
            let series_id = d.evaluation.series_id;
            let key = (series_id, kind);
            if !matches!(
                d.action,
                AlertAction::None | AlertAction::Open | AlertAction::Reopen
            ) && !open.contains_key(&key)
            {
                let id: Option<i64> = sqlx::query_scalar(
                    "SELECT id FROM alert WHERE series_id = ? AND kind = ? AND state = 'open'",
                )
                .bind(series_id)
                .bind(kind)
                .fetch_optional(&mut *tx)
                .await
                .doing("looking up an open alert")?;
                open.insert(key, id);
            }
            let current = || {
                open.get(&key).copied().flatten().ok_or_else(|| {
                    StoreError::Corrupt(format!(
                        "series {series_id} has no open {kind} alert to update"
                    ))
                })
            };
            let event = match d.action {
                AlertAction::None => None,
                AlertAction::Open => {
                    let alert_id: i64 = sqlx::query_scalar(
                        "INSERT INTO alert (series_id, kind, state, opened_at, \
                         opening_evaluation) VALUES (?, ?, 'open', ?, ?) RETURNING id",
                    )
                    .bind(series_id)
                    .bind(kind)
                    .bind(at)
                    .bind(eval_id)
                    .fetch_one(&mut *tx)
                    .await
                    .doing("opening an alert")?;
                    counts.opened += 1;
                    open.insert(key, Some(alert_id));
                    sqlx::query(
                        "UPDATE alert SET notified_at = ?, notified_estimate = ? WHERE id = ?",
                    )
                    .bind(at)
                    .bind(d.evaluation.estimate)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("updating an alert")?;
                    Some((alert_id, "opened"))
                }
                AlertAction::Attach => {
                    let alert_id = current()?;
                    sqlx::query("UPDATE alert SET in_control_run = 0 WHERE id = ?")
                        .bind(alert_id)
                        .execute(&mut *tx)
                        .await
                        .doing("updating an alert")?;
                    Some((alert_id, "attached"))
                }
                AlertAction::Repeat => {
                    let alert_id = current()?;
                    sqlx::query(
                        "UPDATE alert SET in_control_run = 0, notified_at = ?, \
                         notified_estimate = ? WHERE id = ?",
                    )
                    .bind(at)
                    .bind(d.evaluation.estimate)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("updating an alert")?;
                    Some((alert_id, "repeated"))
                }
                AlertAction::InControl { run } => {
                    let alert_id = current()?;
                    sqlx::query("UPDATE alert SET in_control_run = ? WHERE id = ?")
                        .bind(run)
                        .bind(alert_id)
                        .execute(&mut *tx)
                        .await
                        .doing("updating an alert")?;
                    None
                }
                AlertAction::Reopen => {
                    let alert_id: i64 = sqlx::query_scalar(
                        "SELECT id FROM alert WHERE series_id = ? AND kind = ? \
                         AND state = 'resolved' ORDER BY resolved_at DESC, id DESC LIMIT 1",
                    )
                    .bind(series_id)
                    .bind(kind)
                    .fetch_optional(&mut *tx)
                    .await
                    .doing("looking up a resolved alert")?
                    .ok_or_else(|| {
                        StoreError::Corrupt(format!(
                            "series {series_id} has no resolved {kind} alert to reopen"
                        ))
                    })?;
                    sqlx::query(
                        "UPDATE alert SET state = 'open', resolved_at = NULL, in_control_run = 0, \
                         notified_at = ?, notified_estimate = ? WHERE id = ?",
                    )
                    .bind(at)
                    .bind(d.evaluation.estimate)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("reopening an alert")?;
                    counts.reopened += 1;
                    open.insert(key, Some(alert_id));
                    Some((alert_id, "opened"))
                }
                AlertAction::Resolve => {
                    let alert_id = current()?;
                    open.insert(key, None);
                    sqlx::query(
                        "UPDATE alert SET state = 'resolved', resolved_at = ?, \
                         in_control_run = 0 WHERE id = ?",
                    )
                    .bind(at)
                    .bind(alert_id)
                    .execute(&mut *tx)
                    .await
                    .doing("resolving an alert")?;
                    counts.resolved += 1;
                    Some((alert_id, "resolved"))
                }
            };
            if let Some((alert_id, event_kind)) = event {
                let event_id: i64 = sqlx::query_scalar(
                    "INSERT INTO alert_event (alert_id, kind, at, evaluation_id) \
                     VALUES (?, ?, ?, ?) RETURNING id",
                )
                .bind(alert_id)
                .bind(event_kind)
                .bind(at)
                .bind(eval_id)
                .fetch_one(&mut *tx)
                .await
                .doing("recording an alert event")?;
                if event_kind != "attached" {
                    let series_recipients = pass
                        .recipients
                        .get(&d.evaluation.series_id)
                        .map(Vec::as_slice)
                        .unwrap_or_default();
                    for (channel, recipient) in series_recipients {
                        sqlx::query(
                            "INSERT INTO outbox (alert_event_id, channel, recipient, state, \
                             created_at, next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?)",
                        )
                        .bind(event_id)
                        .bind(channel)
                        .bind(recipient)
                        .bind(at)
                        .bind(at)
                        .execute(&mut *tx)
                        .await
                        .doing("queueing a message")?;
                    }
                }
            }
        }
        for chunk in pass.states.chunks(ROWS_PER_INSERT / 5) {
            let mut q = QueryBuilder::<Sqlite>::new(
                "INSERT INTO series_state (series_id, cusum_upper, cusum_lower, online_tests, \
                 online_rejected, lifecycle) ",
            );
            q.push_values(chunk, |mut r, st| {
                r.push_bind(st.series_id)
                    .push_bind(st.cusum_upper)
                    .push_bind(st.cusum_lower)
                    .push_bind(st.online_tests as i64)
                    .push_bind(
                        st.online_rejected
                            .iter()
                            .map(u64::to_string)
                            .collect::<Vec<_>>()
                            .join(","),
                    )
                    .push_bind(serde_json::to_string(&st.lifecycle).ok());
            });
            q.push(
                " ON CONFLICT (series_id) DO UPDATE SET cusum_upper = excluded.cusum_upper, \
                 cusum_lower = excluded.cusum_lower, online_tests = excluded.online_tests, \
                 online_rejected = excluded.online_rejected, lifecycle = excluded.lifecycle",
            );
            q.build()
                .execute(&mut *tx)
                .await
                .doing("recording series state")?;
        }
        counts.outliers = insert_outliers(&mut tx, &pass.outliers, at).await?;
        tx.commit().await.doing("committing decisions")?;
        Ok(counts)
    }

    /// Every sample of a series in series order, with whether it was decided (kind mean).
    pub async fn series_samples(&self, series_id: i64) -> Result<Vec<SeriesSample>> {
        let rows = sqlx::query(
            "SELECT sm.id, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at), \
                    sm.n, sm.mean, sm.m2, sm.min_value, sm.max_value, \
                    EXISTS (SELECT 1 FROM evaluation e WHERE e.sample_id = sm.id), sm.file_id \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id WHERE sm.series_id = ? \
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
                    evaluated: r.get::<i64, _>(9) != 0,
                    file_id: r.get(10),
                })
            })
            .collect()
    }

    /// The current baseline of a series: its definition, design note, frozen time and lots.
    pub async fn baseline_of(
        &self,
        series_id: i64,
    ) -> Result<Option<(String, String, String, Vec<String>)>> {
        let Some(row) = sqlx::query(
            "SELECT id, definition, design_note, frozen_at FROM baseline \
             WHERE series_id = ? AND retired_at IS NULL",
        )
        .bind(series_id)
        .fetch_optional(&self.pool)
        .await
        .doing("reading a baseline")?
        else {
            return Ok(None);
        };
        let id: i64 = row.get(0);
        let lots: Vec<String> = sqlx::query_scalar(
            "SELECT l.code FROM baseline_lot bl JOIN sample sm ON sm.id = bl.sample_id \
             JOIN lot l ON l.id = sm.lot_id WHERE bl.baseline_id = ? \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at), l.code",
        )
        .bind(id)
        .fetch_all(&self.pool)
        .await
        .doing("reading baseline lots")?;
        Ok(Some((row.get(1), row.get(2), row.get(3), lots)))
    }

    /// Retires the current baseline of a series (decisions made against it stay as they
    /// are), records the change, restarts the CUSUM, and freezes `new` if given. Without a new
    /// baseline the next undecided lots of the series form one (first N in order).
    pub async fn change_baseline(
        &self,
        series_id: i64,
        new: Option<&NewBaseline>,
        new_definition: &str,
        by: &str,
        reason: &str,
        at: &str,
    ) -> Result<()> {
        let mut tx = self.begin().await?;
        let old: Option<String> = sqlx::query_scalar(
            "SELECT definition FROM baseline WHERE series_id = ? AND retired_at IS NULL",
        )
        .bind(series_id)
        .fetch_optional(&mut *tx)
        .await
        .doing("reading a baseline")?;
        sqlx::query(
            "UPDATE baseline SET retired_at = ? WHERE series_id = ? AND retired_at IS NULL",
        )
        .bind(at)
        .bind(series_id)
        .execute(&mut *tx)
        .await
        .doing("retiring a baseline")?;
        sqlx::query(
            "INSERT INTO baseline_change (series_id, changed_at, changed_by, reason, \
             old_definition, new_definition) VALUES (?, ?, ?, ?, ?, ?)",
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
            "INSERT INTO series_state (series_id, cusum_upper, cusum_lower) VALUES (?, 0.0, 0.0) \
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

/// Records outliers (a unit already recorded is left as it is).
async fn insert_outliers(
    tx: &mut Transaction<'static, Sqlite>,
    outliers: &[NewOutlier],
    at: &str,
) -> Result<usize> {
    for chunk in outliers.chunks(ROWS_PER_INSERT / 10) {
        let mut q = QueryBuilder::<Sqlite>::new(
            "INSERT INTO outlier (sample_id, seq, value, lot_median, distance, fence, rule, \
             set_aside, found_at) ",
        );
        q.push_values(chunk, |mut r, o| {
            r.push_bind(o.sample_id)
                .push_bind(o.seq)
                .push_bind(o.value)
                .push_bind(o.lot_median)
                .push_bind(o.distance)
                .push_bind(o.fence)
                .push_bind(o.rule)
                .push_bind(o.set_aside as i64)
                .push_bind(at);
        });
        q.push(" ON CONFLICT (sample_id, seq) DO NOTHING");
        q.build()
            .execute(&mut **tx)
            .await
            .doing("recording outliers")?;
    }
    Ok(outliers.len())
}

/// Inserts a frozen baseline and its lots; returns its id.
async fn insert_baseline(
    tx: &mut Transaction<'static, Sqlite>,
    b: &NewBaseline,
    at: &str,
) -> Result<i64> {
    let s = &b.summary;
    let d = &b.design;
    let id: i64 = sqlx::query_scalar(
        "INSERT INTO baseline (series_id, frozen_at, definition, lot_count, n, mean, m2, \
                 min_value, max_value, last_order_key, mean_of_means, msb, msw, df_between, \
                 df_within, n0, n_harmonic, var_between, var_within, between_p, normality_p, \
                 level_mean, level_spread, cusum_k, cusum_h, design_note, outlier_scale, \
                 outlier_fence, heavy_tailed, spread_mean, spread_sd, spread_lots, spread_n, \
                 log_scale, spread_kurtosis) \
                 VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, \
                 ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING id",
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
    .bind(d.normality_p)
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
    .bind(d.spread_base.and_then(|b| b.kurtosis))
    .fetch_one(&mut **tx)
    .await
    .doing("freezing a baseline")?;
    for chunk in b.sample_ids.chunks(ROWS_PER_INSERT) {
        let mut q =
            QueryBuilder::<Sqlite>::new("INSERT INTO baseline_lot (baseline_id, sample_id) ");
        q.push_values(chunk, |mut r, sid| {
            r.push_bind(id).push_bind(*sid);
        });
        q.build()
            .execute(&mut **tx)
            .await
            .doing("recording baseline lots")?;
    }
    Ok(id)
}
