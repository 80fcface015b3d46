//! Alert delivery: drains the outbox through the configured channels.
//!
//! The engine writes one outbox row per channel and recipient in the same transaction that
//! decides an alert event; this module delivers them and records every attempt. The log
//! channel writes one structured tracing event per message. The email channel talks SMTP
//! (lettre over tokio, rustls; never OpenSSL): a refused connection, a timeout or a 4xx reply
//! is retried with exponential backoff and jitter, a 5xx is recorded as failed with the
//! server's reply, and a message older than `alerts.expire_hours` is marked expired, never
//! silently dropped. Only this module knows SMTP. The SMTP password comes from
//! `LOTDRIFT_SMTP_PASSWORD` or `alerts.email.password_file` and is never logged.

use std::sync::Arc;
use std::time::Duration;

use chrono::Utc;
use lettre::message::{Mailbox, header::ContentType};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Tls as LettreTls, TlsParameters};
use lettre::{AsyncSmtpTransport, AsyncTransport, Message, Tokio1Executor};
use tokio::sync::Notify;
use tokio_util::sync::CancellationToken;

use crate::config::{Config, Email, Tls};
use crate::store::{AlertRow, DeliveryOutcome, OutboxItem, Store, StoreError};
use crate::time::{format_utc, now_rfc3339, parse_utc};

/// The environment variable that carries the SMTP password.
pub const PASSWORD_ENV: &str = "LOTDRIFT_SMTP_PASSWORD";

#[derive(Debug, thiserror::Error)]
pub enum AlertError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("alerts.email: {0}")]
    Email(String),
}

/// Counts of one drain.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct DrainReport {
    pub delivered: usize,
    pub retrying: usize,
    pub failed: usize,
    pub expired: usize,
}

/// Delivers every message due now, once each. Returns what happened.
pub async fn drain_once(store: &Store, config: &Config) -> Result<DrainReport, AlertError> {
    let mut report = DrainReport::default();
    let mailer = match &config.alerts.email {
        Some(e) => Some(Mailer::new(e)?),
        None => None,
    };
    loop {
        let now = now_rfc3339();
        let due = store.due_outbox(&now, 100).await?;
        if due.is_empty() {
            break;
        }
        let batch = due.len();
        for item in due {
            let outcome = deliver(&item, config, mailer.as_ref()).await;
            match &outcome {
                DeliveryOutcome::Delivered => report.delivered += 1,
                DeliveryOutcome::Retry { error, next_at } => {
                    tracing::warn!(channel = %item.channel, recipient = %item.recipient, %error, %next_at, "delivery failed; will retry");
                    report.retrying += 1;
                }
                DeliveryOutcome::Failed { error } => {
                    tracing::error!(channel = %item.channel, recipient = %item.recipient, %error, "delivery failed permanently");
                    report.failed += 1;
                }
                DeliveryOutcome::Expired { error } => {
                    tracing::error!(channel = %item.channel, recipient = %item.recipient, %error, "message expired undelivered");
                    report.expired += 1;
                }
            }
            store
                .outbox_attempted(item.id, &outcome, &now_rfc3339())
                .await?;
        }
        if batch < 100 {
            break;
        }
    }
    Ok(report)
}

/// Drains the outbox whenever `wake` is notified, and at least every `poll`, until cancelled.
pub async fn run(
    store: Arc<Store>,
    config: Arc<Config>,
    wake: Arc<Notify>,
    cancel: CancellationToken,
) {
    let poll = Duration::from_secs(5);
    loop {
        match drain_once(&store, &config).await {
            Ok(_) => {}
            Err(e) => tracing::error!(error = %e, "outbox drain failed"),
        }
        tokio::select! {
            _ = cancel.cancelled() => return,
            _ = wake.notified() => {}
            _ = tokio::time::sleep(poll) => {}
        }
    }
}

async fn deliver(item: &OutboxItem, config: &Config, mailer: Option<&Mailer>) -> DeliveryOutcome {
    match item.channel.as_str() {
        "log" => {
            log_event(item);
            DeliveryOutcome::Delivered
        }
        "email" => {
            let Some(mailer) = mailer else {
                return retry_or_expire(
                    item,
                    config,
                    "no [alerts.email] section configured".into(),
                );
            };
            match mailer.send(item).await {
                Ok(()) => DeliveryOutcome::Delivered,
                Err(SendError::Permanent(error)) => DeliveryOutcome::Failed { error },
                Err(SendError::Transient(error)) => retry_or_expire(item, config, error),
            }
        }
        other => DeliveryOutcome::Failed {
            error: format!("unknown channel {other:?}"),
        },
    }
}

