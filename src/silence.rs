//! The silence watch: a source that has sent no lot for longer than it usually does is news.
//!
//! A source's lot times are its lots' sampling times (the arrival time where a lot has none);
//! its silence runs from its last lot time to now. The expected gap is configured
//! (`monitor.silence_days`, `monitor.silence_days_by_source`) or learned from the source's
//! own intervals between consecutive distinct lot times of its last [`HISTORY_LOTS`] lots (its
//! current cadence, read at a cost that does not grow with the history), from
//! [`MIN_INTERVALS`] intervals on:
//! the largest of [`MEDIAN_FACTOR`] × their median, [`RECENT_FACTOR`] × the largest of the
//! last [`RECENT_INTERVALS`], and [`MIN_THRESHOLD_DAYS`]. A source without enough lots and
//! without a configured gap is not watched.
//!
//! Owns the rule ([`learned_threshold`], [`threshold`], [`is_silent`]), what one check decides
//! ([`plan`]) and the check itself ([`check`]): a silence is opened once (the open row in the
//! store is the state, so a restart sends nothing twice) and resolved when a lot with a later
//! lot time is stored; each with its outbox rows in the same transaction. Never formats or
//! delivers messages (`alert` does) and never speaks SQL (`store` does).

use chrono::{DateTime, Utc};

use crate::config::{Config, Monitor, SilenceWatch};
use crate::store::{NewSilence, OpenSilence, SilenceEnd, SourceLots, Store, StoreError};
use crate::time::{format_utc, parse_utc};

/// Lots per source (most recent first) whose times the learned threshold looks at.
pub const HISTORY_LOTS: usize = 201;
/// Intervals needed to learn a source's threshold (that is, 8 distinct lot times).
pub const MIN_INTERVALS: usize = 7;
/// The learned threshold is at least this many times the median interval.
pub const MEDIAN_FACTOR: f64 = 3.0;
/// The learned threshold is at least this many times the largest recent interval.
pub const RECENT_FACTOR: f64 = 1.5;
/// Recent intervals: the last this many.
pub const RECENT_INTERVALS: usize = 20;
/// The learned threshold is at least one day.
pub const MIN_THRESHOLD_DAYS: f64 = 1.0;

const SECONDS_PER_DAY: f64 = 86_400.0;

#[derive(Debug, thiserror::Error)]
pub enum SilenceError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("source {name:?}: stored lot time {value:?} is not an RFC 3339 time")]
    LotTime { name: String, value: String },
}

/// How a threshold was set.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Basis {
    /// From the source's lot intervals: how many, and their median in days.
    Learned { intervals: usize, median_days: f64 },
    /// `monitor.silence_days`.
    Configured,
    /// `monitor.silence_days_by_source`.
    ConfiguredForSource,
}

impl Basis {
    /// The stored name (`silence.basis`).
    pub fn as_str(self) -> &'static str {
        match self {
            Basis::Learned { .. } => "learned",
            Basis::Configured => "configured",
            Basis::ConfiguredForSource => "configured_for_source",
        }
    }
}

/// The longest gap between lots of a source that is not yet news, in days.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Threshold {
    pub days: f64,
    pub basis: Basis,
}

/// Intervals in days between consecutive times (ascending, distinct).
pub fn intervals_days(times: &[DateTime<Utc>]) -> Vec<f64> {
    times
        .windows(2)
        .map(|w| (w[1] - w[0]).as_seconds_f64() / SECONDS_PER_DAY)
        .collect()
}

fn median(values: &[f64]) -> f64 {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let mid = v.len() / 2;
    if v.len() % 2 == 1 {
        v[mid]
    } else {
        (v[mid - 1] + v[mid]) / 2.0
    }
}

/// The threshold learned from a source's intervals (days, oldest first), or `None` with fewer
/// than [`MIN_INTERVALS`].
pub fn learned_threshold(intervals: &[f64]) -> Option<Threshold> {
    if intervals.len() < MIN_INTERVALS {
        return None;
    }
    let median_days = median(intervals);
    let recent = &intervals[intervals.len().saturating_sub(RECENT_INTERVALS)..];
    let largest = recent.iter().copied().fold(0.0, f64::max);
    let days = (MEDIAN_FACTOR * median_days)
        .max(RECENT_FACTOR * largest)
        .max(MIN_THRESHOLD_DAYS);
    Some(Threshold {
        days,
        basis: Basis::Learned {
            intervals: intervals.len(),
            median_days,
        },
    })
}

/// A source's threshold: configured for the source, else configured for all, else learned.
pub fn threshold(watch: &SilenceWatch, source: &str, intervals: &[f64]) -> Option<Threshold> {
    if let Some(&days) = watch.days_by_source.get(source) {
        return Some(Threshold {
            days,
            basis: Basis::ConfiguredForSource,
        });
    }
    match watch.days {
        Some(days) => Some(Threshold {
            days,
            basis: Basis::Configured,
        }),
        None => learned_threshold(intervals),
    }
}

