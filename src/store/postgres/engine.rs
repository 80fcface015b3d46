//! Series, baselines and decisions on PostgreSQL.

use super::*;

impl Db {
    pub async fn pending_work(&self) -> Result<Vec<SeriesWork>> {
        not_yet("deciding lots on PostgreSQL is not built yet")
    }

    pub async fn unit_values(&self, _sample_ids: &[i64]) -> Result<HashMap<i64, Vec<(i64, f64)>>> {
        not_yet("reading unit values on PostgreSQL is not built yet")
    }

    pub async fn baseline_samples(&self, _baseline_id: i64) -> Result<Vec<i64>> {
        not_yet("reading baselines on PostgreSQL is not built yet")
    }

    pub async fn residuals(&self, _sample_ids: &[i64]) -> Result<Vec<f64>> {
        not_yet("reading residuals on PostgreSQL is not built yet")
    }

    pub async fn write_pass(&self, _pass: &EnginePass, _at: &str) -> Result<PassCounts> {
        not_yet("deciding lots on PostgreSQL is not built yet")
    }

    pub async fn series_samples(&self, _series_id: i64) -> Result<Vec<SeriesSample>> {
        not_yet("reading a series on PostgreSQL is not built yet")
    }

    pub async fn baseline_of(
        &self,
        _series_id: i64,
    ) -> Result<Option<(String, String, String, Vec<String>)>> {
        not_yet("reading baselines on PostgreSQL is not built yet")
    }

    pub async fn baseline_changes(
        &self,
        _series_id: i64,
    ) -> Result<Vec<(String, String, String, Option<String>, String)>> {
        not_yet("reading baselines on PostgreSQL is not built yet")
    }

    pub async fn change_baseline(
        &self,
        _series_id: i64,
        _new: Option<&NewBaseline>,
        _new_definition: &str,
        _by: &str,
        _reason: &str,
        _at: &str,
    ) -> Result<()> {
        not_yet("changing baselines on PostgreSQL is not built yet")
    }

    pub async fn series_designs(&self) -> Result<Vec<(String, String, Design)>> {
        not_yet("reading baselines on PostgreSQL is not built yet")
    }
}
