//! Files and ingest on PostgreSQL: content hashes, names, lots, samples and their unit values.

use super::*;

impl Db {
    pub async fn file_known(&self, _hash: &str) -> Result<Option<String>> {
        not_yet("storing files on PostgreSQL is not built yet")
    }

    pub async fn ingest_batch(
        &self,
        _files: &[NewFile],
        _received_at: &str,
        _replace: Option<&Replacement<'_>>,
    ) -> Result<Vec<FileOutcome>> {
        not_yet("storing files on PostgreSQL is not built yet")
    }

    pub async fn record_quarantine(
        &self,
        _hash: &str,
        _file_name: &str,
        _at: &str,
        _reason: &str,
    ) -> Result<()> {
        not_yet("recording quarantined files on PostgreSQL is not built yet")
    }
}
