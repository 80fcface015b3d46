//! Alert delivery: drains the outbox through the configured channels.
//!
//! The engine writes one outbox row per channel and recipient in the same transaction that
//! decides an alert event; this module delivers them and records every attempt. The log
//! channel writes one structured tracing event per message. The email channel talks SMTP
//! (lettre over tokio, rustls; never OpenSSL): a refused connection, a timeout or a 4xx reply
//! is retried with exponential backoff and jitter, a 5xx is recorded as failed with the
//! server's reply, and a message older than `alerts.expire_hours` is marked expired, never
//! silently dropped. Every SMTP exchange runs under `alerts.email.timeout_seconds` as a
//! whole, so a server that stops answering cannot hold the drain. Only this module knows
//! SMTP. The SMTP password comes from `LOTDRIFT_SMTP_PASSWORD` or
//! `alerts.email.password_file` and is never logged.
//!
//! Besides alert events the outbox carries daily digests (text from [`crate::digest`]),
//! silence notices (a source sent no lot for longer than usual, [`crate::silence`]; plain
//! text from [`silence_body`]) and operational notices (ingest or delivery stuck, and
//! recovered, [`crate::health`]; plain text from [`health_body`]). Every drain reports the
//! outcome of its latest email attempt to [`crate::health`].
//!
//! An alert message is multipart/mixed: a multipart/alternative of plain text and HTML (both
//! built from the same rows by [`facts`]; names cleaned of control characters, HTML escaped),
//! and the series chart from [`crate::chart`] as a PNG attachment. Its Message-ID is derived
//! from the alert event, so every attempt and every recipient get the same one.

use std::collections::{HashMap, HashSet};
use std::sync::Arc;
use std::time::Duration;

use chrono::Utc;
use lettre::message::header::ContentType;
use lettre::message::{Attachment, Mailbox, MultiPart, SinglePart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Certificate, Tls as LettreTls, TlsParameters};
use lettre::transport::smtp::response::Response;
use lettre::{AsyncSmtpTransport, AsyncTransport, Message, Tokio1Executor};
use tokio::sync::Notify;
use tokio_util::sync::CancellationToken;

use crate::chart;
use crate::config::{Config, Email, Tls};
use crate::digest;
use crate::health::{self, Component};
use crate::page::escape;
use crate::silence;
use crate::store::{
    AlertRow, DeliveryOutcome, DigestItem, HealthItem, OutboxItem, SilenceItem, Store, StoreError,
};
use crate::time::{format_utc, now_rfc3339, parse_utc};

/// The environment variable that carries the SMTP password.
pub const PASSWORD_ENV: &str = "LOTDRIFT_SMTP_PASSWORD";

/// Lots shown in the chart of an alert message (the most recent ones of the series).
pub const CHART_LOTS: i64 = 40;

/// Outbox rows read per query while draining.
const DRAIN_BATCH: i64 = 100;

/// A batch handed out by the store is sent within this time of being read, the rest left to
/// a later drain: the store's claim on it (several daemons on one history) lasts twice as
/// long, so no other daemon sends a message this one is still sending.
const SEND_WITHIN: Duration = Duration::from_secs(crate::store::CLAIM_LEASE.as_secs() / 2);

/// The notifier checks for silent sources when woken (new lots) and at least this often.
const SILENCE_EVERY: Duration = Duration::from_secs(60);

#[derive(Debug, thiserror::Error)]
pub enum AlertError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("alerts.email: {0}")]
    Email(String),
}

/// Counts of one drain.
#[derive(Debug, Default, Clone, PartialEq, Eq)]
pub struct DrainReport {
    pub delivered: usize,
    pub retrying: usize,
    pub failed: usize,
    pub expired: usize,
    /// The outcome of the drain's latest email attempt (its error when not delivered); None
    /// when no email was attempted.
    pub email: Option<Result<(), String>>,
}

/// Delivers every message due now, once each (alert events first, then digests). Returns
/// what happened.
///
/// The SMTP transport is built once per drain. When it cannot be built (an unreadable
/// `ca_file`, a missing password), email messages are retried and eventually expire with that
/// reason, and the other channels are delivered all the same.
pub async fn drain_once(store: &Store, config: &Config) -> Result<DrainReport, AlertError> {
    let mut report = DrainReport::default();
    let mut mailer: Option<Result<Mailer, String>> = None;
    // Charts are rendered once per alert event, not once per recipient.
    let mut charts: HashMap<i64, Option<Arc<Vec<u8>>>> = HashMap::new();
    // One attempt per message and drain, even when a retry is due at once again.
    let mut attempted: HashSet<i64> = HashSet::new();
    loop {
        let due = store.due_outbox(&now_rfc3339(), DRAIN_BATCH).await?;
        let read_at = std::time::Instant::now();
        let mut batch = due.len();
        let fresh: Vec<OutboxItem> = due.into_iter().filter(|i| attempted.insert(i.id)).collect();
        if fresh.is_empty() {
            break;
        }
        // Log messages are recorded together after the batch (a crash in between logs them
        // again, which is harmless); an email's outcome is recorded at once, before the next
        // message is sent.
        let mut logged = Vec::new();
        for item in fresh {
            if read_at.elapsed() > SEND_WITHIN {
                batch = 0;
                break;
            }
            let outcome = match item.channel.as_str() {
                "email" => {
                    let mailer = mailer.get_or_insert_with(|| build_mailer(config));
                    let chart = match charts.get(&item.event_id) {
                        Some(c) => c.clone(),
                        None if mailer.is_err() => None,
                        None => {
                            let c = chart_for(store, config, &item).await.map(Arc::new);
                            charts.insert(item.event_id, c.clone());
                            c
                        }
                    };
                    let message = mailer.as_ref().map_err(Clone::clone).and_then(|m| {
                        let unit = config.unit(&item.alert.characteristic);
                        alert_message(&m.from, &item, chart.as_deref().map(Vec::as_slice), unit)
                    });
                    let attempt = Attempt::of_event(&item);
                    send_email(&attempt, config, mailer, message).await
                }
                "log" => {
                    log_event(&item);
                    DeliveryOutcome::Delivered
                }
                other => DeliveryOutcome::Failed {
                    error: format!("unknown channel {other:?}"),
                },
            };
            tally(&mut report, &item.channel, &item.recipient, &outcome);
            if item.channel == "log" {
                logged.push((item.id, outcome));
            } else {
                store
                    .outbox_attempted(item.id, &outcome, &now_rfc3339())
                    .await?;
            }
        }
        store.outbox_attempted_many(&logged, &now_rfc3339()).await?;
        if (batch as i64) < DRAIN_BATCH {
            break;
        }
    }
    loop {
        let due = store.due_digests(&now_rfc3339(), DRAIN_BATCH).await?;
        let read_at = std::time::Instant::now();
        let mut batch = due.len();
        let fresh: Vec<DigestItem> = due.into_iter().filter(|i| attempted.insert(i.id)).collect();
        if fresh.is_empty() {
            break;
        }
        for item in fresh {
            if read_at.elapsed() > SEND_WITHIN {
                batch = 0;
                break;
            }
            let outcome = deliver(
                &item.channel,
                config,
                &mut mailer,
                &Attempt::of_digest(&item),
                |from| digest_message(from, &item),
                || log_digest(&item),
            )
            .await;
            tally(&mut report, &item.channel, &item.recipient, &outcome);
            store
                .outbox_attempted(item.id, &outcome, &now_rfc3339())
                .await?;
        }
        if (batch as i64) < DRAIN_BATCH {
            break;
        }
    }
    drain_silences(store, config, &mut mailer, &mut attempted, &mut report).await?;
    drain_health(store, config, &mut mailer, &mut attempted, &mut report).await?;
    note_delivery(store, config, &mut mailer, &mut attempted, &mut report).await?;
    Ok(report)
}

