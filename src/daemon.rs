//! The daemon: wires the stages together and owns their lifetimes.
//!
//! Tasks: the watcher (`watch`) sends batches of complete files; the ingest worker stores them
//! (`ingest`), records the outcome for the health watch (`health`) and then runs an engine
//! pass (`engine`); the notifier (`alert`) queues the daily digest, silence notices
//! (`silence`) and notices of a stuck ingest or delivery (`health`) and drains the outbox,
//! whenever it is woken and on a timer; the dashboard (`web`, when `[web] listen` is set)
//! serves pages read through the store. All share one cancellation token; SIGTERM or SIGINT cancels it, the file batch in
//! flight completes, and the process exits 0. `run_once` is the
//! same pipeline run a single time over what is in the inbox.

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{Notify, mpsc};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::alert::{self, DrainReport};
use crate::config::Config;
use crate::engine;
use crate::health::{self, Component, Unrecorded};
use crate::ingest::{self, IngestReport};
use crate::silence::{self, CheckReport};
use crate::store::{PassCounts, Store};
use crate::watch;

/// How much longer than the settle interval `run --once` waits for files still being written.
const ONCE_SETTLE_MARGIN: Duration = Duration::from_secs(1);

/// Drain time allowed after a stop signal before the process gives up waiting.
const DRAIN_LIMIT: Duration = Duration::from_secs(20);

