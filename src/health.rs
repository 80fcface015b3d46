//! The health watch: the daemon says when it is stuck.
//!
//! Two components can keep failing while the daemon runs on: ingest (a batch cannot be stored
//! or its files cannot be moved out of the inbox; the files stay and are taken again at every
//! scan) and delivery (an email cannot be sent; it waits in the outbox and is retried). Every
//! failure is recorded ([`failed`]) and a success ends the failing streak ([`succeeded`]);
//! the stored streak (its start, the failures counted, the latest error) is what `lotdrift
//! status` shows, and it survives restarts.
//!
//! When a streak has lasted longer than `health.notice_after_minutes`, one "stuck" notice is
//! queued ([`check`]), and when that streak ends, one "recovered" notice: never one per retry,
//! and never twice after a restart (the stored streak records its notice). Notices go through
//! the outbox like alert messages. Who is told ([`recipients`]): the log always, whatever
//! `alerts.channels` says; the default email list (`alerts.email.to`) too when the email
//! channel is configured, except for "delivery stuck" (email is what fails, so that notice
//! can only reach the log; its "recovered" notice goes by email as well and says how long
//! messages waited).
//!
//! Owns the rule and what a check decides; never formats or delivers (`alert` does) and never
//! speaks SQL (`store` does). A failure to record health is logged and never stops the
//! daemon; when the database can record neither an ingest failure nor its notice (a full
//! disk), the streak is followed in memory and told to the log directly ([`Unrecorded`]).

use std::time::Duration;

use chrono::{DateTime, Utc};

use crate::config::{Channel, Config};
use crate::store::{HealthRow, StatusCounts, Store, StoreError};
use crate::time::{format_utc, parse_utc};

/// A part of the daemon whose failures are watched.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Component {
    /// Storing files and moving them out of the inbox.
    Ingest,
    /// Sending messages (the email channel; the log channel cannot fail).
    Delivery,
}

impl Component {
    pub const ALL: [Component; 2] = [Component::Ingest, Component::Delivery];

    /// The stored name (`health.component`).
    pub fn as_str(self) -> &'static str {
        match self {
            Component::Ingest => "ingest",
            Component::Delivery => "delivery",
        }
    }
}

/// What a notice says.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Notice {
    Stuck,
    Recovered,
}

/// The (channel, recipient) pairs told about `component`: the log always; the default email
/// list when email is configured, unless the notice is that delivery is stuck.
pub fn recipients(config: &Config, component: Component, notice: Notice) -> Vec<(String, String)> {
    let mut out = vec![("log".to_string(), "log".to_string())];
    let email_works = !(component == Component::Delivery && notice == Notice::Stuck);
    if email_works
        && config.alerts.channels.contains(&Channel::Email)
        && let Some(email) = &config.alerts.email
    {
        out.extend(email.to.iter().map(|to| ("email".to_string(), to.clone())));
    }
    out
}

/// True when a streak that began at `since` has lasted longer than `after` at `now`.
pub fn is_stuck(since: DateTime<Utc>, now: DateTime<Utc>, after: Duration) -> bool {
    (now - since).to_std().is_ok_and(|d| d > after)
}

/// The state of a component for `status`: "ok", "failing", or "stuck" (failing for longer
/// than `after`).
pub fn state(row: &HealthRow, now: DateTime<Utc>, after: Duration) -> &'static str {
    match row.failing_since.as_deref().and_then(parse_utc) {
        None if row.failing_since.is_none() => "ok",
        Some(since) if !is_stuck(since, now, after) => "failing",
        _ => "stuck",
    }
}

/// One component's health as `status` shows it.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ComponentStatus {
    /// "ok", "failing", or "stuck" (failing for longer than `health.notice_after_minutes`).
    pub state: &'static str,
    #[serde(flatten)]
    pub row: HealthRow,
    /// When the latest success happened: the newest stored file (ingest), the newest
    /// delivered message of any channel (delivery).
    pub last_success_at: Option<String>,
}

/// The `health` part of `status`.
#[derive(Debug, Clone, serde::Serialize)]
pub struct HealthStatus {
    pub notice_after_minutes: f64,
    pub ingest: ComponentStatus,
    pub delivery: ComponentStatus,
    /// The newest message delivered by email (the delivery that can fail).
    pub last_email_delivered_at: Option<String>,
}

/// The health of both components as of `now`, from the stored rows and counts.
pub fn status(
    rows: &[HealthRow],
    counts: &StatusCounts,
    after: Duration,
    now: DateTime<Utc>,
) -> HealthStatus {
    let part = |c: Component, last: &Option<String>| {
        let row = rows
            .iter()
            .find(|r| r.component == c.as_str())
            .cloned()
            .unwrap_or_default();
        ComponentStatus {
            state: state(&row, now, after),
            row,
            last_success_at: last.clone(),
        }
    };
    HealthStatus {
        notice_after_minutes: after.as_secs_f64() / 60.0,
        ingest: part(Component::Ingest, &counts.last_stored_at),
        delivery: part(Component::Delivery, &counts.last_delivered_at),
        last_email_delivered_at: counts.last_email_delivered_at.clone(),
    }
}