/// Tells the health watch how the drain's latest email attempt went; when that ends a noticed
/// failing streak, the recovery notice (by email too) goes out in this same drain.
async fn note_delivery(
    store: &Store,
    config: &Config,
    mailer: &mut Option<Result<Mailer, String>>,
    attempted: &mut HashSet<i64>,
    report: &mut DrainReport,
) -> Result<(), AlertError> {
    let recovered = match report.email.clone() {
        Some(Ok(())) => health::succeeded(store, config, Component::Delivery).await,
        Some(Err(error)) => {
            health::failed(store, Component::Delivery, &error).await;
            false
        }
        None => false,
    };
    if recovered {
        drain_health(store, config, mailer, attempted, report).await?;
    }
    Ok(())
}

/// Delivers the due operational notices, once each per drain (see [`drain_once`]).
async fn drain_health(
    store: &Store,
    config: &Config,
    mailer: &mut Option<Result<Mailer, String>>,
    attempted: &mut HashSet<i64>,
    report: &mut DrainReport,
) -> Result<(), AlertError> {
    let due = || async { store.due_health_messages(&now_rfc3339(), DRAIN_BATCH).await };
    drain_notices(store, config, mailer, attempted, report, due).await
}

/// Delivers the due messages about silent sources, once each per drain (see [`drain_once`]).
async fn drain_silences(
    store: &Store,
    config: &Config,
    mailer: &mut Option<Result<Mailer, String>>,
    attempted: &mut HashSet<i64>,
    report: &mut DrainReport,
) -> Result<(), AlertError> {
    let due = || async {
        store
            .due_silence_messages(&now_rfc3339(), DRAIN_BATCH)
            .await
    };
    drain_notices(store, config, mailer, attempted, report, due).await
}

/// A queued message that is not an alert event (a silence or health notice): what the
/// shared drain needs of it.
trait Notice {
    fn outbox_id(&self) -> i64;
    fn channel(&self) -> &str;
    fn recipient(&self) -> &str;
    fn attempt(&self) -> Attempt<'_>;
    fn message(&self, from: &Mailbox) -> Result<Message, String>;
    fn log(&self);
}

impl Notice for SilenceItem {
    fn outbox_id(&self) -> i64 {
        self.id
    }
    fn channel(&self) -> &str {
        &self.channel
    }
    fn recipient(&self) -> &str {
        &self.recipient
    }
    fn attempt(&self) -> Attempt<'_> {
        Attempt::of_silence(self)
    }
    fn message(&self, from: &Mailbox) -> Result<Message, String> {
        silence_message(from, self)
    }
    fn log(&self) {
        log_silence(self)
    }
}

impl Notice for HealthItem {
    fn outbox_id(&self) -> i64 {
        self.id
    }
    fn channel(&self) -> &str {
        &self.channel
    }
    fn recipient(&self) -> &str {
        &self.recipient
    }
    fn attempt(&self) -> Attempt<'_> {
        Attempt::of_health(self)
    }
    fn message(&self, from: &Mailbox) -> Result<Message, String> {
        health_message(from, self)
    }
    fn log(&self) {
        log_health(self)
    }
}

/// Delivers what `due` returns, batch after batch, each message once per drain; its outcome
/// is recorded before the next one is sent.
async fn drain_notices<T: Notice, Fut>(
    store: &Store,
    config: &Config,
    mailer: &mut Option<Result<Mailer, String>>,
    attempted: &mut HashSet<i64>,
    report: &mut DrainReport,
    due: impl Fn() -> Fut,
) -> Result<(), AlertError>
where
    Fut: std::future::Future<Output = Result<Vec<T>, StoreError>>,
{
    loop {
        let due = due().await?;
        let read_at = std::time::Instant::now();
        let mut batch = due.len();
        let fresh: Vec<T> = due
            .into_iter()
            .filter(|i| attempted.insert(i.outbox_id()))
            .collect();
        if fresh.is_empty() {
            break;
        }
        for item in fresh {
            if read_at.elapsed() > SEND_WITHIN {
                batch = 0;
                break;
            }
            let outcome = deliver(
                item.channel(),
                config,
                mailer,
                &item.attempt(),
                |from| item.message(from),
                || item.log(),
            )
            .await;
            tally(report, item.channel(), item.recipient(), &outcome);
            store
                .outbox_attempted(item.outbox_id(), &outcome, &now_rfc3339())
                .await?;
        }
        if (batch as i64) < DRAIN_BATCH {
            break;
        }
    }
    Ok(())
}

/// Delivers one digest or silence message through its channel: by email, built by `message`
/// (the SMTP transport is built on first use), or to the log by `log`.
async fn deliver(
    channel: &str,
    config: &Config,
    mailer: &mut Option<Result<Mailer, String>>,
    attempt: &Attempt<'_>,
    message: impl FnOnce(&Mailbox) -> Result<Message, String>,
    log: impl FnOnce(),
) -> DeliveryOutcome {
    match channel {
        "email" => {
            let mailer = mailer.get_or_insert_with(|| build_mailer(config));
            let message = mailer
                .as_ref()
                .map_err(Clone::clone)
                .and_then(|m| message(&m.from));
            send_email(attempt, config, mailer, message).await
        }
        "log" => {
            log();
            DeliveryOutcome::Delivered
        }
        other => DeliveryOutcome::Failed {
            error: format!("unknown channel {other:?}"),
        },
    }
}

/// Counts an outcome, keeps the latest email outcome, and logs a failure.
fn tally(report: &mut DrainReport, channel: &str, recipient: &str, outcome: &DeliveryOutcome) {
    if channel == "email" {
        report.email = Some(match outcome {
            DeliveryOutcome::Delivered => Ok(()),
            DeliveryOutcome::Retry { error, .. }
            | DeliveryOutcome::Failed { error }
            | DeliveryOutcome::Expired { error } => Err(error.clone()),
        });
    }
    match outcome {
        DeliveryOutcome::Delivered => report.delivered += 1,
        DeliveryOutcome::Retry { error, next_at } => {
            tracing::warn!(channel, recipient, %error, %next_at, "delivery failed; will retry");
            report.retrying += 1;
        }
        DeliveryOutcome::Failed { error } => {
            tracing::error!(channel, recipient, %error, "delivery failed permanently");
            report.failed += 1;
        }
        DeliveryOutcome::Expired { error } => {
            tracing::error!(channel, recipient, %error, "message expired undelivered");
            report.expired += 1;
        }
    }
}

/// What the retry rule needs to know of an outbox message.
struct Attempt<'a> {
    id: i64,
    recipient: &'a str,
    attempts: i64,
    created_at: &'a str,
    /// For the log line on delivery.
    what: String,
}

