//! The outbox on SQLite: alert, digest, silence and health messages.

use super::*;

impl Db {
    /// Outbox messages due at `now`, oldest first.
    pub async fn due_outbox(&self, now: &str, limit: i64) -> Result<Vec<OutboxItem>> {
        let rows = sqlx::query(&format!(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, \
             CASE WHEN ev.kind = 'opened' AND EXISTS (SELECT 1 FROM alert_event pe \
                  WHERE pe.alert_id = ev.alert_id AND pe.kind = 'resolved' AND pe.id < ev.id) \
                  THEN 'reopened' ELSE ev.kind END, ev.at, \
             (SELECT ol.code FROM evaluation oe JOIN sample os ON os.id = oe.sample_id \
              JOIN lot ol ON ol.id = os.lot_id WHERE oe.id = a.opening_evaluation), \
             {ALERT_COLUMNS} FROM outbox o \
             JOIN alert_event ev ON ev.id = o.alert_event_id \
             JOIN alert a ON a.id = ev.alert_id {joins} \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?",
            joins = alert_joins("COALESCE(ev.evaluation_id, a.opening_evaluation)")
        ))
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        rows.iter()
            .map(|r| {
                Ok(OutboxItem {
                    id: r.get(0),
                    channel: r.get(1),
                    recipient: r.get(2),
                    attempts: r.get(3),
                    created_at: r.get(4),
                    event_id: r.get(5),
                    event_kind: r.get(6),
                    event_at: r.get(7),
                    opening_lot: r.get(8),
                    alert: alert_from_row(r, 9),
                })
            })
            .collect()
    }

    /// Records the outcomes of several delivery attempts in one transaction.
    pub async fn outbox_attempted_many(
        &self,
        outcomes: &[(i64, DeliveryOutcome)],
        now: &str,
    ) -> Result<()> {
        if outcomes.is_empty() {
            return Ok(());
        }
        let mut tx = self.begin().await?;
        for (id, outcome) in outcomes {
            let (state, next, error) = match outcome {
                DeliveryOutcome::Delivered => ("delivered", None, None),
                DeliveryOutcome::Retry { next_at, error } => {
                    ("pending", Some(next_at.as_str()), Some(error.as_str()))
                }
                DeliveryOutcome::Failed { error } => ("failed", None, Some(error.as_str())),
                DeliveryOutcome::Expired { error } => ("expired", None, Some(error.as_str())),
            };
            sqlx::query(
                "UPDATE outbox SET state = ?, attempts = attempts + 1, \
                 next_attempt_at = COALESCE(?, next_attempt_at), \
                 delivered_at = CASE WHEN ? = 'delivered' THEN ? ELSE delivered_at END, \
                 last_error = COALESCE(?, last_error) WHERE id = ?",
            )
            .bind(state)
            .bind(next)
            .bind(state)
            .bind(now)
            .bind(error)
            .bind(id)
            .execute(&mut *tx)
            .await
            .doing("recording a delivery attempt")?;
        }
        tx.commit().await.doing("committing delivery attempts")
    }

    /// Records the digest of `local_date` and queues its messages, in one transaction.
    /// Returns false, writing nothing, when that day's digest exists already.
    pub async fn create_digest(
        &self,
        local_date: &str,
        scheduled_at: &str,
        now: &str,
        open_alerts: i64,
        messages: &[NewDigestMessage],
    ) -> Result<bool> {
        let mut tx = self.begin().await?;
        let digest_id: Option<i64> = sqlx::query_scalar(
            "INSERT INTO digest (local_date, scheduled_at, created_at, open_alerts) \
             VALUES (?, ?, ?, ?) ON CONFLICT (local_date) DO NOTHING RETURNING id",
        )
        .bind(local_date)
        .bind(scheduled_at)
        .bind(now)
        .bind(open_alerts)
        .fetch_optional(&mut *tx)
        .await
        .doing("recording a digest")?;
        let Some(digest_id) = digest_id else {
            return Ok(false);
        };
        for m in messages {
            let outbox_id: i64 = sqlx::query_scalar(
                "INSERT INTO outbox (digest_id, channel, recipient, state, created_at, \
                 next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?) RETURNING id",
            )
            .bind(digest_id)
            .bind(&m.channel)
            .bind(&m.recipient)
            .bind(now)
            .bind(now)
            .fetch_one(&mut *tx)
            .await
            .doing("queueing a digest message")?;
            for chunk in m.alert_ids.chunks(ROWS_PER_INSERT / 2) {
                let mut q =
                    QueryBuilder::<Sqlite>::new("INSERT INTO digest_item (outbox_id, alert_id) ");
                q.push_values(chunk, |mut r, id| {
                    r.push_bind(outbox_id).push_bind(*id);
                });
                q.build()
                    .execute(&mut *tx)
                    .await
                    .doing("listing the alerts of a digest")?;
            }
        }
        tx.commit().await.doing("committing a digest")?;
        Ok(true)
    }