/// Records a failure of `component` with its error text; false (and the store's error
/// logged) when the store cannot record it (see [`Unrecorded`]).
pub async fn failed(store: &Store, component: Component, error: &str) -> bool {
    let at = crate::time::now_rfc3339();
    match store.health_failed(component.as_str(), error, &at).await {
        Ok(()) => true,
        Err(e) => {
            tracing::error!(component = component.as_str(), error = %crate::errors::chain(&e), "cannot record the failure in the database");
            false
        }
    }
}

/// A notice that goes straight to the log (see [`Unrecorded`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Unqueued {
    pub notice: Notice,
    pub since: DateTime<Utc>,
    pub failures: i64,
}

/// A failing streak as this process saw it, for when the database cannot record it (a full
/// disk, an unwritable database file): nothing can be queued in the outbox then, so the
/// "stuck" notice goes straight to the log, once per streak, and so does its "recovered".
#[derive(Debug, Default)]
pub struct Unrecorded {
    since: Option<DateTime<Utc>>,
    failures: i64,
    told: bool,
}

impl Unrecorded {
    /// A failure at `now`, `recorded` in the database or not; the notice due now, if any.
    pub fn failed(
        &mut self,
        recorded: bool,
        now: DateTime<Utc>,
        after: Duration,
    ) -> Option<Unqueued> {
        if recorded && !self.told {
            // The database holds the streak; the outbox tells it.
            *self = Unrecorded::default();
            return None;
        }
        let since = *self.since.get_or_insert(now);
        self.failures += 1;
        if self.told || !is_stuck(since, now, after) {
            return None;
        }
        self.told = true;
        Some(Unqueued {
            notice: Notice::Stuck,
            since,
            failures: self.failures,
        })
    }

    /// A success: the "recovered" notice when this streak's "stuck" notice went to the log.
    pub fn succeeded(&mut self) -> Option<Unqueued> {
        let told = std::mem::take(self);
        match (told.told, told.since) {
            (true, Some(since)) => Some(Unqueued {
                notice: Notice::Recovered,
                since,
                failures: told.failures,
            }),
            _ => None,
        }
    }
}

/// Records a success of `component`: ends its failing streak, if one runs, and queues the
/// "recovered" notice when the streak's "stuck" notice went out (then returns true). Errors
/// are logged.
pub async fn succeeded(store: &Store, config: &Config, component: Component) -> bool {
    match end_streak(store, config, component).await {
        Ok(queued) => queued,
        Err(e) => {
            tracing::error!(component = component.as_str(), error = %crate::errors::chain(&e), "cannot record the recovery in the database");
            false
        }
    }
}

async fn end_streak(
    store: &Store,
    config: &Config,
    component: Component,
) -> Result<bool, StoreError> {
    // A read first: a success while healthy (nearly always) writes nothing.
    let failing = store
        .health()
        .await?
        .iter()
        .any(|r| r.component == component.as_str() && r.failing_since.is_some());
    if !failing {
        return Ok(false);
    }
    let to = recipients(config, component, Notice::Recovered);
    let now = crate::time::now_rfc3339();
    let queued = store
        .health_recovered(component.as_str(), &now, &to)
        .await?;
    if queued {
        tracing::info!(
            component = component.as_str(),
            "working again; recovery notice queued"
        );
    }
    Ok(queued)
}

/// Queues the "stuck" notice of every component failing for longer than
/// `health.notice_after_minutes` at `now` that has none yet. Returns how many were queued.
pub async fn check(
    store: &Store,
    config: &Config,
    now: DateTime<Utc>,
) -> Result<usize, StoreError> {
    let mut queued = 0;
    for row in store.health().await? {
        if queue_if_due(store, config, &row, now).await? {
            queued += 1;
        }
    }
    Ok(queued)
}

/// After a recorded failure of `component`: queues its "stuck" notice if due now. False when
/// the store cannot (the error logged): the caller then tells the log itself
/// ([`Unrecorded`]), since the outbox cannot.
pub async fn notice_if_due(
    store: &Store,
    config: &Config,
    component: Component,
    now: DateTime<Utc>,
) -> bool {
    let result = async {
        for row in store.health().await? {
            if row.component == component.as_str() {
                queue_if_due(store, config, &row, now).await?;
            }
        }
        Ok::<(), StoreError>(())
    }
    .await;
    match result {
        Ok(()) => true,
        Err(e) => {
            tracing::error!(component = component.as_str(), error = %crate::errors::chain(&e), "cannot queue the notice in the database");
            false
        }
    }
}

