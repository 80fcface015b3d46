//! The PostgreSQL backend: one history shared by the daemons of several sites.
//!
//! Coordination between daemons is PostgreSQL's own: migrations run under the migrator's
//! advisory lock, each ingest batch under a transaction-level advisory lock (so a file's
//! outcome is decided against everything committed before it, whichever daemon stored that),
//! engine passes under a session-level advisory lock held from reading the pending lots to
//! committing their decisions, and outbox rows are claimed with `FOR UPDATE SKIP LOCKED` and
//! a lease. The schema (`migrations/postgres/`) has SQLite's tables and columns; unit values
//! are arrays (`sample_values`), unpacked by `measurement_view`.

use std::str::FromStr;
use std::time::Duration;

use sqlx::ConnectOptions;
use sqlx::postgres::{PgConnectOptions, PgPool, PgPoolOptions};

use super::*;

pub(super) use engine::EngineLock;

pub(super) mod copy;
mod engine;
mod ingest;
mod outbox;
mod reads;

/// The PostgreSQL store.
pub(super) struct Db {
    pub(super) pool: PgPool,
    /// The `[site] name` recorded with each stored file and decision, and with outbox claims.
    site: String,
}

impl Db {
    /// Connects to the database at `url` (the password from `password` when given, else from
    /// the URL) and applies the PostgreSQL migrations.
    pub async fn open(url: &str, password: Option<&str>, site: &str) -> Result<Db> {
        let shown = crate::config::redacted(url);
        let open_err = |source| StoreError::Open {
            path: shown.clone(),
            source,
        };
        let mut options = PgConnectOptions::from_str(url)
            .map_err(open_err)?
            .application_name(&format!("lotdrift {site}"))
            .log_slow_statements(tracing::log::LevelFilter::Debug, Duration::from_secs(5));
        if let Some(password) = password {
            options = options.password(password);
        }
        let pool = PgPoolOptions::new()
            .max_connections(4)
            .acquire_timeout(Duration::from_secs(30))
            .connect_with(options)
            .await
            .map_err(open_err)?;
        // sqlx's PostgreSQL migrator holds an advisory lock (keyed on the database name)
        // while it applies migrations, so daemons starting together apply each one once.
        sqlx::migrate!("migrations/postgres")
            .run(&pool)
            .await
            .map_err(|source| StoreError::Migrate {
                path: shown.clone(),
                source,
            })?;
        Ok(Db {
            pool,
            site: site.to_string(),
        })
    }

    pub async fn close(self) {
        self.pool.close().await;
    }
}