impl<'a> Attempt<'a> {
    fn of_event(item: &'a OutboxItem) -> Attempt<'a> {
        Attempt {
            id: item.id,
            recipient: &item.recipient,
            attempts: item.attempts,
            created_at: &item.created_at,
            what: format!("alert event {}", item.event_id),
        }
    }

    fn of_digest(item: &'a DigestItem) -> Attempt<'a> {
        Attempt {
            id: item.id,
            recipient: &item.recipient,
            attempts: item.attempts,
            created_at: &item.created_at,
            what: format!("digest {}", item.local_date),
        }
    }

    fn of_silence(item: &'a SilenceItem) -> Attempt<'a> {
        Attempt {
            id: item.id,
            recipient: &item.recipient,
            attempts: item.attempts,
            created_at: &item.created_at,
            what: format!("silence event {}", item.event_id),
        }
    }

    fn of_health(item: &'a HealthItem) -> Attempt<'a> {
        Attempt {
            id: item.id,
            recipient: &item.recipient,
            attempts: item.attempts,
            created_at: &item.created_at,
            what: format!("health event {}", item.event_id),
        }
    }
}

/// Queues the daily digest when it is due, checks for silent sources (when woken, and at
/// least every [`SILENCE_EVERY`]), queues the notices of a stuck ingest or delivery
/// ([`health::check`]) and drains the outbox, whenever `wake` is notified and at
/// least every `poll`, until cancelled.
pub async fn run(
    store: Arc<Store>,
    config: Arc<Config>,
    wake: Arc<Notify>,
    cancel: CancellationToken,
) {
    let poll = Duration::from_secs(5);
    let mut woken = true;
    let mut silence_checked: Option<tokio::time::Instant> = None;
    loop {
        if let Err(e) = digest::schedule_if_due(&store, &config).await {
            tracing::error!(error = %crate::errors::chain(&e), "cannot queue the daily digest");
        }
        if woken || silence_checked.is_none_or(|t| t.elapsed() >= SILENCE_EVERY) {
            if let Err(e) = silence::check(&store, &config, Utc::now()).await {
                tracing::error!(error = %crate::errors::chain(&e), "cannot check for silent sources");
            }
            silence_checked = Some(tokio::time::Instant::now());
        }
        if let Err(e) = health::check(&store, &config, Utc::now()).await {
            tracing::error!(error = %crate::errors::chain(&e), "cannot check the health of ingest and delivery");
        }
        match drain_once(&store, &config).await {
            Ok(_) => {}
            Err(e) => tracing::error!(error = %crate::errors::chain(&e), "outbox drain failed"),
        }
        woken = tokio::select! {
            _ = cancel.cancelled() => return,
            _ = wake.notified() => true,
            _ = tokio::time::sleep(poll) => false,
        };
    }
}

fn build_mailer(config: &Config) -> Result<Mailer, String> {
    let Some(email) = &config.alerts.email else {
        return Err("no [alerts.email] section configured".into());
    };
    Mailer::new(email).map_err(|e| {
        tracing::error!(error = %crate::errors::chain(&e), "cannot set up the SMTP client; email messages wait");
        e.to_string()
    })
}

async fn send_email(
    attempt: &Attempt<'_>,
    config: &Config,
    mailer: &Result<Mailer, String>,
    message: Result<Message, String>,
) -> DeliveryOutcome {
    let mailer = match mailer {
        Ok(m) => m,
        Err(e) => return retry_or_expire(attempt, config, e.clone()),
    };
    let message = match message {
        Ok(m) => m,
        Err(error) => return DeliveryOutcome::Failed { error },
    };
    match mailer.send(message).await {
        Ok(reply) => {
            tracing::info!(recipient = %attempt.recipient, message = %attempt.what, %reply, "email delivered");
            DeliveryOutcome::Delivered
        }
        Err(SendError::Permanent(error)) => DeliveryOutcome::Failed { error },
        Err(SendError::Transient(error)) => retry_or_expire(attempt, config, error),
    }
}

/// The chart of the quantity that alerted (lot means, within-lot spread or the CUSUM path)
/// with the engine's own limits (`page::model::alert_chart`), or `None` (logged) when it
/// cannot be made: a message without its chart is better than no message.
async fn chart_for(store: &Store, config: &Config, item: &OutboxItem) -> Option<Vec<u8>> {
    let a = &item.alert;
    let mut c = match crate::page::model::alert_chart(store, config, a, CHART_LOTS).await {
        Ok(Some(c)) => c,
        Ok(None) => return None,
        Err(e) => {
            tracing::warn!(error = %crate::errors::chain(&e), alert = a.id, "cannot read the series for the chart");
            return None;
        }
    };
    c.title = clean(&c.title).chars().take(100).collect();
    c.lots = c.lots.iter().map(|l| clean(l)).collect();
    let rendered = tokio::task::spawn_blocking(move || chart::render_png(&c)).await;
    match rendered {
        Ok(Ok(png)) => Some(png),
        Ok(Err(e)) => {
            tracing::warn!(error = %crate::errors::chain(&e), alert = a.id, "cannot draw the chart");
            None
        }
        Err(e) => {
            tracing::warn!(error = %crate::errors::chain(&e), alert = a.id, "chart task failed");
            None
        }
    }
}

fn retry_or_expire(item: &Attempt<'_>, config: &Config, error: String) -> DeliveryOutcome {
    let now = Utc::now();
    let age = parse_utc(item.created_at)
        .map(|c| (now - c).to_std().unwrap_or_default())
        .unwrap_or_default();
    if age >= config.alerts.expire_after {
        return DeliveryOutcome::Expired {
            error: format!("{error} (undelivered after {} attempts)", item.attempts + 1),
        };
    }
    let delay = backoff(
        config.alerts.retry_initial,
        config.alerts.retry_max,
        item.attempts as u32,
        item.id as u64,
    );
    DeliveryOutcome::Retry {
        next_at: format_utc(now + chrono::Duration::from_std(delay).unwrap_or_default()),
        error,
    }
}

/// Exponential backoff with ±20 % jitter, derived from the message id and attempt so that
/// messages queued together do not all retry in the same instant.
pub fn backoff(initial: Duration, max: Duration, attempts: u32, salt: u64) -> Duration {
    let base = initial.as_secs_f64() * 2f64.powi(attempts.min(30) as i32);
    let capped = base.min(max.as_secs_f64());
    let mut x = salt
        .wrapping_mul(0x9E37_79B9_7F4A_7C15)
        .wrapping_add(attempts as u64);
    x ^= x >> 31;
    x = x.wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x ^= x >> 29;
    let unit = (x >> 11) as f64 / (1u64 << 53) as f64;
    Duration::from_secs_f64((capped * (0.8 + 0.4 * unit)).max(0.0))
}

fn log_event(item: &OutboxItem) {
    let a = &item.alert;
    let direction = direction(a);
    tracing::warn!(
        target: "lotdrift::alert",
        event = %item.event_kind,
        alert = a.id,
        source = %a.source,
        characteristic = %a.characteristic,
        lot = %a.lot,
        direction,
        baseline_n = a.baseline_n,
        baseline_mean = a.baseline_mean,
        baseline_sd = a.baseline_sd.unwrap_or(f64::NAN),
        lot_n = a.lot_n,
        lot_mean = a.lot_mean,
        lot_sd = a.lot_sd.unwrap_or(f64::NAN),
        test = %a.test,
        t = a.statistic.unwrap_or(f64::NAN),
        df = a.df.unwrap_or(f64::NAN),
        p = a.p_value.unwrap_or(f64::NAN),
        p_adjusted = a.p_adjusted.unwrap_or(f64::NAN),
        method = %a.method,
        level = a.level,
        "{}",
        subject(item)
    );
}

fn direction(a: &AlertRow) -> &'static str {
    match a.estimate {
        Some(e) if e > 0.0 => "up",
        Some(e) if e < 0.0 => "down",
        _ => "unchanged",
    }
}

/// Removes CR, LF and every other control character, so names cannot inject headers.
pub fn clean(s: &str) -> String {
    s.chars()
        .map(|c| if c.is_control() { ' ' } else { c })
        .collect()
}

/// The one-line summary used as log message and email subject.
pub fn subject(item: &OutboxItem) -> String {
    let a = &item.alert;
    let text = match item.event_kind.as_str() {
        "resolved" => format!(
            "lotdrift: {} / {} back in control (alert {} resolved)",
            a.source, a.characteristic, a.id
        ),
        "repeated" => format!(
            "lotdrift: {} / {} still shifted {} (lot {}, alert {} open since {})",
            a.source,
            a.characteristic,
            direction(a),
            a.lot,
            a.id,
            &a.opened_at[..10.min(a.opened_at.len())]
        ),
        "reopened" => format!(
            "lotdrift: {} / {} {} again in lot {} (alert {} reopened, first opened {})",
            a.source,
            a.characteristic,
            if a.kind == "spread" {
                "spread grew".to_string()
            } else {
                format!("mean shifted {}", direction(a))
            },
            a.lot,
            a.id,
            &a.opened_at[..10.min(a.opened_at.len())]
        ),
        _ if a.kind == "spread" => format!(
            "lotdrift: {} / {} spread grew in lot {} (alert {})",
            a.source, a.characteristic, a.lot, a.id
        ),
        _ => format!(
            "lotdrift: {} / {} mean shifted {} in lot {} (alert {})",
            a.source,
            a.characteristic,
            direction(a),
            a.lot,
            a.id
        ),
    };
    clean(&text)
}

/// A measured value or statistic as people write it (5 significant digits), or "-".
fn fmt_opt(v: Option<f64>) -> String {
    crate::page::fmt::opt(v, 5)
}

/// The numbers of an alert message as (label, value) rows, shared by the plain-text and the
/// HTML part so both always say the same. Names are cleaned of control characters. Means,
/// sds and a mean's difference carry the characteristic's `unit` of measure, except on the
/// log scale (then they are of ln(value)).
pub fn facts(item: &OutboxItem, unit: Option<&str>) -> Vec<(&'static str, String)> {
    let a = &item.alert;
    let unit = unit.filter(|_| !crate::engine::on_log_scale(a.note.as_deref()));
    let v = |x: Option<f64>| crate::numbers::with_unit(fmt_opt(x), unit);
    let mut rows = vec![
        ("Source", clean(&a.source)),
        ("Characteristic", clean(&a.characteristic)),
        (
            "Direction",
            if item.event_kind == "resolved" {
                "none: back in control".to_string()
            } else {
                direction(a).to_string()
            },
        ),
        (
            "Lot",
            format!(
                "{} (sampled {})",
                clean(&a.lot),
                a.lot_sampled_at.as_deref().unwrap_or("-")
            ),
        ),
        (
            "Baseline",
            format!(
                "n = {}, mean = {}, sd = {}",
                a.baseline_n,
                v(Some(a.baseline_mean)),
                v(a.baseline_sd)
            ),
        ),
        (
            "This lot",
            format!(
                "n = {}, mean = {}, sd = {}",
                a.lot_n,
                v(Some(a.lot_mean)),
                v(a.lot_sd)
            ),
        ),
    ];
    if let (Some(e), Some([lo, hi])) = (a.estimate, a.ci) {
        let d = |x: f64| match a.kind.as_str() {
            "mean" => v(Some(x)),
            _ => fmt_opt(Some(x)),
        };
        rows.push((
            "Difference",
            format!(
                "{} (lot − baseline), 95 % interval [{}, {}]",
                d(e),
                d(lo),
                d(hi)
            ),
        ));
    }
    rows.push((
        "Test",
        format!(
            "{} ({}), statistic = {}, df = {}, p {}",
            a.test,
            a.alternative,
            fmt_opt(a.statistic),
            crate::numbers::df(a.df, a.df2),
            crate::numbers::p_is(a.p_value)
        ),
    ));
    rows.push((
        "Adjusted",
        format!(
            "p {} ({} over {} test(s) of this lot, level {})",
            crate::numbers::p_is(a.p_adjusted),
            a.method,
            a.family_size,
            crate::numbers::p_value(Some(a.level))
        ),
    ));
    if let Some(model) = &a.model {
        rows.push(("Model", model.clone()));
    }
    if let Some([c, lo, hi]) = a.cpk {
        rows.push((
            "Cpk (this lot)",
            format!(
                "{}, 95 % interval [{}, {}]",
                crate::page::fmt::sig(c, 3),
                crate::page::fmt::sig(lo, 3),
                crate::page::fmt::sig(hi, 3)
            ),
        ));
    }
    if let Some(note) = &a.note {
        rows.push(("Note", clean(note)));
    }
    let opened_by = if item.opening_lot == a.lot {
        String::new()
    } else {
        format!(" by lot {}", clean(&item.opening_lot))
    };
    rows.push((
        "Alert",
        format!(
            "{} ({}), opened {}{opened_by}, {} significant lot(s)",
            a.id, a.state, a.opened_at, a.lots
        ),
    ));
    rows
}

/// What the attached chart shows (plain text and HTML part alike).
const CHART_NOTE: &str = "The attached chart shows the quantity that alerted (lot means, \
     within-lot spread, or the CUSUM path) for the latest lots of the series (at most 40), with \
     the limits the engine decides by: dashed lines, or h for the CUSUM. Baseline lots are \
     hollow circles, lots in control filled circles, flagged lots diamonds.";

const DISCLAIMER: &str = "This is a statistical signal to support incoming inspection and the \
                          engineer's judgment, not a verdict on conformance.";

/// The plain-text body of an alert message.
pub fn body(item: &OutboxItem, unit: Option<&str>) -> String {
    let mut s = String::new();
    s.push_str(&subject(item));
    s.push_str("\n\n");
    for (label, value) in facts(item, unit) {
        s.push_str(&format!("{:<17}{value}\n", format!("{label}:")));
    }
    s.push_str(&format!("\n{CHART_NOTE}\n"));
    s.push_str(&format!("\n{DISCLAIMER}\n"));
    s
}

/// The HTML body of an alert message: the same rows as the plain text, in a table. Every
/// interpolated value is escaped.
pub fn html_body(item: &OutboxItem, unit: Option<&str>) -> String {
    let mut s = String::from(
        "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"></head>\n\
         <body style=\"font-family: sans-serif\">\n",
    );
    s.push_str(&format!("<h3>{}</h3>\n", escape(&subject(item))));
    s.push_str("<table cellpadding=\"4\" style=\"border-collapse: collapse\">\n");
    for (label, value) in facts(item, unit) {
        s.push_str(&format!(
            "<tr><th align=\"left\" style=\"border-bottom: 1px solid #ddd\">{}</th>\
             <td style=\"border-bottom: 1px solid #ddd\">{}</td></tr>\n",
            escape(label),
            escape(&value)
        ));
    }
    s.push_str("</table>\n");
    s.push_str(&format!("<p>{}</p>\n", escape(CHART_NOTE)));
    s.push_str(&format!("<p><small>{}</small></p>\n", escape(DISCLAIMER)));
    s.push_str("</body></html>\n");
    s
}

/// The Message-ID of an alert event: the same for every attempt and every recipient, so a
/// retry after an unknown outcome is recognisable as the same message.
pub fn message_id(item: &OutboxItem, domain: &str) -> String {
    let stamp: String = item.event_at.chars().filter(char::is_ascii_digit).collect();
    format!("<lotdrift.event-{}.{stamp}@{domain}>", item.event_id)
}

/// The whole alert message to `item.recipient`: multipart/mixed of a multipart/alternative
/// (plain text, HTML) and the PNG chart when there is one.
fn alert_message(
    from: &Mailbox,
    item: &OutboxItem,
    chart: Option<&[u8]>,
    unit: Option<&str>,
) -> Result<Message, String> {
    let to: Mailbox = item
        .recipient
        .parse()
        .map_err(|e| format!("recipient {:?}: {e}", item.recipient))?;
    let text = MultiPart::alternative()
        .singlepart(SinglePart::plain(body(item, unit)))
        .singlepart(SinglePart::html(html_body(item, unit)));
    let mut content = MultiPart::mixed().multipart(text);
    if let Some(png) = chart {
        let png_type = ContentType::parse("image/png").map_err(|e| format!("content type: {e}"))?;
        content = content.singlepart(
            Attachment::new(format!("lotdrift-alert-{}.png", item.alert.id))
                .body(png.to_vec(), png_type),
        );
    }
    Message::builder()
        .from(from.clone())
        .to(to)
        .subject(subject(item))
        .message_id(Some(message_id(item, from.email.domain())))
        .multipart(content)
        .map_err(|e| format!("cannot build message: {e}"))
}

/// A digest message to `item.recipient`: multipart/alternative of plain text and HTML. Its
/// Message-ID is the same for every attempt.
fn digest_message(from: &Mailbox, item: &DigestItem) -> Result<Message, String> {
    let to: Mailbox = item
        .recipient
        .parse()
        .map_err(|e| format!("recipient {:?}: {e}", item.recipient))?;
    Message::builder()
        .from(from.clone())
        .to(to)
        .subject(digest::subject(item))
        .message_id(Some(format!(
            "<lotdrift.digest-{}.{}@{}>",
            item.digest_id,
            item.id,
            from.email.domain()
        )))
        .multipart(MultiPart::alternative_plain_html(
            digest::body(item),
            digest::html_body(item),
        ))
        .map_err(|e| format!("cannot build message: {e}"))
}

fn log_digest(item: &DigestItem) {
    tracing::info!(
        target: "lotdrift::alert",
        date = %item.local_date,
        open_alerts = item.alerts.len(),
        "{}",
        digest::subject(item)
    );
    for row in digest::rows(item) {
        let [id, source, characteristic, shift, opened, lot, lots, acked] = row;
        tracing::info!(
            target: "lotdrift::alert",
            alert = %id, %source, %characteristic, %shift, %opened, %lot, %lots, acknowledged = %acked,
            "open alert {id}: {source} / {characteristic} {shift} since {opened}"
        );
    }
}

/// Days as people read them: "1 day", "2.5 days", "20 days" (one decimal at most).
fn days_text(days: f64) -> String {
    let r = (days * 10.0).round() / 10.0;
    if r == 1.0 {
        "1 day".to_string()
    } else if r.fract() == 0.0 {
        format!("{r:.0} days")
    } else {
        format!("{r:.1} days")
    }
}

/// Days from `from` to `to` (stored times), or `None` when either does not parse.
fn days_between(from: &str, to: &str) -> Option<f64> {
    let (a, b) = (parse_utc(from)?, parse_utc(to)?);
    Some((b - a).as_seconds_f64() / 86_400.0)
}

/// The one-line summary of a silence message, used as log message and email subject.
pub fn silence_subject(item: &SilenceItem) -> String {
    let s = &item.silence;
    let text = if item.event_kind == "resolved" {
        format!(
            "lotdrift: lots from {} again (lot {})",
            s.source,
            s.resolving_lot.as_deref().unwrap_or("-")
        )
    } else {
        let silent = days_between(&s.last_lot_at, &item.event_at).map_or("-".into(), days_text);
        let usual = match s.median_days {
            Some(m) => format!("usually every {}", days_text(m)),
            None => format!("expected within {}", days_text(s.threshold_days)),
        };
        format!("lotdrift: no lots from {} for {silent} ({usual})", s.source)
    };
    clean(&text)
}

/// How the threshold of a silence was set, in words.
fn threshold_text(s: &crate::store::SilenceRow) -> String {
    let days = days_text(s.threshold_days);
    match (s.basis.as_str(), s.intervals, s.median_days) {
        ("learned", Some(k), Some(m)) => format!(
            "{days}, learned from the source's last {k} intervals between lots (median {}): \
             the largest of {} × the median, {} × the longest of the last {} intervals, and \
             {} day",
            days_text(m),
            silence::MEDIAN_FACTOR,
            silence::RECENT_FACTOR,
            silence::RECENT_INTERVALS,
            silence::MIN_THRESHOLD_DAYS
        ),
        ("configured_for_source", _, _) => {
            format!("{days}, configured for the source (monitor.silence_days_by_source)")
        }
        _ => format!("{days}, configured (monitor.silence_days)"),
    }
}

/// The rows of a silence message as (label, value); names cleaned of control characters.
pub fn silence_facts(item: &SilenceItem) -> Vec<(&'static str, String)> {
    let s = &item.silence;
    let last = format!("{} (lot time {})", clean(&s.last_lot), s.last_lot_at);
    let mut rows = vec![("Source", clean(&s.source))];
    if item.event_kind == "resolved" {
        let at = s.resolving_lot_at.as_deref().unwrap_or("-");
        let lot = s.resolving_lot.as_deref().unwrap_or("-");
        rows.push(("New lot", format!("{} (lot time {at})", clean(lot))));
        rows.push(("Previous lot", last));
        let gap = days_between(&s.last_lot_at, at).map_or("-".into(), days_text);
        rows.push(("Gap", gap));
    } else {
        rows.push(("Last lot", last));
        let silent = days_between(&s.last_lot_at, &item.event_at).map_or("-".into(), days_text);
        rows.push(("Silent for", format!("{silent} as of {}", item.event_at)));
    }
    rows.push(("Threshold", threshold_text(s)));
    let mut state = format!("{}, noticed {}", s.id, s.opened_at);
    if let Some(r) = &s.resolved_at {
        state.push_str(&format!(", resolved {r}"));
    }
    rows.push(("Silence", state));
    rows
}

const SILENCE_NOTE: &str = "Lot times are sampling times (the arrival time where a lot has \
                            none). One notice is sent when a source falls silent, and one when \
                            its lots arrive again. See `lotdrift status` for silent sources.";

/// The plain-text body of a silence message.
pub fn silence_body(item: &SilenceItem) -> String {
    let mut s = silence_subject(item);
    s.push_str("\n\n");
    for (label, value) in silence_facts(item) {
        s.push_str(&format!("{:<14}{value}\n", format!("{label}:")));
    }
    s.push_str(&format!("\n{SILENCE_NOTE}\n"));
    s
}

/// A silence message to `item.recipient`: plain text. Its Message-ID is derived from the
/// silence event, the same for every attempt and recipient.
fn silence_message(from: &Mailbox, item: &SilenceItem) -> Result<Message, String> {
    let to: Mailbox = item
        .recipient
        .parse()
        .map_err(|e| format!("recipient {:?}: {e}", item.recipient))?;
    let stamp: String = item.event_at.chars().filter(char::is_ascii_digit).collect();
    Message::builder()
        .from(from.clone())
        .to(to)
        .subject(silence_subject(item))
        .message_id(Some(format!(
            "<lotdrift.silence-{}.{stamp}@{}>",
            item.event_id,
            from.email.domain()
        )))
        .header(ContentType::TEXT_PLAIN)
        .body(silence_body(item))
        .map_err(|e| format!("cannot build message: {e}"))
}

fn log_silence(item: &SilenceItem) {
    let s = &item.silence;
    if item.event_kind == "resolved" {
        tracing::info!(
            target: "lotdrift::alert",
            event = %item.event_kind,
            silence = s.id,
            source = %s.source,
            lot = s.resolving_lot.as_deref().unwrap_or("-"),
            lot_at = s.resolving_lot_at.as_deref().unwrap_or("-"),
            "{}",
            silence_subject(item)
        );
    } else {
        tracing::warn!(
            target: "lotdrift::alert",
            event = %item.event_kind,
            silence = s.id,
            source = %s.source,
            last_lot = %s.last_lot,
            last_lot_at = %s.last_lot_at,
            threshold_days = s.threshold_days,
            basis = %s.basis,
            "{}",
            silence_subject(item)
        );
    }
}

/// A duration as people read it: "40 s", "35 min", "2.5 h", "3.1 days".
fn span_text(seconds: f64) -> String {
    let s = seconds.max(0.0);
    if s < 90.0 {
        format!("{s:.0} s")
    } else if s < 90.0 * 60.0 {
        format!("{:.0} min", s / 60.0)
    } else if s < 48.0 * 3600.0 {
        format!("{:.1} h", s / 3600.0)
    } else {
        format!("{:.1} days", s / 86_400.0)
    }
}

/// What the component is called in a notice.
fn component_text(component: &str) -> &'static str {
    if component == "delivery" {
        "email delivery"
    } else {
        "ingest"
    }
}

/// The one-line summary of an operational notice, used as log message and email subject.
pub fn health_subject(item: &HealthItem) -> String {
    let span = parse_utc(&item.failing_since)
        .zip(parse_utc(&item.at))
        .map_or("-".into(), |(a, b)| span_text((b - a).as_seconds_f64()));
    let what = component_text(&item.component);
    let text = match (item.kind.as_str(), item.component.as_str()) {
        ("recovered", _) => format!("lotdrift: {what} working again after {span}"),
        (_, "delivery") => {
            format!("lotdrift: {what} failing for {span}; messages wait in the outbox")
        }
        _ => format!("lotdrift: {what} stuck for {span}; files stay in the inbox"),
    };
    clean(&text)
}

/// What an operational notice asks of the reader.
fn health_advice(item: &HealthItem) -> &'static str {
    match (item.kind.as_str(), item.component.as_str()) {
        ("recovered", "delivery") => {
            "Messages queued meanwhile are being delivered now, late. The notice that \
             delivery was failing could only reach the log."
        }
        ("recovered", _) => {
            "Files that waited in the inbox are being stored now; nothing was lost."
        }
        (_, "delivery") => {
            "Messages wait in the outbox and are retried with backoff (they expire after \
             alerts.expire_hours). This notice reaches the log only, since email is what \
             fails. Check the mail server and `lotdrift alerts test-email`."
        }
        _ => {
            "Nothing is lost: the files stay in the inbox and are taken again at every scan, \
             and are stored once the cause is fixed. See `lotdrift status` for the latest \
             error."
        }
    }
}

/// The plain-text body of an operational notice.
pub fn health_body(item: &HealthItem) -> String {
    let mut s = health_subject(item);
    s.push_str("\n\n");
    let mut rows = vec![
        ("Component", component_text(&item.component).to_string()),
        ("Failing since", item.failing_since.clone()),
        ("Failures", item.failures.to_string()),
        ("Last error", clean(&item.last_error)),
    ];
    if item.kind == "recovered" {
        rows.push(("Working since", item.at.clone()));
    } else {
        rows.push(("Noticed", item.at.clone()));
    }
    for (label, value) in rows {
        s.push_str(&format!("{:<15}{value}\n", format!("{label}:")));
    }
    s.push_str(&format!(
        "\n{}\nOne notice is sent when a failure lasts longer than \
         health.notice_after_minutes, and one when it ends.\n",
        health_advice(item)
    ));
    s
}

/// An operational notice to `item.recipient`: plain text. Its Message-ID is derived from the
/// health event, the same for every attempt and recipient.
fn health_message(from: &Mailbox, item: &HealthItem) -> Result<Message, String> {
    let to: Mailbox = item
        .recipient
        .parse()
        .map_err(|e| format!("recipient {:?}: {e}", item.recipient))?;
    let stamp: String = item.at.chars().filter(char::is_ascii_digit).collect();
    Message::builder()
        .from(from.clone())
        .to(to)
        .subject(health_subject(item))
        .message_id(Some(format!(
            "<lotdrift.health-{}.{stamp}@{}>",
            item.event_id,
            from.email.domain()
        )))
        .header(ContentType::TEXT_PLAIN)
        .body(health_body(item))
        .map_err(|e| format!("cannot build message: {e}"))
}

/// Logs a notice that could not be queued (the database cannot record the streak), in the
/// same form as a queued one; `error` is the latest failure (empty for a recovery).
pub fn log_unqueued(component: Component, told: &health::Unqueued, error: &str) {
    let kind = match told.notice {
        health::Notice::Stuck => "stuck",
        health::Notice::Recovered => "recovered",
    };
    log_health(&HealthItem {
        id: 0,
        channel: "log".into(),
        recipient: "log".into(),
        attempts: 0,
        created_at: now_rfc3339(),
        event_id: 0,
        component: component.as_str().into(),
        kind: kind.into(),
        at: now_rfc3339(),
        failing_since: format_utc(told.since),
        failures: told.failures,
        last_error: if error.is_empty() {
            "(not recorded: the database could not be written)".into()
        } else {
            format!("{error} (not recorded: the database could not be written)")
        },
    });
}

fn log_health(item: &HealthItem) {
    if item.kind == "recovered" {
        tracing::info!(
            target: "lotdrift::alert",
            event = "recovered",
            component = %item.component,
            failing_since = %item.failing_since,
            failures = item.failures,
            last_error = %item.last_error,
            "{}",
            health_subject(item)
        );
    } else {
        tracing::error!(
            target: "lotdrift::alert",
            event = "stuck",
            component = %item.component,
            failing_since = %item.failing_since,
            failures = item.failures,
            last_error = %item.last_error,
            "{}",
            health_subject(item)
        );
    }
}

/// What the server said to a test message for one recipient.
#[derive(Debug, Clone)]
pub struct TestDelivery {
    pub recipient: String,
    /// The server's reply on acceptance, or the error with the reply on refusal.
    pub outcome: Result<String, String>,
}

/// Sends a test message to every configured recipient (`lotdrift alerts test-email`), one
/// attempt each, without touching the outbox.
pub async fn test_email(config: &Config) -> Result<Vec<TestDelivery>, AlertError> {
    let Some(email) = &config.alerts.email else {
        return Err(AlertError::Email(
            "no [alerts.email] section in the config: nothing to test".into(),
        ));
    };
    let mailer = Mailer::new(email)?;
    let now = now_rfc3339();
    let stamp: String = now.chars().filter(char::is_ascii_digit).collect();
    let mut out = Vec::new();
    for recipient in &email.all_recipients() {
        let outcome = match test_message(&mailer.from, recipient, email, &now, &stamp) {
            Err(e) => Err(e),
            Ok(message) => match mailer.send(message).await {
                Ok(reply) => Ok(reply),
                Err(SendError::Permanent(e) | SendError::Transient(e)) => Err(e),
            },
        };
        out.push(TestDelivery {
            recipient: recipient.clone(),
            outcome,
        });
    }
    Ok(out)
}

/// One line per recipient: accepted with the server's reply, or not, with the error and reply.
pub fn test_email_text(sent: &[TestDelivery]) -> String {
    let mut s = String::new();
    for d in sent {
        match &d.outcome {
            Ok(reply) => s.push_str(&format!(
                "{}: accepted; server replied: {reply}\n",
                d.recipient
            )),
            Err(e) => s.push_str(&format!("{}: NOT accepted: {e}\n", d.recipient)),
        }
    }
    s
}

fn test_message(
    from: &Mailbox,
    recipient: &str,
    email: &Email,
    now: &str,
    stamp: &str,
) -> Result<Message, String> {
    let to: Mailbox = recipient
        .parse()
        .map_err(|e| format!("recipient {recipient:?}: {e}"))?;
    let tls = match email.tls {
        Tls::None => "none",
        Tls::StartTls => "starttls",
        Tls::Tls => "tls",
    };
    let text = format!(
        "This is a test message from lotdrift, sent at {now} through {}:{} (tls = {tls}).\n\
         If it reached you, lotdrift can deliver its alert messages to this address.\n",
        email.smtp_host, email.smtp_port
    );
    Message::builder()
        .from(from.clone())
        .to(to)
        .subject("lotdrift: test message")
        .message_id(Some(format!(
            "<lotdrift.test.{stamp}@{}>",
            from.email.domain()
        )))
        .header(ContentType::TEXT_PLAIN)
        .body(text)
        .map_err(|e| format!("cannot build message: {e}"))
}

/// The reply of a server as one line: the code and its text.
fn reply_text(r: &Response) -> String {
    let lines: Vec<&str> = r.message().collect();
    format!("{} {}", r.code(), lines.join(" / "))
}

enum SendError {
    Permanent(String),
    Transient(String),
}

struct Mailer {
    transport: AsyncSmtpTransport<Tokio1Executor>,
    from: Mailbox,
    /// Limit of one whole SMTP exchange, connect to QUIT.
    timeout: Duration,
}

impl Mailer {
    fn new(e: &Email) -> Result<Mailer, AlertError> {
        let from: Mailbox = e
            .from
            .parse()
            .map_err(|err| AlertError::Email(format!("from {:?}: {err}", e.from)))?;
        let ca = match &e.ca_file {
            None => None,
            Some(f) => {
                let pem = std::fs::read(f)
                    .map_err(|err| AlertError::Email(format!("ca_file {}: {err}", f.display())))?;
                Some(
                    Certificate::from_pem(&pem).map_err(|err| {
                        AlertError::Email(format!("ca_file {}: {err}", f.display()))
                    })?,
                )
            }
        };
        let tls_params = || {
            let mut b = TlsParameters::builder(e.smtp_host.clone());
            if let Some(ca) = &ca {
                b = b.add_root_certificate(ca.clone());
            }
            b.build()
                .map_err(|err| AlertError::Email(format!("TLS setup for {}: {err}", e.smtp_host)))
        };
        let tls = match e.tls {
            Tls::None => LettreTls::None,
            Tls::StartTls => LettreTls::Required(tls_params()?),
            Tls::Tls => LettreTls::Wrapper(tls_params()?),
        };
        let mut builder = AsyncSmtpTransport::<Tokio1Executor>::builder_dangerous(&e.smtp_host)
            .port(e.smtp_port)
            .tls(tls)
            .timeout(Some(e.timeout));
        if let Some(user) = &e.username {
            let password = smtp_password(e)?;
            builder = builder.credentials(Credentials::new(user.clone(), password));
        }
        Ok(Mailer {
            transport: builder.build(),
            from,
            timeout: e.timeout,
        })
    }