    /// Digest messages due at `now`, oldest first, each with the alerts it lists.
    pub async fn due_digests(&self, now: &str, limit: i64) -> Result<Vec<DigestItem>> {
        let rows = sqlx::query(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, d.id, d.local_date \
             FROM outbox o JOIN digest d ON d.id = o.digest_id \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?",
        )
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        let mut items: Vec<DigestItem> = rows
            .iter()
            .map(|r| DigestItem {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                attempts: r.get(3),
                created_at: r.get(4),
                digest_id: r.get(5),
                local_date: r.get(6),
                alerts: Vec::new(),
            })
            .collect();
        let ids: Vec<i64> = items.iter().map(|i| i.id).collect();
        let mut listed: HashMap<i64, Vec<AlertRow>> = HashMap::new();
        for chunk in ids.chunks(ROWS_PER_INSERT) {
            let prefix = format!(
                "SELECT di.outbox_id, {ALERT_COLUMNS} FROM digest_item di \
                 JOIN alert a ON a.id = di.alert_id {joins} WHERE di.outbox_id IN",
                joins = alert_joins("a.opening_evaluation")
            );
            let rows = in_list(&prefix, chunk, " ORDER BY a.opened_at, a.id")
                .build()
                .fetch_all(&self.pool)
                .await
                .doing("reading the alerts of a digest")?;
            for r in &rows {
                listed
                    .entry(r.get(0))
                    .or_default()
                    .push(alert_from_row(r, 1));
            }
        }
        for item in &mut items {
            item.alerts = listed.remove(&item.id).unwrap_or_default();
        }
        Ok(items)
    }

    /// Every source's most recent `recent` lots (by lot time, read through an index, so the
    /// cost does not grow with the history) for the silence watch, and the open silences.
    pub async fn silence_inputs(
        &self,
        recent: usize,
    ) -> Result<(Vec<SourceLots>, Vec<OpenSilence>)> {
        let rows = sqlx::query(
            "SELECT s.id, s.name, l.id, l.code, COALESCE(l.sampled_at, l.first_seen_at) t \
             FROM source s JOIN lot l ON l.id IN ( \
                 SELECT r.id FROM lot r WHERE r.source_id = s.id \
                 ORDER BY COALESCE(r.sampled_at, r.first_seen_at) DESC, r.code DESC LIMIT ?) \
             ORDER BY s.id, t, l.code",
        )
        .bind(recent as i64)
        .fetch_all(&self.pool)
        .await
        .doing("reading lot times")?;
        let mut sources: Vec<SourceLots> = Vec::new();
        for r in &rows {
            let lot = LotTime {
                id: r.get(2),
                code: r.get(3),
                at: r.get(4),
            };
            let source_id: i64 = r.get(0);
            match sources.last_mut() {
                Some(s) if s.source_id == source_id => {
                    if s.times.last() != Some(&lot.at) {
                        s.times.push(lot.at.clone());
                    }
                    s.last = lot;
                }
                _ => sources.push(SourceLots {
                    source_id,
                    source: r.get(1),
                    times: vec![lot.at.clone()],
                    last: lot,
                }),
            }
        }
        let open = sqlx::query(
            "SELECT id, source_id, last_lot_at FROM silence WHERE resolved_at IS NULL ORDER BY id",
        )
        .fetch_all(&self.pool)
        .await
        .doing("reading open silences")?
        .iter()
        .map(|r| OpenSilence {
            id: r.get(0),
            source_id: r.get(1),
            last_lot_at: r.get(2),
        })
        .collect();
        Ok((sources, open))
    }

