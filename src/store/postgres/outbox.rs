//! The outbox on PostgreSQL: alert, digest, silence and health messages, claimed by one
//! daemon at a time.

use super::*;

impl Db {
    pub async fn due_outbox(&self, _now: &str, _limit: i64) -> Result<Vec<OutboxItem>> {
        not_yet("sending messages from PostgreSQL is not built yet")
    }

    pub async fn outbox_attempted_many(
        &self,
        _outcomes: &[(i64, DeliveryOutcome)],
        _now: &str,
    ) -> Result<()> {
        not_yet("sending messages from PostgreSQL is not built yet")
    }

    pub async fn latest_digest_date(&self) -> Result<Option<String>> {
        not_yet("digests on PostgreSQL are not built yet")
    }

    pub async fn create_digest(
        &self,
        _local_date: &str,
        _scheduled_at: &str,
        _now: &str,
        _open_alerts: i64,
        _messages: &[NewDigestMessage],
    ) -> Result<bool> {
        not_yet("digests on PostgreSQL are not built yet")
    }

    pub async fn due_digests(&self, _now: &str, _limit: i64) -> Result<Vec<DigestItem>> {
        not_yet("digests on PostgreSQL are not built yet")
    }

    pub async fn silence_inputs(
        &self,
        _recent: usize,
    ) -> Result<(Vec<SourceLots>, Vec<OpenSilence>)> {
        not_yet("the silence watch on PostgreSQL is not built yet")
    }

    pub async fn write_silences(
        &self,
        _resolved: &[SilenceEnd],
        _opened: &[NewSilence],
        _at: &str,
    ) -> Result<(usize, usize)> {
        not_yet("the silence watch on PostgreSQL is not built yet")
    }

    pub async fn due_silence_messages(&self, _now: &str, _limit: i64) -> Result<Vec<SilenceItem>> {
        not_yet("the silence watch on PostgreSQL is not built yet")
    }

    pub async fn silent_sources(&self) -> Result<Vec<SilentSource>> {
        not_yet("the silence watch on PostgreSQL is not built yet")
    }

    pub async fn health(&self) -> Result<Vec<HealthRow>> {
        not_yet("health on PostgreSQL is not built yet")
    }

    pub async fn health_failed(&self, _component: &str, _error: &str, _at: &str) -> Result<()> {
        not_yet("health on PostgreSQL is not built yet")
    }

    pub async fn health_recovered(
        &self,
        _component: &str,
        _at: &str,
        _recipients: &[(String, String)],
    ) -> Result<bool> {
        not_yet("health on PostgreSQL is not built yet")
    }

    pub async fn health_stuck(
        &self,
        _component: &str,
        _failing_before: &str,
        _at: &str,
        _recipients: &[(String, String)],
    ) -> Result<bool> {
        not_yet("health on PostgreSQL is not built yet")
    }

    pub async fn due_health_messages(&self, _now: &str, _limit: i64) -> Result<Vec<HealthItem>> {
        not_yet("health on PostgreSQL is not built yet")
    }
}
