//! The daily digest: once a day, at `alerts.digest.at` local time, every recipient is sent a
//! summary of the open alerts they receive (the default list gets all of them; a per-source or
//! per-characteristic list gets its own).
//!
//! Scheduling is stateless apart from the store: the digest of a local day is made when the
//! notifier (or `run --once`) finds that day's scheduled time passed, no digest of that day or
//! a later one exists, and the time passed less than [`LATE_LIMIT`] ago. So a daemon that was
//! down at the scheduled time sends the digest when it is back (the same day), a restart never
//! sends a second one, and days missed entirely are skipped, not sent in a burst. The digest
//! row and its outbox rows are written in one transaction; delivery, retries and expiry are
//! the outbox's (`alert::drain_once`).
//!
//! Owns the schedule ([`latest_slot`], [`schedule_if_due`]), who gets what ([`plan`]) and the
//! message text ([`subject`], [`body`], [`html_body`]).

use chrono::{DateTime, Local, NaiveDate, NaiveTime, TimeZone, Utc};

use crate::alert::clean;
use crate::config::{Channel, Config};
use crate::page::escape;
use crate::store::{AlertRow, DigestItem, NewDigestMessage, Store, StoreError};
use crate::time::format_utc;

/// A digest is still sent this long after its scheduled time (a daemon that was down); later
/// it is skipped.
pub const LATE_LIMIT: chrono::TimeDelta = chrono::TimeDelta::hours(12);

/// The latest scheduled digest time at or before `now`: its local date and the instant.
///
/// A local time that does not exist that day (the clock jumped forward over it) is taken as
/// the first existing minute after it; one that occurs twice (the clock went back) as the
/// first occurrence.
pub fn latest_slot<Tz: TimeZone>(now: &DateTime<Tz>, at: NaiveTime) -> (NaiveDate, DateTime<Utc>) {
    let tz = now.timezone();
    let today = now.date_naive();
    let slot_of = |date: NaiveDate| -> DateTime<Utc> {
        let mut local = date.and_time(at);
        // A gap lasts at most a few hours; step over it minute by minute.
        for _ in 0..(24 * 60) {
            if let Some(t) = tz.from_local_datetime(&local).earliest() {
                return t.with_timezone(&Utc);
            }
            local += chrono::TimeDelta::minutes(1);
        }
        // No local time at all that day (cannot happen with real zones): midnight UTC.
        date.and_time(NaiveTime::MIN).and_utc()
    };
    let now_utc = now.with_timezone(&Utc);
    let slot = slot_of(today);
    if slot <= now_utc {
        (today, slot)
    } else {
        let yesterday = today.pred_opt().unwrap_or(today);
        (yesterday, slot_of(yesterday))
    }
}

/// The slot to make a digest for now, if one is due: its scheduled time passed less than
/// [`LATE_LIMIT`] ago and the newest digest made is for an earlier day.
pub fn due_slot<Tz: TimeZone>(
    now: &DateTime<Tz>,
    at: NaiveTime,
    latest_made: Option<&str>,
) -> Option<(NaiveDate, DateTime<Utc>)> {
    let (date, slot) = latest_slot(now, at);
    let late = now.with_timezone(&Utc) - slot;
    let made = latest_made.and_then(|d| NaiveDate::parse_from_str(d, "%Y-%m-%d").ok());
    (late < LATE_LIMIT && made.is_none_or(|m| m < date)).then_some((date, slot))
}

/// Who is sent what: per channel and recipient, the ids of the open alerts listed. The log
/// channel lists every open alert; an email recipient the alerts it receives
/// (`Email::recipients_for`). Recipients with nothing to list are left out unless
/// `when_empty`.
pub fn plan(config: &Config, open: &[AlertRow], when_empty: bool) -> Vec<NewDigestMessage> {
    let mut out = Vec::new();
    for channel in &config.alerts.channels {
        match channel {
            Channel::Log => out.push(NewDigestMessage {
                channel: "log".into(),
                recipient: "log".into(),
                alert_ids: open.iter().map(|a| a.id).collect(),
            }),
            Channel::Email => {
                let Some(email) = &config.alerts.email else {
                    continue;
                };
                // Each alert's recipients once, then each address's alerts in that order.
                let mut listed: std::collections::HashMap<String, Vec<i64>> =
                    std::collections::HashMap::new();
                for a in open {
                    for r in email.recipients_for(&a.source, &a.characteristic) {
                        listed
                            .entry(r.trim().to_lowercase())
                            .or_default()
                            .push(a.id);
                    }
                }
                for address in email.all_recipients() {
                    let alert_ids = listed
                        .remove(&address.trim().to_lowercase())
                        .unwrap_or_default();
                    out.push(NewDigestMessage {
                        channel: "email".into(),
                        recipient: address,
                        alert_ids,
                    });
                }
            }
        }
    }
    out.retain(|m| when_empty || !m.alert_ids.is_empty());
    out
}