    /// Resolves and opens silences with their events and outbox rows, in one transaction
    /// (resolutions first, so a source may go silent again at once). A silence resolved or
    /// opened meanwhile by another process is left alone. Returns (resolved, opened).
    pub async fn write_silences(
        &self,
        resolved: &[SilenceEnd],
        opened: &[NewSilence],
        at: &str,
    ) -> Result<(usize, usize)> {
        let mut tx = self.begin().await?;
        let mut counts = (0, 0);
        for end in resolved {
            let done = sqlx::query(
                "UPDATE silence SET resolved_at = ?, resolving_lot_id = ?, resolving_lot_at = ? \
                 WHERE id = ? AND resolved_at IS NULL",
            )
            .bind(at)
            .bind(end.lot.id)
            .bind(&end.lot.at)
            .bind(end.silence_id)
            .execute(&mut *tx)
            .await
            .doing("resolving a silence")?;
            if done.rows_affected() == 1 {
                silence_event(&mut tx, end.silence_id, "resolved", at, &end.recipients).await?;
                counts.0 += 1;
            }
        }
        for s in opened {
            let id: Option<i64> = sqlx::query_scalar(
                "INSERT INTO silence (source_id, opened_at, last_lot_id, last_lot_at, \
                 threshold_days, basis, intervals, median_days) VALUES (?, ?, ?, ?, ?, ?, ?, ?) \
                 ON CONFLICT (source_id) WHERE resolved_at IS NULL DO NOTHING RETURNING id",
            )
            .bind(s.source_id)
            .bind(at)
            .bind(s.last_lot.id)
            .bind(&s.last_lot.at)
            .bind(s.threshold_days)
            .bind(s.basis)
            .bind(s.intervals)
            .bind(s.median_days)
            .fetch_optional(&mut *tx)
            .await
            .doing("opening a silence")?;
            if let Some(id) = id {
                silence_event(&mut tx, id, "opened", at, &s.recipients).await?;
                counts.1 += 1;
            }
        }
        tx.commit().await.doing("committing silences")?;
        Ok(counts)
    }

    /// Messages about silences due at `now`, oldest first.
    pub async fn due_silence_messages(&self, now: &str, limit: i64) -> Result<Vec<SilenceItem>> {
        let rows = sqlx::query(&format!(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, ev.kind, ev.at, \
             {SILENCE_COLUMNS} FROM outbox o \
             JOIN silence_event ev ON ev.id = o.silence_event_id \
             JOIN silence si ON si.id = ev.silence_id {SILENCE_JOINS} \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?"
        ))
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        Ok(rows
            .iter()
            .map(|r| SilenceItem {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                attempts: r.get(3),
                created_at: r.get(4),
                event_id: r.get(5),
                event_kind: r.get(6),
                event_at: r.get(7),
                silence: silence_from_row(r, 8),
            })
            .collect())
    }

    /// Records a failure of `component`: starts a failing streak at `at` unless one runs.
    pub async fn health_failed(&self, component: &str, error: &str, at: &str) -> Result<()> {
        sqlx::query(
            "UPDATE health SET failing_since = COALESCE(failing_since, ?), \
             failures = failures + 1, last_error = ?, last_error_at = ? WHERE component = ?",
        )
        .bind(at)
        .bind(error)
        .bind(at)
        .bind(component)
        .execute(&self.pool)
        .await
        .doing("recording a failure")?;
        Ok(())
    }

    /// Ends the failing streak of `component` (if one runs) at `at`; when its "stuck" notice
    /// was queued, queues the "recovered" notice to `recipients` in the same transaction.
    /// Returns whether a notice was queued.
    pub async fn health_recovered(
        &self,
        component: &str,
        at: &str,
        recipients: &[(String, String)],
    ) -> Result<bool> {
        let mut tx = self.begin().await?;
        let row = health_of(&mut tx, component).await?;
        if row.failing_since.is_none() {
            return Ok(false);
        }
        if row.notice_sent {
            health_event(&mut tx, &row, "recovered", at, recipients).await?;
        }
        sqlx::query(
            "UPDATE health SET failing_since = NULL, failures = 0, notice_event_id = NULL, \
             recovered_at = ? WHERE component = ?",
        )
        .bind(at)
        .bind(component)
        .execute(&mut *tx)
        .await
        .doing("recording a recovery")?;
        tx.commit().await.doing("committing a recovery")?;
        Ok(row.notice_sent)
    }