#[derive(Debug, thiserror::Error)]
pub enum DaemonError {
    #[error(transparent)]
    Store(#[from] crate::store::StoreError),
    #[error(transparent)]
    Ingest(#[from] ingest::IngestError),
    #[error(transparent)]
    Engine(#[from] engine::EngineError),
    #[error(transparent)]
    Alert(#[from] alert::AlertError),
    #[error(transparent)]
    Watch(#[from] watch::WatchError),
    #[error(transparent)]
    Silence(#[from] silence::SilenceError),
    #[error(transparent)]
    Web(#[from] crate::web::WebError),
    #[error("cannot create folder {path}")]
    Folder {
        path: std::path::PathBuf,
        source: std::io::Error,
    },
}

/// What one `--once` run did.
#[derive(Debug, Default)]
pub struct OnceReport {
    pub ingest: IngestReport,
    pub engine: PassCounts,
    pub silence: CheckReport,
    pub delivery: DrainReport,
}

/// Creates the inbox, archive and quarantine folders if missing.
pub fn ensure_folders(config: &Config) -> Result<(), DaemonError> {
    for dir in [
        &config.paths.inbox,
        &config.paths.archive,
        &config.paths.quarantine,
    ] {
        std::fs::create_dir_all(dir).map_err(|source| DaemonError::Folder {
            path: dir.clone(),
            source,
        })?;
    }
    Ok(())
}

/// Processes what is in the inbox, evaluates, queues the daily digest if it is due, checks for
/// silent sources, drains the outbox once.
pub async fn run_once(store: &Store, config: &Config) -> Result<OnceReport, DaemonError> {
    ensure_folders(config)?;
    release_claims(store).await?;
    // Files still changing after the settle interval (and a margin) are left for the next run.
    let files = watch::settled_files(
        &config.paths.inbox,
        config.watch.settle,
        config.watch.settle + ONCE_SETTLE_MARGIN,
    )
    .await;
    tracing::info!(files = files.len(), "inbox scanned");
    let cancel = CancellationToken::new();
    let mut unrecorded = Unrecorded::default();
    let ingest = match ingest_noting_health(store, config, files, &cancel, &mut unrecorded).await {
        Ok(report) => report,
        Err(e) => {
            // A cron user's runs fail one after the other: the notice that ingest is stuck
            // (once, past health.notice_after_minutes) still goes out before the exit.
            notify_stuck(store, config).await;
            return Err(e.into());
        }
    };
    ingest::UnreadableLog::default().note(&ingest);
    let engine = engine::evaluate(store, config).await?;
    crate::digest::schedule_if_due(store, config).await?;
    let silence = silence::check(store, config, chrono::Utc::now()).await?;
    health::check(store, config, chrono::Utc::now()).await?;
    let delivery = alert::drain_once(store, config).await?;
    Ok(OnceReport {
        ingest,
        engine,
        silence,
        delivery,
    })
}

/// Ingests `files` and records the outcome for the health watch: a failure (the files stay in
/// the inbox) continues or starts the failing streak of ingest, a success ends it.
/// A failure's notice is queued here as soon as it is due; when the database can record
/// neither the failure nor the notice (a full disk), `unrecorded` follows the streak and its
/// notices go straight to the log.
async fn ingest_noting_health(
    store: &Store,
    config: &Config,
    files: Vec<std::path::PathBuf>,
    cancel: &CancellationToken,
    unrecorded: &mut Unrecorded,
) -> Result<IngestReport, ingest::IngestError> {
    let result =
        ingest::ingest_files(store, &config.paths, &config.input, files, None, cancel).await;
    let (told, error) = match &result {
        Ok(_) => {
            health::succeeded(store, config, Component::Ingest).await;
            (unrecorded.succeeded(), String::new())
        }
        Err(e) => {
            let error = crate::errors::chain(e);
            let now = chrono::Utc::now();
            let recorded = health::failed(store, Component::Ingest, &error).await
                && health::notice_if_due(store, config, Component::Ingest, now).await;
            (
                unrecorded.failed(recorded, now, config.health.notice_after),
                error,
            )
        }
    };
    if let Some(told) = told {
        alert::log_unqueued(Component::Ingest, &told, &error);
    }
    result
}

/// Queues the notices of a stuck ingest or delivery that are due and drains the outbox;
/// failures are logged (the caller is returning an error of its own).
async fn notify_stuck(store: &Store, config: &Config) {
    if let Err(e) = health::check(store, config, chrono::Utc::now()).await {
        tracing::error!(error = %crate::errors::chain(&e), "cannot check the health of ingest and delivery");
    }
    if let Err(e) = alert::drain_once(store, config).await {
        tracing::error!(error = %crate::errors::chain(&e), "outbox drain failed");
    }
}

/// Frees the messages an earlier daemon of this site claimed and did not finish (it died
/// while sending), so they go out now rather than when the claims run out.
async fn release_claims(store: &Store) -> Result<(), DaemonError> {
    let released = store.release_claims().await?;
    if released > 0 {
        tracing::info!(
            messages = released,
            "messages an earlier daemon of this site claimed are due again"
        );
    }
    Ok(())
}

/// Runs until SIGTERM/SIGINT (or `cancel`).
pub async fn run(
    store: Arc<Store>,
    config: Arc<Config>,
    cancel: CancellationToken,
) -> Result<(), DaemonError> {
    ensure_folders(&config)?;
    release_claims(&store).await?;
    let tracker = TaskTracker::new();
    let (ready_tx, mut ready_rx) = mpsc::channel::<Vec<std::path::PathBuf>>(16);
    let wake = Arc::new(Notify::new());

    // Stop signals.
    {
        let cancel = cancel.clone();
        tracker.spawn(async move {
            shutdown_signal(&cancel).await;
            cancel.cancel();
        });
    }

    // Watcher.
    let watcher = {
        let cancel = cancel.clone();
        let inbox = config.paths.inbox.clone();
        let cfg = config.watch.clone();
        tracker.spawn(async move { watch::run(inbox, cfg, ready_tx, cancel).await })
    };

    // Dashboard, when configured: its address is bound before anything else starts, so a
    // taken port stops the start with an error naming web.listen.
    if let Some(web) = config.web.clone() {
        let listener = crate::web::bind(&web).await?;
        let (store, config, cancel) = (store.clone(), config.clone(), cancel.clone());
        tracker.spawn(async move {
            if let Err(e) = crate::web::serve(listener, store, config, web, cancel.clone()).await {
                tracing::error!(error = %crate::errors::chain(&e), "dashboard failed; stopping");
                cancel.cancel();
            }
        });
    }

    // Notifier.
    {
        let (store, config, wake, cancel) =
            (store.clone(), config.clone(), wake.clone(), cancel.clone());
        tracker.spawn(alert::run(store, config, wake, cancel));
    }

    // Ingest worker (this task): decisions follow every stored batch. A pass at start picks
    // up anything decided-but-unevaluated from before a crash.
    let mut result = Ok(());
    if let Err(e) = engine::evaluate(&store, &config).await {
        result = Err(e.into());
    }
    wake.notify_one();
    tracing::info!(inbox = %config.paths.inbox.display(), "watching");
    let mut unreadable = ingest::UnreadableLog::default();
    let mut unrecorded = Unrecorded::default();
    while result.is_ok() {
        let files = tokio::select! {
            _ = cancel.cancelled() => break,
            f = ready_rx.recv() => match f { Some(f) => f, None => break },
        };
        let mut files = files;
        while let Ok(more) = ready_rx.try_recv() {
            files.extend(more);
        }
        match ingest_noting_health(&store, &config, files, &cancel, &mut unrecorded).await {
            Ok(report) => {
                unreadable.note(&report);
                if report.stored() > 0 {
                    match engine::evaluate(&store, &config).await {
                        Ok(_) => wake.notify_one(),
                        Err(e) => result = Err(e.into()),
                    }
                }
            }
            Err(e) => {
                // The files stay in the inbox and are taken again at the next rescan. The
                // notifier checks at once whether the failure has lasted long enough for a
                // notice.
                tracing::error!(error = %crate::errors::chain(&e), "ingest failed; files left in the inbox");
                wake.notify_one();
            }
        }
    }
    cancel.cancel();
    tracker.close();
    if tokio::time::timeout(DRAIN_LIMIT, tracker.wait())
        .await
        .is_err()
    {
        tracing::warn!("tasks did not stop within {DRAIN_LIMIT:?}; exiting anyway");
    } else if let Ok(Err(e)) = watcher.await {
        return Err(e.into());
    }
    result
}

async fn shutdown_signal(cancel: &CancellationToken) {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{SignalKind, signal};
        let (Ok(mut term), Ok(mut int)) = (
            signal(SignalKind::terminate()),
            signal(SignalKind::interrupt()),
        ) else {
            cancel.cancelled().await;
            return;
        };
        tokio::select! {
            _ = term.recv() => tracing::info!("SIGTERM received; stopping"),
            _ = int.recv() => tracing::info!("SIGINT received; stopping"),
            _ = cancel.cancelled() => {}
        }
    }
    #[cfg(not(unix))]
    {
        tokio::select! {
            _ = tokio::signal::ctrl_c() => tracing::info!("interrupt received; stopping"),
            _ = cancel.cancelled() => {}
        }
    }
}