/// True when more than `threshold_days` passed from `last` to `now`.
pub fn is_silent(last: DateTime<Utc>, now: DateTime<Utc>, threshold_days: f64) -> bool {
    (now - last).as_seconds_f64() > threshold_days * SECONDS_PER_DAY
}

/// What one check decides: silences to resolve, silences to open.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Plan {
    pub resolve: Vec<SilenceEnd>,
    pub open: Vec<NewSilence>,
}

/// Decides, for every watched source, whether its open silence ends (a lot time later than
/// the silence's last lot time) and whether a silence opens (silent past its threshold and
/// none open after the resolutions). `recipients` names who is told about a source.
pub fn plan(
    monitor: &Monitor,
    sources: &[SourceLots],
    open: &[OpenSilence],
    now: DateTime<Utc>,
    recipients: impl Fn(&str) -> Vec<(String, String)>,
) -> Result<Plan, SilenceError> {
    let mut out = Plan::default();
    for s in sources {
        let still_open = match open.iter().find(|o| o.source_id == s.source_id) {
            Some(o) if s.last.at > o.last_lot_at => {
                out.resolve.push(SilenceEnd {
                    silence_id: o.id,
                    lot: s.last.clone(),
                    recipients: recipients(&s.source),
                });
                false
            }
            Some(_) => true,
            None => false,
        };
        let watched = monitor.sources.is_empty() || monitor.sources.contains(&s.source);
        if still_open || !watched {
            continue;
        }
        let times = parse_times(s)?;
        let Some(t) = threshold(&monitor.silence, &s.source, &intervals_days(&times)) else {
            continue;
        };
        let last = *times.last().expect("a source has at least one lot");
        if is_silent(last, now, t.days) {
            let (intervals, median_days) = match t.basis {
                Basis::Learned {
                    intervals,
                    median_days,
                } => (Some(intervals as i64), Some(median_days)),
                _ => (None, None),
            };
            out.open.push(NewSilence {
                source_id: s.source_id,
                last_lot: s.last.clone(),
                threshold_days: t.days,
                basis: t.basis.as_str(),
                intervals,
                median_days,
                recipients: recipients(&s.source),
            });
        }
    }
    Ok(out)
}

fn parse_times(s: &SourceLots) -> Result<Vec<DateTime<Utc>>, SilenceError> {
    s.times
        .iter()
        .map(|t| {
            parse_utc(t).ok_or_else(|| SilenceError::LotTime {
                name: s.source.clone(),
                value: t.clone(),
            })
        })
        .collect()
}

/// Who is told about a source's silence: the log, and by email the default list plus the
/// source's list.
pub fn recipients(config: &Config, source: &str) -> Vec<(String, String)> {
    crate::engine::channel_recipients(config, |email| email.recipients_for_source(source))
}

/// What one check wrote.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct CheckReport {
    pub opened: usize,
    pub resolved: usize,
}