    /// Queues the "stuck" notice of `component` to `recipients` when it has been failing since
    /// `failing_before` or earlier and its streak has no notice yet (once per streak).
    /// Returns whether a notice was queued.
    pub async fn health_stuck(
        &self,
        component: &str,
        failing_before: &str,
        at: &str,
        recipients: &[(String, String)],
    ) -> Result<bool> {
        let mut tx = self.begin().await?;
        let row = health_of(&mut tx, component).await?;
        let due = row
            .failing_since
            .as_deref()
            .is_some_and(|since| since <= failing_before);
        if !due || row.notice_sent {
            return Ok(false);
        }
        let event = health_event(&mut tx, &row, "stuck", at, recipients).await?;
        sqlx::query("UPDATE health SET notice_event_id = ? WHERE component = ?")
            .bind(event)
            .bind(component)
            .execute(&mut *tx)
            .await
            .doing("recording a notice")?;
        tx.commit().await.doing("committing a notice")?;
        Ok(true)
    }

    /// Operational notices due at `now`, oldest first.
    pub async fn due_health_messages(&self, now: &str, limit: i64) -> Result<Vec<HealthItem>> {
        let rows = sqlx::query(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, \
             ev.component, ev.kind, ev.at, ev.failing_since, ev.failures, ev.last_error \
             FROM outbox o JOIN health_event ev ON ev.id = o.health_event_id \
             WHERE o.state = 'pending' AND o.next_attempt_at <= ? \
             ORDER BY o.next_attempt_at, o.id LIMIT ?",
        )
        .bind(now)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        Ok(rows
            .iter()
            .map(|r| HealthItem {
                id: r.get(0),
                channel: r.get(1),
                recipient: r.get(2),
                attempts: r.get(3),
                created_at: r.get(4),
                event_id: r.get(5),
                component: r.get(6),
                kind: r.get(7),
                at: r.get(8),
                failing_since: r.get(9),
                failures: r.get(10),
                last_error: r.get(11),
            })
            .collect())
    }
}

/// Records a silence event and queues one outbox row per (channel, recipient).
async fn silence_event(
    tx: &mut Transaction<'static, Sqlite>,
    silence_id: i64,
    kind: &str,
    at: &str,
    recipients: &[(String, String)],
) -> Result<()> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO silence_event (silence_id, kind, at) VALUES (?, ?, ?) RETURNING id",
    )
    .bind(silence_id)
    .bind(kind)
    .bind(at)
    .fetch_one(&mut **tx)
    .await
    .doing("recording a silence event")?;
    for (channel, recipient) in recipients {
        sqlx::query(
            "INSERT INTO outbox (silence_event_id, channel, recipient, state, created_at, \
             next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?)",
        )
        .bind(event_id)
        .bind(channel)
        .bind(recipient)
        .bind(at)
        .bind(at)
        .execute(&mut **tx)
        .await
        .doing("queueing a silence message")?;
    }
    Ok(())
}

/// The health row of `component`, read inside a write transaction.
async fn health_of(tx: &mut Transaction<'static, Sqlite>, component: &str) -> Result<HealthRow> {
    let row = sqlx::query(
        "SELECT component, failing_since, failures, last_error, last_error_at, recovered_at, \
         notice_event_id IS NOT NULL FROM health WHERE component = ?",
    )
    .bind(component)
    .fetch_optional(&mut **tx)
    .await
    .doing("reading the health of a component")?;
    row.as_ref()
        .map(health_from_row)
        .ok_or_else(|| StoreError::Corrupt(format!("no health row for {component:?}")))
}

/// Records a notice about the streak of `row` and queues one outbox row per (channel,
/// recipient); returns the event's id.
async fn health_event(
    tx: &mut Transaction<'static, Sqlite>,
    row: &HealthRow,
    kind: &str,
    at: &str,
    recipients: &[(String, String)],
) -> Result<i64> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO health_event (component, kind, at, failing_since, failures, last_error) \
         VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
    )
    .bind(&row.component)
    .bind(kind)
    .bind(at)
    .bind(&row.failing_since)
    .bind(row.failures)
    .bind(row.last_error.as_deref().unwrap_or("-"))
    .fetch_one(&mut **tx)
    .await
    .doing("recording a notice")?;
    for (channel, recipient) in recipients {
        sqlx::query(
            "INSERT INTO outbox (health_event_id, channel, recipient, state, created_at, \
             next_attempt_at) VALUES (?, ?, ?, 'pending', ?, ?)",
        )
        .bind(event_id)
        .bind(channel)
        .bind(recipient)
        .bind(at)
        .bind(at)
        .execute(&mut **tx)
        .await
        .doing("queueing a notice")?;
    }
    Ok(event_id)
}