/// Makes today's digest if it is due (see the module documentation). Returns the number of
/// messages queued, or `None` when no digest was due.
pub async fn schedule_if_due(store: &Store, config: &Config) -> Result<Option<usize>, StoreError> {
    let Some(digest) = config.alerts.digest else {
        return Ok(None);
    };
    let now = Local::now();
    let latest = store.latest_digest_date().await?;
    let Some((date, slot)) = due_slot(&now, digest.at, latest.as_deref()) else {
        return Ok(None);
    };
    let mut open = store.alerts(true).await?;
    open.reverse(); // oldest first
    let messages = plan(config, &open, digest.when_empty);
    let local_date = date.format("%Y-%m-%d").to_string();
    let made = store
        .create_digest(
            &local_date,
            &format_utc(slot),
            &format_utc(now.with_timezone(&Utc)),
            open.len() as i64,
            &messages,
        )
        .await?;
    if !made {
        return Ok(None);
    }
    tracing::info!(
        date = %local_date,
        open_alerts = open.len(),
        messages = messages.len(),
        "daily digest queued"
    );
    Ok(Some(messages.len()))
}

fn direction(a: &AlertRow) -> &'static str {
    match (a.kind.as_str(), a.estimate) {
        ("spread", _) => "spread up",
        (_, Some(e)) if e > 0.0 => "mean up",
        (_, Some(e)) if e < 0.0 => "mean down",
        _ => "mean",
    }
}

/// The subject of a digest message.
pub fn subject(item: &DigestItem) -> String {
    let n = item.alerts.len();
    clean(&format!(
        "lotdrift digest {}: {}",
        item.local_date,
        match n {
            0 => "no open alerts".to_string(),
            1 => "1 open alert".to_string(),
            n => format!("{n} open alerts"),
        }
    ))
}

/// One row per listed alert: (alert id, source, characteristic, shift, opened, opening lot,
/// significant lots, acknowledged). Names are cleaned of control characters.
pub fn rows(item: &DigestItem) -> Vec<[String; 8]> {
    item.alerts
        .iter()
        .map(|a| {
            [
                a.id.to_string(),
                clean(&a.source),
                clean(&a.characteristic),
                direction(a).to_string(),
                a.opened_at.clone(),
                clean(&a.lot),
                a.lots.to_string(),
                a.acknowledged.as_ref().map_or_else(
                    || "no".to_string(),
                    |k| clean(&format!("{} ({})", k.by, k.at)),
                ),
            ]
        })
        .collect()
}

const HEADERS: [&str; 8] = [
    "alert",
    "source",
    "characteristic",
    "shift",
    "opened",
    "opened by lot",
    "lots",
    "acknowledged",
];

const FOOTER: &str = "Details: `lotdrift alerts --open` and `lotdrift history SOURCE`. A statistical \
                      signal supports incoming inspection and the engineer's judgment; no open \
                      alert is no proof of conformance.";

/// The plain-text body of a digest message.
pub fn body(item: &DigestItem) -> String {
    let mut s = subject(item);
    s.push_str("\n\n");
    let rows = rows(item);
    if rows.is_empty() {
        s.push_str("No alert you receive is open.\n");
    } else {
        let mut widths = HEADERS.map(|h| h.chars().count());
        for r in &rows {
            for (w, v) in widths.iter_mut().zip(r) {
                *w = (*w).max(v.chars().count());
            }
        }
        let line = |cells: &[String]| -> String {
            let mut l = String::new();
            for (i, (c, w)) in cells.iter().zip(widths).enumerate() {
                if i > 0 {
                    l.push_str("  ");
                }
                l.push_str(c);
                l.push_str(&" ".repeat(w - c.chars().count()));
            }
            format!("{}\n", l.trim_end())
        };
        s.push_str(&line(&HEADERS.map(String::from)));
        for r in &rows {
            s.push_str(&line(r));
        }
    }
    s.push('\n');
    s.push_str(FOOTER);
    s.push('\n');
    s
}