fn retry_or_expire(item: &OutboxItem, config: &Config, error: String) -> DeliveryOutcome {
    let now = Utc::now();
    let age = parse_utc(&item.created_at)
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

fn fmt_opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.6}"))
}

/// The plain-text body of an alert message.
pub fn body(item: &OutboxItem) -> String {
    let a = &item.alert;
    let mut s = String::new();
    s.push_str(&subject(item));
    s.push_str("\n\n");
    s.push_str(&format!("Source:          {}\n", clean(&a.source)));
    s.push_str(&format!("Characteristic:  {}\n", clean(&a.characteristic)));
    s.push_str(&format!(
        "Lot:             {} (sampled {})\n",
        clean(&a.lot),
        a.lot_sampled_at.as_deref().unwrap_or("-")
    ));
    s.push_str(&format!(
        "Baseline:        n = {}, mean = {:.6}, sd = {}\n",
        a.baseline_n,
        a.baseline_mean,
        fmt_opt(a.baseline_sd)
    ));
    s.push_str(&format!(
        "This lot:        n = {}, mean = {:.6}, sd = {}\n",
        a.lot_n,
        a.lot_mean,
        fmt_opt(a.lot_sd)
    ));
    if let (Some(e), Some([lo, hi])) = (a.estimate, a.ci) {
        s.push_str(&format!(
            "Difference:      {e:.6} (lot − baseline), 95 % interval [{lo:.6}, {hi:.6}]\n"
        ));
    }
    s.push_str(&format!(
        "Test:            {} ({}), t = {}, df = {}, p = {}\n",
        a.test,
        a.alternative,
        fmt_opt(a.statistic),
        fmt_opt(a.df),
        a.p_value.map_or("-".into(), |p| format!("{p:.3e}"))
    ));
    s.push_str(&format!(
        "Adjusted:        p = {} ({} over {} test(s) of this lot, level {})\n",
        a.p_adjusted.map_or("-".into(), |p| format!("{p:.3e}")),
        a.method,
        a.family_size,
        a.level
    ));
    s.push_str(&format!(
        "Alert:           {} ({}), opened {}\n",
        a.id, a.state, a.opened_at
    ));
    s.push_str(
        "\nThis is a statistical signal to support incoming inspection and the engineer's \
         judgment, not a verdict on conformance.\n",
    );
    s
}

enum SendError {
    Permanent(String),
    Transient(String),
}

struct Mailer {
    transport: AsyncSmtpTransport<Tokio1Executor>,
    from: Mailbox,
}

impl Mailer {
    fn new(e: &Email) -> Result<Mailer, AlertError> {
        let from: Mailbox = e
            .from
            .parse()
            .map_err(|err| AlertError::Email(format!("from {:?}: {err}", e.from)))?;
        let tls_params = || {
            TlsParameters::new(e.smtp_host.clone())
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
        })
    }

    async fn send(&self, item: &OutboxItem) -> Result<(), SendError> {
        let to: Mailbox = item
            .recipient
            .parse()
            .map_err(|e| SendError::Permanent(format!("recipient {:?}: {e}", item.recipient)))?;
        let message = Message::builder()
            .from(self.from.clone())
            .to(to)
            .subject(subject(item))
            .message_id(Some(format!(
                "<lotdrift.event-{}.{}@{}>",
                item.event_id,
                item.event_at
                    .chars()
                    .filter(char::is_ascii_digit)
                    .collect::<String>(),
                self.from.email.domain()
            )))
            .header(ContentType::TEXT_PLAIN)
            .body(body(item))
            .map_err(|e| SendError::Permanent(format!("cannot build message: {e}")))?;
        match self.transport.send(message).await {
            Ok(_) => Ok(()),
            Err(e) if e.is_permanent() => Err(SendError::Permanent(e.to_string())),
            Err(e) => Err(SendError::Transient(e.to_string())),
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
}
