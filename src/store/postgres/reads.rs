//! What the read commands and pages ask of a PostgreSQL history.

use super::*;

impl Db {
    pub async fn alerts(&self, _open_only: bool) -> Result<Vec<AlertRow>> {
        not_yet("`alerts` on PostgreSQL is not built yet")
    }

    pub async fn status(&self) -> Result<StatusCounts> {
        not_yet("`status` on PostgreSQL is not built yet")
    }

    pub async fn acknowledge(
        &self,
        _alert_id: i64,
        _by: &str,
        _at: &str,
        _note: &str,
    ) -> Result<bool> {
        not_yet("acknowledging on PostgreSQL is not built yet")
    }

    pub async fn series_named(&self, _source: &str, _characteristic: &str) -> Result<Option<i64>> {
        not_yet("reading a series on PostgreSQL is not built yet")
    }

    pub async fn undelivered(&self) -> Result<Vec<UndeliveredRow>> {
        not_yet("reading the outbox on PostgreSQL is not built yet")
    }

    pub async fn lots_per_source(&self) -> Result<Vec<(String, i64)>> {
        not_yet("counting lots on PostgreSQL is not built yet")
    }

    pub async fn quarantined(&self) -> Result<Vec<(String, String)>> {
        not_yet("listing quarantined files on PostgreSQL is not built yet")
    }

    pub async fn history_each<E>(
        &self,
        _source: &str,
        _characteristic: Option<&str>,
        _each: impl FnMut(&HistoryLot<'_>) -> std::result::Result<(), E>,
    ) -> Result<std::result::Result<(), E>> {
        not_yet("`history` on PostgreSQL is not built yet")
    }

    pub async fn source_exists(&self, _name: &str) -> Result<bool> {
        not_yet("reading sources on PostgreSQL is not built yet")
    }

    pub async fn recent_lot_means(
        &self,
        _source: &str,
        _characteristic: &str,
        _limit: i64,
    ) -> Result<Vec<LotMeanRow>> {
        not_yet("reading lot means on PostgreSQL is not built yet")
    }

    pub async fn series_list(&self, _source: Option<&str>) -> Result<Vec<SeriesRow>> {
        not_yet("reading series on PostgreSQL is not built yet")
    }

    pub async fn series_design(&self, _series_id: i64) -> Result<Option<Design>> {
        not_yet("reading series on PostgreSQL is not built yet")
    }

    pub async fn chart_lots(
        &self,
        _series_id: i64,
        _from: Option<&str>,
        _to: Option<&str>,
        _limit: i64,
    ) -> Result<Vec<ChartLot>> {
        not_yet("charts on PostgreSQL are not built yet")
    }

    pub async fn set_units(&self, _units: &BTreeMap<String, String>) -> Result<()> {
        not_yet("units of measure on PostgreSQL are not built yet")
    }

    pub async fn lot_decisions(
        &self,
        _source: &str,
        _characteristic: Option<&str>,
    ) -> Result<Vec<LotDecision>> {
        not_yet("reading decisions on PostgreSQL is not built yet")
    }
}