/// Queues the "stuck" notice of `row`'s streak when it has lasted long enough and has none.
async fn queue_if_due(
    store: &Store,
    config: &Config,
    row: &HealthRow,
    now: DateTime<Utc>,
) -> Result<bool, StoreError> {
    let Some(component) = Component::ALL
        .into_iter()
        .find(|c| c.as_str() == row.component)
    else {
        return Ok(false);
    };
    let after = chrono::Duration::from_std(config.health.notice_after).unwrap_or_default();
    let failing_before = format_utc(now - after);
    let due = row
        .failing_since
        .as_deref()
        .is_some_and(|since| since <= failing_before.as_str());
    if row.notice_sent || !due {
        return Ok(false);
    }
    let to = recipients(config, component, Notice::Stuck);
    let queued = store
        .health_stuck(component.as_str(), &failing_before, &format_utc(now), &to)
        .await?;
    if queued {
        tracing::warn!(
            component = component.as_str(),
            since = row.failing_since.as_deref().unwrap_or("-"),
            "failing for longer than health.notice_after_minutes; notice queued"
        );
    }
    Ok(queued)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn config(extra: &str) -> Config {
        Config::from_toml(std::path::Path::new("x/lotdrift.toml"), extra).unwrap()
    }

    const EMAIL: &str = "[alerts]\nchannels = [\"email\"]\n[alerts.email]\n\
                         smtp_host = \"127.0.0.1\"\nfrom = \"lotdrift@plant.example\"\n\
                         to = [\"quality@plant.example\", \"lab@plant.example\"]\n";

    fn channels(v: &[(String, String)]) -> Vec<&str> {
        v.iter().map(|(c, _)| c.as_str()).collect()
    }

    #[test]
    fn the_log_always_hears_and_email_only_when_email_is_not_what_fails() {
        let log_only = config("");
        for c in Component::ALL {
            for n in [Notice::Stuck, Notice::Recovered] {
                assert_eq!(channels(&recipients(&log_only, c, n)), vec!["log"]);
            }
        }
        let email = config(EMAIL);
        let both = vec!["log", "email", "email"];
        assert_eq!(
            channels(&recipients(&email, Component::Ingest, Notice::Stuck)),
            both
        );
        assert_eq!(
            channels(&recipients(&email, Component::Ingest, Notice::Recovered)),
            both
        );
        assert_eq!(
            channels(&recipients(&email, Component::Delivery, Notice::Stuck)),
            vec!["log"]
        );
        assert_eq!(
            channels(&recipients(&email, Component::Delivery, Notice::Recovered)),
            both
        );
    }

    #[test]
    fn stuck_only_past_the_threshold_and_state_follows() {
        let t0 = parse_utc("2026-03-01T08:00:00.000Z").unwrap();
        let after = Duration::from_secs(1800);
        assert!(!is_stuck(t0, t0 + chrono::Duration::minutes(30), after));
        assert!(is_stuck(t0, t0 + chrono::Duration::seconds(1801), after));
        assert!(!is_stuck(t0, t0 - chrono::Duration::hours(1), after));
        let mut row = HealthRow::default();
        assert_eq!(state(&row, t0, after), "ok");
        row.failing_since = Some(format_utc(t0));
        row.failures = 3;
        assert_eq!(
            state(&row, t0 + chrono::Duration::minutes(5), after),
            "failing"
        );
        assert_eq!(
            state(&row, t0 + chrono::Duration::minutes(31), after),
            "stuck"
        );
    }

    #[test]
    fn an_unrecorded_streak_is_told_to_the_log_once_and_its_end_once() {
        let t0 = parse_utc("2026-03-01T08:00:00.000Z").unwrap();
        let after = Duration::from_secs(60);
        let at = |s: i64| t0 + chrono::Duration::seconds(s);
        let mut u = Unrecorded::default();
        // Recorded failures are the outbox's business.
        assert_eq!(u.failed(true, at(0), after), None);
        assert_eq!(u.failed(true, at(120), after), None);
        assert_eq!(u.succeeded(), None);
        assert_eq!(u.failed(false, at(0), after), None);
        assert_eq!(u.failed(false, at(30), after), None);
        let told = u.failed(false, at(61), after).unwrap();
        assert_eq!(
            (told.notice, told.since, told.failures),
            (Notice::Stuck, at(0), 3)
        );
        assert_eq!(u.failed(false, at(90), after), None, "once per streak");
        assert_eq!(
            u.failed(true, at(95), after),
            None,
            "the database works again"
        );
        let end = u.succeeded().unwrap();
        assert_eq!(
            (end.notice, end.since, end.failures),
            (Notice::Recovered, at(0), 5)
        );
        assert_eq!(u.succeeded(), None);
        // A short unrecorded streak ends without a word.
        assert_eq!(u.failed(false, at(200), after), None);
        assert_eq!(u.succeeded(), None);
    }
}
