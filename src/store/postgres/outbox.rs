//! The outbox on PostgreSQL: alert, digest, silence and health messages, claimed by one
//! daemon at a time.
//!
//! Several daemons drain one outbox. Each `due_*` read claims the rows it returns: in one
//! transaction it locks the due, unclaimed pending rows of its kind (`FOR UPDATE SKIP LOCKED`,
//! so two daemons reading at once take different rows and neither waits), marks them
//! `claimed_by` this site until `now` + [`CLAIM_LEASE`], and commits; only then are the
//! messages read. Recording an outcome ([`Db::outbox_attempted_many`]) clears the claim. A
//! daemon that dies while sending leaves its claims to run out; another daemon then sends
//! those messages again, under the same Message-ID (derived from the stored event, see
//! `alert.rs`), so a receiver can tell the resend from a new message.
//!
//! The digest is made once per local date by the digest table's unique date, a silence is
//! opened once by the partial unique index on open silences; the health rows are shared by
//! all daemons (see [`Db::health`]).

use chrono::TimeDelta;
use sqlx::postgres::PgRow;
use sqlx::{Postgres, Transaction};

use super::*;

/// How long a claimed message stays with the daemon that claimed it ([`super::CLAIM_LEASE`]).
const CLAIM_LEASE: TimeDelta = TimeDelta::seconds(super::CLAIM_LEASE.as_secs() as i64);

/// Due pending rows whose claim (if any) has run out: the filter of every claim (`$1` is
/// now).
const DUE_UNCLAIMED: &str = "state = 'pending' AND next_attempt_at <= $1 \
     AND (claimed_until IS NULL OR claimed_until < $1)";

impl Db {
    pub async fn release_claims(&self) -> Result<u64> {
        let done = sqlx::query(
            "UPDATE outbox SET claimed_by = NULL, claimed_until = NULL \
             WHERE claimed_by = $1 AND state = 'pending'",
        )
        .bind(&self.site)
        .execute(&self.pool)
        .await
        .doing("releasing this site's claims")?;
        Ok(done.rows_affected())
    }