/// The HTML body of a digest message: the same rows in a table, every value escaped.
pub fn html_body(item: &DigestItem) -> String {
    let mut s = String::from(
        "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"></head>\n\
         <body style=\"font-family: sans-serif\">\n",
    );
    s.push_str(&format!("<h3>{}</h3>\n", escape(&subject(item))));
    let rows = rows(item);
    if rows.is_empty() {
        s.push_str("<p>No alert you receive is open.</p>\n");
    } else {
        s.push_str("<table cellpadding=\"4\" style=\"border-collapse: collapse\">\n<tr>");
        for h in HEADERS {
            s.push_str(&format!(
                "<th align=\"left\" style=\"border-bottom: 1px solid #999\">{}</th>",
                escape(h)
            ));
        }
        s.push_str("</tr>\n");
        for r in &rows {
            s.push_str("<tr>");
            for v in r {
                s.push_str(&format!(
                    "<td style=\"border-bottom: 1px solid #ddd\">{}</td>",
                    escape(v)
                ));
            }
            s.push_str("</tr>\n");
        }
        s.push_str("</table>\n");
    }
    s.push_str(&format!("<p><small>{}</small></p>\n", escape(FOOTER)));
    s.push_str("</body></html>\n");
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::FixedOffset;

    fn at(h: u32, m: u32) -> NaiveTime {
        NaiveTime::from_hms_opt(h, m, 0).unwrap()
    }

    fn local(offset_hours: i32, text: &str) -> DateTime<FixedOffset> {
        let tz = FixedOffset::east_opt(offset_hours * 3600).unwrap();
        tz.from_local_datetime(
            &chrono::NaiveDateTime::parse_from_str(text, "%Y-%m-%d %H:%M").unwrap(),
        )
        .unwrap()
    }

    #[test]
    fn the_slot_is_today_once_the_time_passed_else_yesterday() {
        let now = local(2, "2026-03-10 07:30");
        let (d, slot) = latest_slot(&now, at(7, 30));
        assert_eq!(d.to_string(), "2026-03-10");
        assert_eq!(format_utc(slot), "2026-03-10T05:30:00.000Z");
        let (d, slot) = latest_slot(&local(2, "2026-03-10 07:29"), at(7, 30));
        assert_eq!(d.to_string(), "2026-03-09");
        assert_eq!(format_utc(slot), "2026-03-09T05:30:00.000Z");
        // The local date counts, not the UTC one.
        let (d, _) = latest_slot(&local(-8, "2026-03-10 23:00"), at(22, 0));
        assert_eq!(d.to_string(), "2026-03-10");
    }

    #[test]
    fn due_once_per_day_late_up_to_the_limit_and_never_for_missed_days() {
        let t = at(7, 30);
        assert!(due_slot(&local(0, "2026-03-10 07:29"), t, Some("2026-03-09")).is_none());
        let (d, _) = due_slot(&local(0, "2026-03-10 07:30"), t, Some("2026-03-09")).unwrap();
        assert_eq!(d.to_string(), "2026-03-10");
        assert!(due_slot(&local(0, "2026-03-10 09:00"), t, Some("2026-03-10")).is_none());
        // Down at 07:30, back at 19:00: sent late. Back at 19:31: skipped.
        assert!(due_slot(&local(0, "2026-03-10 19:00"), t, Some("2026-03-09")).is_some());
        assert!(due_slot(&local(0, "2026-03-10 19:31"), t, Some("2026-03-09")).is_none());
        // First run ever.
        assert!(due_slot(&local(0, "2026-03-10 08:00"), t, None).is_some());
        // Yesterday's slot is still within the limit just after midnight.
        let (d, _) =
            due_slot(&local(0, "2026-03-11 00:10"), at(23, 0), Some("2026-03-09")).unwrap();
        assert_eq!(d.to_string(), "2026-03-10");
        // A clock set back behind the newest digest makes no second one.
        assert!(due_slot(&local(0, "2026-03-10 08:00"), t, Some("2026-03-11")).is_none());
    }

    /// A zone with a clock change each way in 2026, like central Europe's (UTC+1 in winter,
    /// UTC+2 from 29 March 01:00 UTC to 25 October 01:00 UTC): local 02:00–03:00 is skipped
    /// on 29 March and occurs twice on 25 October.
    #[derive(Debug, Clone, Copy)]
    struct TwoStep;

    impl TwoStep {
        fn offset_at(utc: &chrono::NaiveDateTime) -> FixedOffset {
            let spring = chrono::NaiveDate::from_ymd_opt(2026, 3, 29)
                .unwrap()
                .and_hms_opt(1, 0, 0)
                .unwrap();
            let autumn = chrono::NaiveDate::from_ymd_opt(2026, 10, 25)
                .unwrap()
                .and_hms_opt(1, 0, 0)
                .unwrap();
            let hours = if *utc >= spring && *utc < autumn {
                2
            } else {
                1
            };
            FixedOffset::east_opt(hours * 3600).unwrap()
        }
    }

    impl TimeZone for TwoStep {
        type Offset = FixedOffset;

        fn from_offset(_: &FixedOffset) -> Self {
            TwoStep
        }

        fn offset_from_local_date(&self, local: &NaiveDate) -> chrono::LocalResult<FixedOffset> {
            self.offset_from_local_datetime(&local.and_time(NaiveTime::MIN))
        }

        fn offset_from_local_datetime(
            &self,
            local: &chrono::NaiveDateTime,
        ) -> chrono::LocalResult<FixedOffset> {
            let valid: Vec<FixedOffset> = [2, 1]
                .into_iter()
                .map(|h| FixedOffset::east_opt(h * 3600).unwrap())
                .filter(|o| Self::offset_at(&(*local - *o)) == *o)
                .collect();
            match valid[..] {
                [] => chrono::LocalResult::None,
                [o] => chrono::LocalResult::Single(o),
                [early, late] => chrono::LocalResult::Ambiguous(early, late),
                _ => unreachable!(),
            }
        }

        fn offset_from_utc_date(&self, utc: &NaiveDate) -> FixedOffset {
            Self::offset_at(&utc.and_time(NaiveTime::MIN))
        }

        fn offset_from_utc_datetime(&self, utc: &chrono::NaiveDateTime) -> FixedOffset {
            Self::offset_at(utc)
        }
    }

    fn two_step(text: &str) -> DateTime<TwoStep> {
        TwoStep
            .from_local_datetime(
                &chrono::NaiveDateTime::parse_from_str(text, "%Y-%m-%d %H:%M").unwrap(),
            )
            .earliest()
            .unwrap()
    }

    #[test]
    fn a_skipped_local_time_fires_at_the_first_minute_after_and_a_repeated_one_once() {
        // 02:30 does not exist on 29 March: the first existing minute is 03:00 (+2) = 01:00 UTC.
        let (d, slot) = latest_slot(&two_step("2026-03-29 12:00"), at(2, 30));
        assert_eq!(d.to_string(), "2026-03-29");
        assert_eq!(format_utc(slot), "2026-03-29T01:00:00.000Z");
        // 02:30 occurs twice on 25 October: the first (+2) = 00:30 UTC.
        let (d, slot) = latest_slot(&two_step("2026-10-25 12:00"), at(2, 30));
        assert_eq!(d.to_string(), "2026-10-25");
        assert_eq!(format_utc(slot), "2026-10-25T00:30:00.000Z");
        // Between the two occurrences the day's digest is due once; at the second 02:40 (+1)
        // it is already made.
        let first = two_step("2026-10-25 02:40");
        assert!(due_slot(&first, at(2, 30), Some("2026-10-24")).is_some());
        let second = first + chrono::TimeDelta::hours(1);
        assert_eq!(second.format("%H:%M").to_string(), "02:40");
        assert!(due_slot(&second, at(2, 30), Some("2026-10-25")).is_none());
        // Ordinary days either side keep their offsets.
        let (_, slot) = latest_slot(&two_step("2026-03-28 12:00"), at(7, 30));
        assert_eq!(format_utc(slot), "2026-03-28T06:30:00.000Z");
        let (_, slot) = latest_slot(&two_step("2026-03-30 12:00"), at(7, 30));
        assert_eq!(format_utc(slot), "2026-03-30T05:30:00.000Z");
    }
}
