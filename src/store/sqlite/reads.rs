//! What the read commands and pages ask of a SQLite history.

use super::*;

impl Db {
    /// Alerts, newest first.
    pub async fn alerts(&self, open_only: bool) -> Result<Vec<AlertRow>> {
        let filter = if open_only {
            "WHERE a.state = 'open'"
        } else {
            ""
        };
        let rows = sqlx::query(&format!(
            "SELECT {ALERT_COLUMNS} FROM alert a {joins} {filter} ORDER BY a.id DESC",
            joins = alert_joins("a.opening_evaluation")
        ))
        .fetch_all(&self.pool)
        .await
        .doing("listing alerts")?;
        let mut alerts: Vec<AlertRow> = rows.iter().map(|r| alert_from_row(r, 0)).collect();
        let ids: Vec<i64> = alerts.iter().map(|a| a.id).collect();
        let mut events: HashMap<i64, Vec<EventRow>> = HashMap::new();
        let mut acks: HashMap<i64, Vec<AckRow>> = HashMap::new();
        for chunk in ids.chunks(ROWS_PER_INSERT) {
            let rows = in_list(
                "SELECT ev.alert_id, ev.kind, ev.at, l.code FROM alert_event ev \
                 LEFT JOIN evaluation e ON e.id = ev.evaluation_id \
                 LEFT JOIN sample sm ON sm.id = e.sample_id LEFT JOIN lot l ON l.id = sm.lot_id \
                 WHERE ev.alert_id IN",
                chunk,
                " ORDER BY ev.id",
            )
            .build()
            .fetch_all(&self.pool)
            .await
            .doing("listing alert events")?;
            for r in &rows {
                events.entry(r.get(0)).or_default().push(EventRow {
                    kind: r.get(1),
                    at: r.get(2),
                    lot: r.get(3),
                });
            }
            let rows = in_list(
                "SELECT alert_id, acked_by, acked_at, note FROM alert_ack WHERE alert_id IN",
                chunk,
                " ORDER BY id",
            )
            .build()
            .fetch_all(&self.pool)
            .await
            .doing("listing acknowledgements")?;
            for r in &rows {
                acks.entry(r.get(0)).or_default().push(AckRow {
                    by: r.get(1),
                    at: r.get(2),
                    note: r.get(3),
                });
            }
        }
        for a in &mut alerts {
            a.events = events.remove(&a.id).unwrap_or_default();
            a.acknowledgements = acks.remove(&a.id).unwrap_or_default();
        }
        Ok(alerts)
    }

    pub async fn status(&self) -> Result<StatusCounts> {
        let r = sqlx::query(
            "SELECT (SELECT COUNT(*) FROM source), (SELECT COUNT(*) FROM series), \
             t.files, t.lots, t.measurements, (SELECT COUNT(*) FROM quarantined_file), \
             t.evaluations, \
             (SELECT COUNT(*) FROM alert WHERE state = 'open'), (SELECT COUNT(*) FROM alert), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'pending'), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'failed'), \
             (SELECT COUNT(*) FROM outbox WHERE state = 'expired'), \
             (SELECT MAX(local_date) FROM digest), t.outliers, \
             (SELECT received_at FROM ingested_file ORDER BY id DESC LIMIT 1), \
             (SELECT MAX(delivered_at) FROM outbox WHERE state = 'delivered'), \
             (SELECT MAX(delivered_at) FROM outbox WHERE state = 'delivered' \
              AND channel = 'email') FROM tally t WHERE t.id = 1",
        )
        .fetch_one(&self.pool)
        .await
        .doing("counting")?;
        Ok(StatusCounts {
            sources: r.get(0),
            series: r.get(1),
            files: r.get(2),
            lots: r.get(3),
            measurements: r.get(4),
            quarantined: r.get(5),
            evaluations: r.get(6),
            open_alerts: r.get(7),
            alerts: r.get(8),
            outbox_pending: r.get(9),
            outbox_failed: r.get(10),
            outbox_expired: r.get(11),
            last_digest: r.get(12),
            outliers: r.get(13),
            last_stored_at: r.get(14),
            last_delivered_at: r.get(15),
            last_email_delivered_at: r.get(16),
        })
    }

    /// Records an acknowledgement; false when no alert has that id.
    pub async fn acknowledge(&self, alert_id: i64, by: &str, at: &str, note: &str) -> Result<bool> {
        let mut tx = self.begin().await?;
        let exists: Option<i64> = sqlx::query_scalar("SELECT id FROM alert WHERE id = ?")
            .bind(alert_id)
            .fetch_optional(&mut *tx)
            .await
            .doing("looking up an alert")?;
        if exists.is_none() {
            return Ok(false);
        }
        sqlx::query(
            "INSERT INTO alert_ack (alert_id, acked_at, acked_by, note) VALUES (?, ?, ?, ?)",
        )
        .bind(alert_id)
        .bind(at)
        .bind(by)
        .bind(note)
        .execute(&mut *tx)
        .await
        .doing("recording an acknowledgement")?;
        tx.commit().await.doing("committing an acknowledgement")?;
        Ok(true)
    }

    /// Hands every lot of a source (optionally one characteristic) to `each` in series order,
    /// one at a time and without copying (see [`history`]): a 100,000-lot series is written
    /// out as it is read. The first error of `each` stops the read and is returned in `Ok`.
    pub async fn history_each<E>(
        &self,
        source: &str,
        characteristic: Option<&str>,
        mut each: impl FnMut(&HistoryLot<'_>) -> std::result::Result<(), E>,
    ) -> Result<std::result::Result<(), E>> {
        let mut conn = self.pool.acquire().await.doing("reading history")?;
        let mut handle = conn.lock_handle().await.doing("reading history")?;
        history::each_lot(handle.as_raw_handle(), source, characteristic, &mut each)
    }

    /// The last `limit` lots of the series `source` × `characteristic`, oldest first, in
    /// series order (sampling time, else arrival, then lot code).
    pub async fn recent_lot_means(
        &self,
        source: &str,
        characteristic: &str,
        limit: i64,
    ) -> Result<Vec<LotMeanRow>> {
        let rows = sqlx::query(
            "SELECT l.code, l.sampled_at, sm.n, sm.mean, \
                    EXISTS (SELECT 1 FROM baseline_lot bl WHERE bl.sample_id = sm.id), \
                    COALESCE((SELECT e.significant FROM evaluation e WHERE e.sample_id = sm.id), 0) \
             FROM sample sm JOIN lot l ON l.id = sm.lot_id \
             JOIN series se ON se.id = sm.series_id \
             JOIN source src ON src.id = se.source_id \
             JOIN characteristic ch ON ch.id = se.characteristic_id \
             WHERE src.name = ? AND ch.name = ? \
             ORDER BY COALESCE(l.sampled_at, l.first_seen_at) DESC, l.code DESC LIMIT ?",
        )
        .bind(source)
        .bind(characteristic)
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .doing("reading recent lot means")?;
        let mut out: Vec<LotMeanRow> = rows
            .iter()
            .map(|r| LotMeanRow {
                lot: r.get(0),
                sampled_at: r.get(1),
                n: r.get(2),
                mean: r.get(3),
                baseline: r.get::<i64, _>(4) != 0,
                significant: r.get::<i64, _>(5) != 0,
            })
            .collect();
        out.reverse();
        Ok(out)
    }
}