    /// Alert event messages due at `now`, oldest first, claimed for this daemon.
    pub async fn due_outbox(&self, now: &str, limit: i64) -> Result<Vec<OutboxItem>> {
        let ids = self.claim("alert_event_id", now, limit).await?;
        if ids.is_empty() {
            return Ok(Vec::new());
        }
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
             WHERE o.id = ANY($1) ORDER BY o.next_attempt_at, o.id",
            joins = alert_joins("COALESCE(ev.evaluation_id, a.opening_evaluation)")
        ))
        .bind(&ids)
        .fetch_all(&self.pool)
        .await
        .doing("reading the outbox")?;
        Ok(rows.iter().map(outbox_item).collect())
    }

    /// Records the outcomes of several delivery attempts in one transaction, and gives up
    /// their claims.
    pub async fn outbox_attempted_many(
        &self,
        outcomes: &[(i64, DeliveryOutcome)],
        now: &str,
    ) -> Result<()> {
        if outcomes.is_empty() {
            return Ok(());
        }
        let mut tx = self.pool.begin().await.doing("beginning a transaction")?;
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
                "UPDATE outbox SET state = $1, attempts = attempts + 1, \
                 next_attempt_at = COALESCE($2, next_attempt_at), \
                 delivered_at = CASE WHEN $1 = 'delivered' THEN $3 ELSE delivered_at END, \
                 last_error = COALESCE($4, last_error), claimed_by = NULL, claimed_until = NULL \
                 WHERE id = $5",
            )
            .bind(state)
            .bind(next)
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
    /// Returns false, writing nothing, when that day's digest exists already (made by this
    /// daemon or another: a second insert of the date waits for the first to commit and then
    /// does nothing).
    pub async fn create_digest(
        &self,
        local_date: &str,
        scheduled_at: &str,
        now: &str,
        open_alerts: i64,
        messages: &[NewDigestMessage],
    ) -> Result<bool> {
        let mut tx = self.pool.begin().await.doing("beginning a transaction")?;
        let digest_id: Option<i64> = sqlx::query_scalar(
            "INSERT INTO digest (local_date, scheduled_at, created_at, open_alerts) \
             VALUES ($1, $2, $3, $4) ON CONFLICT (local_date) DO NOTHING RETURNING id",
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
                 next_attempt_at) VALUES ($1, $2, $3, 'pending', $4, $4) RETURNING id",
            )
            .bind(digest_id)
            .bind(&m.channel)
            .bind(&m.recipient)
            .bind(now)
            .fetch_one(&mut *tx)
            .await
            .doing("queueing a digest message")?;
            sqlx::query(
                "INSERT INTO digest_item (outbox_id, alert_id) SELECT $1, unnest($2::BIGINT[])",
            )
            .bind(outbox_id)
            .bind(&m.alert_ids)
            .execute(&mut *tx)
            .await
            .doing("listing the alerts of a digest")?;
        }
        tx.commit().await.doing("committing a digest")?;
        Ok(true)
    }

    /// Digest messages due at `now`, oldest first, each with the alerts it lists, claimed for
    /// this daemon.
    pub async fn due_digests(&self, now: &str, limit: i64) -> Result<Vec<DigestItem>> {
        let ids = self.claim("digest_id", now, limit).await?;
        if ids.is_empty() {
            return Ok(Vec::new());
        }
        let rows = sqlx::query(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, d.id, d.local_date \
             FROM outbox o JOIN digest d ON d.id = o.digest_id \
             WHERE o.id = ANY($1) ORDER BY o.next_attempt_at, o.id",
        )
        .bind(&ids)
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
        let rows = sqlx::query(&format!(
            "SELECT di.outbox_id, {ALERT_COLUMNS} FROM digest_item di \
             JOIN alert a ON a.id = di.alert_id {joins} WHERE di.outbox_id = ANY($1) \
             ORDER BY a.opened_at, a.id",
            joins = alert_joins("a.opening_evaluation")
        ))
        .bind(&ids)
        .fetch_all(&self.pool)
        .await
        .doing("reading the alerts of a digest")?;
        let mut listed: HashMap<i64, Vec<AlertRow>> = HashMap::new();
        for r in &rows {
            listed
                .entry(r.get(0))
                .or_default()
                .push(alert_from_row(r, 1));
        }
        for item in &mut items {
            item.alerts = listed.remove(&item.id).unwrap_or_default();
        }
        Ok(items)
    }

    /// Every source's most recent `recent` lots (by lot time, read through the `lot_source_time`
    /// index) for the silence watch, and the open silences.
    pub async fn silence_inputs(
        &self,
        recent: usize,
    ) -> Result<(Vec<SourceLots>, Vec<OpenSilence>)> {
        // The final order is SQLite's byte order (COLLATE "C") whatever the database's
        // collation, so the last lot of a source is the same lot on both backends.
        let rows = sqlx::query(
            "SELECT s.id, s.name, l.id, l.code, l.t FROM source s CROSS JOIN LATERAL ( \
                 SELECT r.id, r.code, COALESCE(r.sampled_at, r.first_seen_at) t FROM lot r \
                 WHERE r.source_id = s.id \
                 ORDER BY COALESCE(r.sampled_at, r.first_seen_at) DESC, r.code DESC LIMIT $1) l \
             ORDER BY s.id, l.t COLLATE \"C\", l.code COLLATE \"C\"",
        )
        .bind(recent as i64)
        .fetch_all(&self.pool)
        .await
        .doing("reading lot times")?;
        let sources = source_lots(&rows);
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
    /// opened meanwhile by another daemon is left alone: the resolving update waits for the
    /// other's row lock and then finds the silence resolved; a second open silence of a source
    /// is refused by the partial unique index. Returns (resolved, opened).
    pub async fn write_silences(
        &self,
        resolved: &[SilenceEnd],
        opened: &[NewSilence],
        at: &str,
    ) -> Result<(usize, usize)> {
        let mut tx = self.pool.begin().await.doing("beginning a transaction")?;
        let mut counts = (0, 0);
        for end in resolved {
            let done = sqlx::query(
                "UPDATE silence SET resolved_at = $1, resolving_lot_id = $2, \
                 resolving_lot_at = $3 WHERE id = $4 AND resolved_at IS NULL",
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
                 threshold_days, basis, intervals, median_days) \
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8) \
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

    /// Messages about silences due at `now`, oldest first, claimed for this daemon.
    pub async fn due_silence_messages(&self, now: &str, limit: i64) -> Result<Vec<SilenceItem>> {
        let ids = self.claim("silence_event_id", now, limit).await?;
        if ids.is_empty() {
            return Ok(Vec::new());
        }
        let rows = sqlx::query(&format!(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, ev.kind, ev.at, \
             {SILENCE_COLUMNS} FROM outbox o \
             JOIN silence_event ev ON ev.id = o.silence_event_id \
             JOIN silence si ON si.id = ev.silence_id {SILENCE_JOINS} \
             WHERE o.id = ANY($1) ORDER BY o.next_attempt_at, o.id"
        ))
        .bind(&ids)
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
            "UPDATE health SET failing_since = COALESCE(failing_since, $1), \
             failures = failures + 1, last_error = $2, last_error_at = $1 WHERE component = $3",
        )
        .bind(at)
        .bind(error)
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
        let mut tx = self.pool.begin().await.doing("beginning a transaction")?;
        let row = health_of(&mut tx, component).await?;
        if row.failing_since.is_none() {
            return Ok(false);
        }
        if row.notice_sent {
            health_event(&mut tx, &row, "recovered", at, recipients).await?;
        }
        sqlx::query(
            "UPDATE health SET failing_since = NULL, failures = 0, notice_event_id = NULL, \
             recovered_at = $1 WHERE component = $2",
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
    /// `failing_before` or earlier and its streak has no notice yet (once per streak, however
    /// many daemons check). Returns whether a notice was queued.
    pub async fn health_stuck(
        &self,
        component: &str,
        failing_before: &str,
        at: &str,
        recipients: &[(String, String)],
    ) -> Result<bool> {
        let mut tx = self.pool.begin().await.doing("beginning a transaction")?;
        let row = health_of(&mut tx, component).await?;
        let due = row
            .failing_since
            .as_deref()
            .is_some_and(|since| since <= failing_before);
        if !due || row.notice_sent {
            return Ok(false);
        }
        let event = health_event(&mut tx, &row, "stuck", at, recipients).await?;
        sqlx::query("UPDATE health SET notice_event_id = $1 WHERE component = $2")
            .bind(event)
            .bind(component)
            .execute(&mut *tx)
            .await
            .doing("recording a notice")?;
        tx.commit().await.doing("committing a notice")?;
        Ok(true)
    }

    /// Operational notices due at `now`, oldest first, claimed for this daemon.
    pub async fn due_health_messages(&self, now: &str, limit: i64) -> Result<Vec<HealthItem>> {
        let ids = self.claim("health_event_id", now, limit).await?;
        if ids.is_empty() {
            return Ok(Vec::new());
        }
        let rows = sqlx::query(
            "SELECT o.id, o.channel, o.recipient, o.attempts, o.created_at, ev.id, \
             ev.component, ev.kind, ev.at, ev.failing_since, ev.failures, ev.last_error \
             FROM outbox o JOIN health_event ev ON ev.id = o.health_event_id \
             WHERE o.id = ANY($1) ORDER BY o.next_attempt_at, o.id",
        )
        .bind(&ids)
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

    /// Claims for this daemon, until `now` + [`CLAIM_LEASE`], at most `limit` due pending
    /// rows that announce through `refers` (an outbox column), in due order; returns their
    /// ids. Rows another daemon has locked or claimed (and not let run out) are skipped.
    async fn claim(&self, refers: &'static str, now: &str, limit: i64) -> Result<Vec<i64>> {
        let until = lease_end(now)?;
        let mut tx = self.pool.begin().await.doing("beginning a claim")?;
        let ids: Vec<i64> = sqlx::query_scalar(&format!(
            "SELECT id FROM outbox WHERE {refers} IS NOT NULL AND {DUE_UNCLAIMED} \
             ORDER BY next_attempt_at, id LIMIT $2 FOR UPDATE SKIP LOCKED"
        ))
        .bind(now)
        .bind(limit)
        .fetch_all(&mut *tx)
        .await
        .doing("claiming due messages")?;
        if ids.is_empty() {
            return Ok(ids);
        }
        sqlx::query("UPDATE outbox SET claimed_by = $1, claimed_until = $2 WHERE id = ANY($3)")
            .bind(&self.site)
            .bind(&until)
            .bind(&ids)
            .execute(&mut *tx)
            .await
            .doing("claiming due messages")?;
        tx.commit().await.doing("committing a claim")?;
        Ok(ids)
    }
}

/// The end of a claim made at `now` (RFC 3339 UTC text, as [`crate::time`] writes it), in the
/// same fixed-width form, so text order is time order.
fn lease_end(now: &str) -> Result<String> {
    let at = crate::time::parse_utc(now).ok_or_else(|| {
        StoreError::Corrupt(format!("an outbox claim at {now:?}: not RFC 3339 UTC text"))
    })?;
    Ok(crate::time::format_utc(at + CLAIM_LEASE))
}

/// An alert event message from a row of [`Db::due_outbox`].
fn outbox_item(r: &PgRow) -> OutboxItem {
    OutboxItem {
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
    }
}

/// Groups (source id, source name, lot id, lot code, lot time) rows, in source and time
/// order, into each source's distinct lot times and last lot.
fn source_lots(rows: &[PgRow]) -> Vec<SourceLots> {
    let mut sources: Vec<SourceLots> = Vec::new();
    for r in rows {
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
    sources
}

/// Records a silence event and queues one outbox row per (channel, recipient).
async fn silence_event(
    tx: &mut Transaction<'static, Postgres>,
    silence_id: i64,
    kind: &str,
    at: &str,
    recipients: &[(String, String)],
) -> Result<()> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO silence_event (silence_id, kind, at) VALUES ($1, $2, $3) RETURNING id",
    )
    .bind(silence_id)
    .bind(kind)
    .bind(at)
    .fetch_one(&mut **tx)
    .await
    .doing("recording a silence event")?;
    queue(tx, "silence_event_id", event_id, at, recipients)
        .await
        .doing("queueing a silence message")
}

/// The health row of `component`, locked until the transaction ends (so two daemons do not
/// both queue the notice of one streak).
async fn health_of(tx: &mut Transaction<'static, Postgres>, component: &str) -> Result<HealthRow> {
    let row = sqlx::query(
        "SELECT component, failing_since, failures, last_error, last_error_at, recovered_at, \
         notice_event_id IS NOT NULL FROM health WHERE component = $1 FOR UPDATE",
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
    tx: &mut Transaction<'static, Postgres>,
    row: &HealthRow,
    kind: &str,
    at: &str,
    recipients: &[(String, String)],
) -> Result<i64> {
    let event_id: i64 = sqlx::query_scalar(
        "INSERT INTO health_event (component, kind, at, failing_since, failures, last_error) \
         VALUES ($1, $2, $3, $4, $5, $6) RETURNING id",
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
    queue(tx, "health_event_id", event_id, at, recipients)
        .await
        .doing("queueing a notice")?;
    Ok(event_id)
}

/// Queues one pending outbox row per (channel, recipient) announcing `event_id` through the
/// outbox column `refers`, due at `at`.
async fn queue(
    tx: &mut Transaction<'static, Postgres>,
    refers: &'static str,
    event_id: i64,
    at: &str,
    recipients: &[(String, String)],
) -> std::result::Result<(), sqlx::Error> {
    for (channel, recipient) in recipients {
        sqlx::query(&format!(
            "INSERT INTO outbox ({refers}, channel, recipient, state, created_at, \
             next_attempt_at) VALUES ($1, $2, $3, 'pending', $4, $4)"
        ))
        .bind(event_id)
        .bind(channel)
        .bind(recipient)
        .bind(at)
        .execute(&mut **tx)
        .await?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_claim_lasts_the_lease_in_the_stored_form() {
        assert_eq!(
            lease_end("2026-03-01T08:30:00.000Z").unwrap(),
            "2026-03-01T08:40:00.000Z"
        );
        assert_eq!(
            lease_end("2026-03-01T23:55:30.250Z").unwrap(),
            "2026-03-02T00:05:30.250Z"
        );
        assert!(lease_end("9999").is_err());
    }
}