    /// One SMTP transaction; the server's final reply on success.
    ///
    /// lettre's async client applies its timeout to the TCP connect only; a server that
    /// accepts and then stops answering would hold the drain (and `run --once`) forever. The
    /// whole exchange therefore runs under `alerts.email.timeout_seconds`, and running out of
    /// time is a transient failure (retried).
    async fn send(&self, message: Message) -> Result<String, SendError> {
        match tokio::time::timeout(self.timeout, self.transport.send(message)).await {
            Err(_) => Err(SendError::Transient(format!(
                "no complete SMTP exchange within {:?} (alerts.email.timeout_seconds)",
                self.timeout
            ))),
            Ok(Ok(reply)) => Ok(reply_text(&reply)),
            Ok(Err(e)) if e.is_permanent() => Err(SendError::Permanent(e.to_string())),
            Ok(Err(e)) => Err(SendError::Transient(e.to_string())),
        }
    }
}

fn smtp_password(e: &Email) -> Result<String, AlertError> {
    if let Ok(p) = std::env::var(PASSWORD_ENV) {
        return Ok(p);
    }
    match &e.password_file {
        Some(f) => std::fs::read_to_string(f)
            .map(|s| s.trim_end_matches(['\r', '\n']).to_string())
            .map_err(|err| AlertError::Email(format!("password_file {}: {err}", f.display()))),
        None => Err(AlertError::Email(format!(
            "username is set but no password: set {PASSWORD_ENV} or password_file"
        ))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backoff_grows_and_is_capped() {
        let i = Duration::from_secs(30);
        let m = Duration::from_secs(3600);
        let d0 = backoff(i, m, 0, 7).as_secs_f64();
        let d3 = backoff(i, m, 3, 7).as_secs_f64();
        let d20 = backoff(i, m, 20, 7).as_secs_f64();
        assert!((24.0..=36.0).contains(&d0), "{d0}");
        assert!((192.0..=288.0).contains(&d3), "{d3}");
        assert!((2880.0..=4320.0).contains(&d20), "{d20}");
    }

    #[test]
    fn control_characters_cannot_reach_headers() {
        assert_eq!(clean("alder\r\nBcc: x@y"), "alder  Bcc: x@y");
    }

    fn item(source: &str, lot: &str) -> OutboxItem {
        OutboxItem {
            id: 9,
            channel: "email".into(),
            recipient: "quality@example.org".into(),
            attempts: 0,
            created_at: "2026-03-01T08:30:00.000Z".into(),
            event_id: 17,
            event_kind: "opened".into(),
            event_at: "2026-03-01T08:30:00.000Z".into(),
            opening_lot: lot.into(),
            alert: AlertRow::example(source, lot),
        }
    }

    fn formatted(item: &OutboxItem, chart: Option<&[u8]>) -> String {
        let from: Mailbox = "lotdrift <lotdrift@example.org>".parse().unwrap();
        String::from_utf8(alert_message(&from, item, chart, None).unwrap().formatted()).unwrap()
    }

    fn headers(raw: &str) -> Vec<&str> {
        raw.split("\r\n\r\n")
            .next()
            .unwrap()
            .split("\r\n")
            .collect()
    }

    #[test]
    fn names_with_cr_lf_cannot_add_header_lines() {
        // The lot file parser refuses control characters in names, so this can only be
        // reached by a row in the database written by other means; the message must still
        // be safe.
        let evil = item("alder\r\nBcc: victim@example.net", "AC\n-Bcc: x@y");
        assert!(!subject(&evil).chars().any(char::is_control));
        let raw = formatted(&evil, None);
        let head = headers(&raw);
        assert!(
            head.iter()
                .all(|h| !h.to_ascii_lowercase().starts_with("bcc")),
            "{head:#?}"
        );
        let subject: Vec<&&str> = head.iter().filter(|h| h.starts_with("Subject:")).collect();
        assert_eq!(subject.len(), 1, "{head:#?}");
        assert!(!raw.contains("\nBcc:"), "{raw}");
    }

    #[test]
    fn the_subject_names_source_characteristic_and_direction() {
        let s = subject(&item("birchworks", "BI-023"));
        assert_eq!(
            s,
            "lotdrift: birchworks / mass_g mean shifted down in lot BI-023 (alert 4)"
        );
    }

    #[test]
    fn html_part_escapes_every_interpolated_value() {
        let html = html_body(&item("<script>alert(1)</script>", "A&B\"'"), None);
        assert!(!html.contains("<script>"), "{html}");
        assert!(
            html.contains("&lt;script&gt;alert(1)&lt;/script&gt;"),
            "{html}"
        );
        assert!(html.contains("A&amp;B&quot;&#39;"), "{html}");
        assert_eq!(escape("a<b>&\"'"), "a&lt;b&gt;&amp;&quot;&#39;");
    }

    #[test]
    fn plain_and_html_parts_carry_the_same_numbers() {
        let i = item("cedar-energy", "CE-9");
        let text = body(&i, None);
        let html = html_body(&i, None);
        for (_, value) in facts(&i, None) {
            assert!(text.contains(&value), "{value} missing in text");
            assert!(html.contains(&escape(&value)), "{value} missing in html");
        }
        assert!(text.contains("mean = 197.00"), "{text}");
        assert!(text.contains("p = 1.5e-6"), "{text}");
    }

    #[test]
    fn message_is_mixed_alternative_with_the_chart_attached() {
        let raw = formatted(
            &item("cedar-energy", "CE-9"),
            Some(b"\x89PNG\r\n\x1a\nrest"),
        );
        assert!(raw.contains("Content-Type: multipart/mixed"), "{raw}");
        assert!(raw.contains("Content-Type: multipart/alternative"), "{raw}");
        assert!(raw.contains("Content-Type: text/plain"), "{raw}");
        assert!(raw.contains("Content-Type: text/html"), "{raw}");
        assert!(raw.contains("Content-Type: image/png"), "{raw}");
        assert!(raw.contains("filename=\"lotdrift-alert-4.png\""), "{raw}");
        assert!(
            raw.contains("Message-ID: <lotdrift.event-17.20260301083000000@example.org>"),
            "{raw}"
        );
        let without = formatted(&item("cedar-energy", "CE-9"), None);
        assert!(!without.contains("image/png"));
    }

    #[test]
    fn a_message_gives_means_and_the_difference_in_the_unit_of_measure() {
        let mut i = item("cedar-energy", "CE-9");
        let text = body(&i, Some("g"));
        assert!(
            text.contains("n = 240, mean = 200.00 g, sd = 1.0000 g"),
            "{text}"
        );
        assert!(
            text.contains("-3.0000 g (lot − baseline), 95 % interval [-3.7000 g, -2.3000 g]"),
            "{text}"
        );
        assert!(html_body(&i, Some("g")).contains("mean = 197.00 g"));
        assert!(!body(&i, None).contains(" g"), "without a unit");
        // A spread alert's difference is a ratio; a log-scale alert's numbers are of ln(value).
        i.alert.kind = "spread".into();
        let text = body(&i, Some("g"));
        assert!(text.contains("mean = 200.00 g"), "{text}");
        assert!(text.contains("-3.0000 (lot − baseline)"), "{text}");
        i.alert.kind = "mean".into();
        i.alert.note = Some(crate::engine::log_scale_note().to_string());
        assert!(!body(&i, Some("g")).contains(" g,"));
    }

    #[test]
    fn an_f_tests_message_gives_both_dfs_and_numbers_as_people_write_them() {
        let mut i = item("cedar-energy", "CE-9");
        i.alert.test = "f-variance".into();
        i.alert.df = Some(9.0);
        i.alert.df2 = Some(620.0);
        i.alert.p_value = Some(0.000123);
        let text = body(&i, None);
        assert!(text.contains("df = 9 and 620"), "{text}");
        assert!(text.contains("p = 0.00012"), "{text}");
        assert!(!text.contains("e-4") && !text.contains("000000"), "{text}");
        i.alert.p_value = Some(1e-14);
        assert!(body(&i, None).contains("p < 1e-9"));
    }

    fn silence_item(kind: &str, basis: &str) -> SilenceItem {
        let learned = basis == "learned";
        SilenceItem {
            id: 3,
            channel: "email".into(),
            recipient: "quality@example.org".into(),
            attempts: 0,
            created_at: "2026-03-21T08:00:00.000Z".into(),
            event_id: 6,
            event_kind: kind.into(),
            event_at: "2026-03-21T08:00:00.000Z".into(),
            silence: crate::store::SilenceRow {
                id: 2,
                source: "alder\r\nBcc: x@y".into(),
                opened_at: "2026-03-21T08:00:00.000Z".into(),
                last_lot: "AL-010".into(),
                last_lot_at: "2026-03-01T08:00:00.000Z".into(),
                threshold_days: if learned { 3.0 } else { 2.0 },
                basis: basis.into(),
                intervals: learned.then_some(9),
                median_days: learned.then_some(1.0),
                resolved_at: (kind == "resolved").then(|| "2026-03-25T09:00:00.000Z".into()),
                resolving_lot: (kind == "resolved").then(|| "AL-011".into()),
                resolving_lot_at: (kind == "resolved").then(|| "2026-03-25T06:00:00.000Z".into()),
            },
        }
    }

    #[test]
    fn silence_subjects_say_how_long_and_how_usual_without_control_characters() {
        assert_eq!(
            silence_subject(&silence_item("opened", "learned")),
            "lotdrift: no lots from alder  Bcc: x@y for 20 days (usually every 1 day)"
        );
        assert_eq!(
            silence_subject(&silence_item("opened", "configured")),
            "lotdrift: no lots from alder  Bcc: x@y for 20 days (expected within 2 days)"
        );
        assert_eq!(
            silence_subject(&silence_item("resolved", "learned")),
            "lotdrift: lots from alder  Bcc: x@y again (lot AL-011)"
        );
        assert_eq!(days_text(2.54), "2.5 days");
    }

    #[test]
    fn silence_bodies_name_the_lots_and_how_the_threshold_was_set() {
        let opened = silence_body(&silence_item("opened", "learned"));
        for needle in [
            "Last lot:     AL-010 (lot time 2026-03-01T08:00:00.000Z)",
            "Silent for:   20 days as of 2026-03-21T08:00:00.000Z",
            "Threshold:    3 days, learned from the source's last 9 intervals",
        ] {
            assert!(opened.contains(needle), "{needle} missing in {opened}");
        }
        let configured = silence_body(&silence_item("opened", "configured_for_source"));
        assert!(
            configured.contains("monitor.silence_days_by_source"),
            "{configured}"
        );
        let resolved = silence_body(&silence_item("resolved", "learned"));
        for needle in [
            "New lot:      AL-011 (lot time 2026-03-25T06:00:00.000Z)",
            "Gap:          23.9 days",
            "resolved 2026-03-25T09:00:00.000Z",
        ] {
            assert!(resolved.contains(needle), "{needle} missing in {resolved}");
        }
        let from: Mailbox = "lotdrift <lotdrift@example.org>".parse().unwrap();
        let raw = silence_message(&from, &silence_item("opened", "learned")).unwrap();
        let raw = String::from_utf8(raw.formatted()).unwrap();
        assert!(
            raw.contains("Message-ID: <lotdrift.silence-6.20260321080000000@example.org>"),
            "{raw}"
        );
        assert!(!raw.contains("\r\nBcc:"), "{raw}");
    }

    fn health_item(component: &str, kind: &str) -> HealthItem {
        HealthItem {
            id: 5,
            channel: "email".into(),
            recipient: "quality@example.org".into(),
            attempts: 0,
            created_at: "2026-03-01T08:40:00.000Z".into(),
            event_id: 2,
            component: component.into(),
            kind: kind.into(),
            at: "2026-03-01T08:40:00.000Z".into(),
            failing_since: "2026-03-01T08:05:00.000Z".into(),
            failures: 12,
            last_error: "cannot move a\r\nBcc: x@y".into(),
        }
    }

    #[test]
    fn health_subjects_say_what_is_stuck_for_how_long_and_what_waits() {
        assert_eq!(
            health_subject(&health_item("ingest", "stuck")),
            "lotdrift: ingest stuck for 35 min; files stay in the inbox"
        );
        assert_eq!(
            health_subject(&health_item("delivery", "stuck")),
            "lotdrift: email delivery failing for 35 min; messages wait in the outbox"
        );
        assert_eq!(
            health_subject(&health_item("delivery", "recovered")),
            "lotdrift: email delivery working again after 35 min"
        );
        assert_eq!(span_text(40.0), "40 s");
        assert_eq!(span_text(9000.0), "2.5 h");
        assert_eq!(span_text(3.0 * 86_400.0), "3.0 days");
    }

    #[test]
    fn health_messages_carry_the_streak_and_a_stable_message_id() {
        let item = health_item("ingest", "stuck");
        let body = health_body(&item);
        for needle in [
            "Failing since: 2026-03-01T08:05:00.000Z",
            "Failures:      12",
            "Last error:    cannot move a  Bcc: x@y",
            "stay in the inbox",
        ] {
            assert!(body.contains(needle), "{needle} missing in {body}");
        }
        let from: Mailbox = "lotdrift <lotdrift@example.org>".parse().unwrap();
        let raw = String::from_utf8(health_message(&from, &item).unwrap().formatted()).unwrap();
        assert!(
            raw.contains("Message-ID: <lotdrift.health-2.20260301084000000@example.org>"),
            "{raw}"
        );
        assert!(!raw.contains("\r\nBcc:"), "{raw}");
    }
}
