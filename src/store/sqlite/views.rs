//! What the user-facing SQL views (migration 0008) need from lotdrift, and the reads that go
//! through them: the stored standard deviation of each sample, the units of measure from the
//! config, and every decision of a lot (`decision_view`) for `history`.

use std::collections::BTreeMap;

use sqlx::Row;

use super::{Db, Doing, Result, sd};

/// One decision on one lot, as `decision_view` gives it.
#[derive(Debug, Clone, serde::Serialize)]
pub struct LotDecision {
    pub characteristic: String,
    pub lot: String,
    /// "mean" or "spread".
    pub kind: String,
    /// The test that decided ("cusum" when the CUSUM alone signalled).
    pub test: String,
    pub statistic: Option<f64>,
    pub p_value: Option<f64>,
    pub p_adjusted: Option<f64>,
    /// The level the adjusted (else raw) p-value was compared with.
    pub threshold: f64,
    pub significant: bool,
    /// CUSUM sums after this lot and the decision interval (mean decisions with a CUSUM).
    pub cusum_upper: Option<f64>,
    pub cusum_lower: Option<f64>,
    pub cusum_h: Option<f64>,
    pub cusum_signal: bool,
    pub alert_id: Option<i64>,
}

impl Db {
    /// Fills `sample.sd` for samples stored before migration 0008 (none after the first open;
    /// the partial index `sample_sd_missing` makes the check free).
    pub(super) async fn fill_missing_sd(&self) -> Result<()> {
        let rows = sqlx::query("SELECT id, n, m2 FROM sample WHERE sd IS NULL AND n > 1")
            .fetch_all(&self.pool)
            .await
            .doing("finding samples without a standard deviation")?;
        if rows.is_empty() {
            return Ok(());
        }
        let mut tx = self.begin().await?;
        for r in &rows {
            sqlx::query("UPDATE sample SET sd = ? WHERE id = ?")
                .bind(sd(r.get(1), r.get(2)))
                .bind(r.get::<i64, _>(0))
                .execute(&mut *tx)
                .await
                .doing("recording a sample's standard deviation")?;
        }
        tx.commit()
            .await
            .doing("committing standard deviations of older samples")
    }

    /// Replaces the table `characteristic_unit` with the config's units of measure, so that
    /// users' own SQL (the views) shows them.
    pub async fn set_units(&self, units: &BTreeMap<String, String>) -> Result<()> {
        let mut tx = self.begin().await?;
        sqlx::query("DELETE FROM characteristic_unit")
            .execute(&mut *tx)
            .await
            .doing("clearing units of measure")?;
        for (characteristic, unit) in units {
            sqlx::query("INSERT INTO characteristic_unit (characteristic, unit) VALUES (?, ?)")
                .bind(characteristic)
                .bind(unit)
                .execute(&mut *tx)
                .await
                .doing("recording a unit of measure")?;
        }
        tx.commit().await.doing("committing units of measure")
    }

    /// Every decision on the lots of a source (one characteristic, or all), by characteristic,
    /// lot order and kind (mean first).
    pub async fn lot_decisions(
        &self,
        source: &str,
        characteristic: Option<&str>,
    ) -> Result<Vec<LotDecision>> {
        let rows = sqlx::query(
            "SELECT characteristic, lot, kind, test, statistic, p_value, p_adjusted, threshold, \
                    significant, cusum_upper, cusum_lower, cusum_h, cusum_signal, alert_id \
             FROM decision_view WHERE source = ?1 AND (?2 IS NULL OR characteristic = ?2) \
             ORDER BY characteristic, sampled_at, lot, kind",
        )
        .bind(source)
        .bind(characteristic)
        .fetch_all(&self.pool)
        .await
        .doing("reading decisions")?;
        Ok(rows
            .iter()
            .map(|r| LotDecision {
                characteristic: r.get(0),
                lot: r.get(1),
                kind: r.get(2),
                test: r.get(3),
                statistic: r.get(4),
                p_value: r.get(5),
                p_adjusted: r.get(6),
                threshold: r.get(7),
                significant: r.get::<i64, _>(8) != 0,
                cusum_upper: r.get(9),
                cusum_lower: r.get(10),
                cusum_h: r.get(11),
                cusum_signal: r.get::<i64, _>(12) != 0,
                alert_id: r.get(13),
            })
            .collect())
    }
}