/// Opens and resolves silences as of `now` (nothing when `monitor.silence` is false).
pub async fn check(
    store: &Store,
    config: &Config,
    now: DateTime<Utc>,
) -> Result<CheckReport, SilenceError> {
    if !config.monitor.silence.enabled {
        return Ok(CheckReport::default());
    }
    let (sources, open) = store.silence_inputs(HISTORY_LOTS).await?;
    let plan = plan(&config.monitor, &sources, &open, now, |source| {
        recipients(config, source)
    })?;
    if plan.open.is_empty() && plan.resolve.is_empty() {
        return Ok(CheckReport::default());
    }
    let (resolved, opened) = store
        .write_silences(&plan.resolve, &plan.open, &format_utc(now))
        .await?;
    if opened + resolved > 0 {
        tracing::info!(opened, resolved, "silence watch");
    }
    Ok(CheckReport { opened, resolved })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::LotTime;

    fn day(d: f64) -> DateTime<Utc> {
        parse_utc("2026-01-01T00:00:00Z").unwrap()
            + chrono::TimeDelta::milliseconds((d * SECONDS_PER_DAY * 1000.0) as i64)
    }

    #[test]
    fn fewer_than_seven_intervals_learn_nothing() {
        assert_eq!(learned_threshold(&[1.0; 6]), None);
        let t = learned_threshold(&[1.0; 7]).unwrap();
        assert_eq!(t.days, 3.0);
        assert_eq!(
            t.basis,
            Basis::Learned {
                intervals: 7,
                median_days: 1.0
            }
        );
    }

    #[test]
    fn the_threshold_is_the_largest_of_the_three_rules() {
        // 3 × median 2 = 6 beats 1.5 × 3 = 4.5.
        let t = learned_threshold(&[2.0, 2.0, 3.0, 2.0, 1.0, 2.0, 2.0, 2.0]).unwrap();
        assert_eq!(t.days, 6.0);
        // One long recent gap: 1.5 × 10 = 15 beats 3 × median 1 = 3.
        let t = learned_threshold(&[1.0, 1.0, 1.0, 10.0, 1.0, 1.0, 1.0]).unwrap();
        assert_eq!(t.days, 15.0);
        // The same gap more than 20 intervals back no longer counts.
        let mut old_gap = vec![10.0];
        old_gap.extend([1.0; 20]);
        assert_eq!(learned_threshold(&old_gap).unwrap().days, 3.0);
        // Several lots a day: at least one day.
        let t = learned_threshold(&[0.1; 9]).unwrap();
        assert_eq!(t.days, 1.0);
        // Even count: the median is the mean of the middle two.
        let t = learned_threshold(&[1.0, 1.0, 1.0, 2.0, 4.0, 4.0, 4.0, 4.0]).unwrap();
        assert_eq!(t.days, 9.0);
    }

    #[test]
    fn configured_days_override_learning_per_source_first() {
        let mut watch = SilenceWatch {
            enabled: true,
            days: None,
            days_by_source: [("birchworks".to_string(), 14.0)].into(),
        };
        assert_eq!(threshold(&watch, "alder", &[1.0; 3]), None);
        let t = threshold(&watch, "birchworks", &[]).unwrap();
        assert_eq!((t.days, t.basis), (14.0, Basis::ConfiguredForSource));
        watch.days = Some(2.0);
        let t = threshold(&watch, "alder", &[1.0; 30]).unwrap();
        assert_eq!((t.days, t.basis), (2.0, Basis::Configured));
        assert_eq!(threshold(&watch, "birchworks", &[]).unwrap().days, 14.0);
    }

    #[test]
    fn silent_only_past_the_threshold() {
        assert!(!is_silent(day(0.0), day(3.0), 3.0));
        assert!(is_silent(day(0.0), day(3.001), 3.0));
        assert!(
            !is_silent(day(5.0), day(0.0), 1.0),
            "a lot time in the future"
        );
        assert_eq!(
            intervals_days(&[day(0.0), day(1.5), day(4.0)]),
            vec![1.5, 2.5]
        );
    }

    fn source(id: i64, days: &[f64]) -> SourceLots {
        let times: Vec<String> = days.iter().map(|d| format_utc(day(*d))).collect();
        SourceLots {
            source_id: id,
            source: format!("s{id}"),
            last: LotTime {
                id: 100 + id,
                code: format!("L{id}"),
                at: times.last().unwrap().clone(),
            },
            times,
        }
    }

    fn nobody(_: &str) -> Vec<(String, String)> {
        Vec::new()
    }

    fn monitor() -> Monitor {
        Config::defaults_in(std::path::Path::new(".")).monitor
    }

    #[test]
    fn the_plan_opens_once_and_resolves_on_a_later_lot() {
        let daily: Vec<f64> = (0..10).map(f64::from).collect();
        let sources = [source(1, &daily), source(2, &[0.0, 9.0]), source(3, &daily)];
        let now = day(29.0);
        let p = plan(&monitor(), &sources, &[], now, nobody).unwrap();
        // Source 1 and 3: 20 days since the last lot, threshold 3; source 2: too few lots.
        let ids: Vec<i64> = p.open.iter().map(|s| s.source_id).collect();
        assert_eq!(ids, vec![1, 3]);
        assert_eq!(p.open[0].basis, "learned");
        assert_eq!(p.open[0].intervals, Some(9));
        // Already open: nothing new.
        let open = [OpenSilence {
            id: 5,
            source_id: 1,
            last_lot_at: sources[0].last.at.clone(),
        }];
        let p = plan(&monitor(), &sources[..1], &open, now, nobody).unwrap();
        assert_eq!(p, Plan::default());
        // A later lot (today) resolves it and does not open again.
        let mut back = daily.clone();
        back.push(29.0);
        let p = plan(&monitor(), &[source(1, &back)], &open, now, nobody).unwrap();
        assert_eq!(p.resolve.len(), 1);
        assert_eq!(p.resolve[0].silence_id, 5);
        assert!(p.open.is_empty());
        // Switched off for the source list: not watched.
        let mut m = monitor();
        m.sources = vec!["s3".into()];
        let p = plan(&m, &sources, &[], now, nobody).unwrap();
        assert_eq!(p.open.len(), 1);
        assert_eq!(p.open[0].source_id, 3);
    }
}
