//! Configuration: TOML text into a typed, validated [`Config`].
//!
//! Two stages, as the rest of the program relies on: [`RawConfig`] is what serde reads
//! (unknown keys are an error naming the key), [`Config`] is the validated value with paths
//! resolved against the config file's folder. Building pools, watchers and transports from a
//! `Config` happens elsewhere; this module does no I/O beyond reading the one file.

use std::collections::BTreeMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::Deserialize;

mod database;
mod input;
mod web;
pub use database::{PASSWORD_ENV, Postgres, RawDatabase, RawSite, redacted};
/// The decoder type of [`Encoding::Fixed`] (re-exported so callers need no encoding_rs).
pub use encoding_rs::Encoding as EncodingRs;
pub use input::{Delimiter, Encoding, Input, OUR_COLUMNS, Profile, RawInput, RawProfile, Zone};
pub use web::{RawWeb, Web};

/// A configuration problem, always naming the file and the key (or the TOML position).
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config file {path}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: {message}")]
    Parse { path: PathBuf, message: String },
    #[error("{path}: {}", .problems.join("; "))]
    Invalid {
        path: PathBuf,
        problems: Vec<String>,
    },
}

/// The file as written by the user: every section optional, unknown keys refused.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    #[serde(default)]
    pub paths: RawPaths,
    #[serde(default)]
    pub watch: RawWatch,
    #[serde(default)]
    pub monitor: RawMonitor,
    /// Per-characteristic settings, `[characteristic.NAME]`.
    #[serde(default)]
    pub characteristic: std::collections::BTreeMap<String, RawCharacteristic>,
    #[serde(default)]
    pub alerts: RawAlerts,
    #[serde(default)]
    pub health: RawHealth,
    #[serde(default)]
    pub log: RawLog,
    /// Input profiles, `[[input.profile]]`.
    #[serde(default)]
    pub input: RawInput,
    #[serde(default)]
    pub web: RawWeb,
    #[serde(default)]
    pub database: RawDatabase,
    #[serde(default)]
    pub site: RawSite,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawHealth {
    pub notice_after_minutes: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawPaths {
    pub inbox: Option<PathBuf>,
    pub archive: Option<PathBuf>,
    pub quarantine: Option<PathBuf>,
    pub database: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawWatch {
    pub settle_seconds: Option<f64>,
    pub rescan_seconds: Option<f64>,
    pub poll: Option<bool>,
    pub poll_seconds: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawMonitor {
    pub baseline_lots: Option<i64>,
    pub false_alert_lots: Option<f64>,
    pub level: Option<f64>,
    pub family: Option<String>,
    pub cusum: Option<bool>,
    pub cusum_shift: Option<f64>,
    pub spread: Option<bool>,
    pub over_time: Option<String>,
    pub fdr_level: Option<f64>,
    pub resolve_after_lots: Option<i64>,
    pub reopen_within_lots: Option<i64>,
    pub outliers: Option<bool>,
    pub sources: Option<Vec<String>>,
    pub characteristics: Option<Vec<String>>,
    pub silence: Option<bool>,
    pub silence_days: Option<f64>,
    pub silence_days_by_source: Option<BTreeMap<String, f64>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawCharacteristic {
    pub direction: Option<String>,
    pub min_shift: Option<f64>,
    pub spread: Option<bool>,
    pub outliers: Option<bool>,
    pub lsl: Option<f64>,
    pub usl: Option<f64>,
    pub unit: Option<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawAlerts {
    pub channels: Option<Vec<String>>,
    pub email: Option<RawEmail>,
    pub repeat_hours: Option<f64>,
    pub retry_initial_seconds: Option<f64>,
    pub retry_max_seconds: Option<f64>,
    pub expire_hours: Option<f64>,
    pub digest: Option<RawDigest>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawDigest {
    pub at: Option<String>,
    pub when_empty: Option<bool>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawEmail {
    pub smtp_host: Option<String>,
    pub smtp_port: Option<i64>,
    pub tls: Option<String>,
    pub from: Option<String>,
    pub to: Option<Vec<String>>,
    pub username: Option<String>,
    pub password_file: Option<PathBuf>,
    pub timeout_seconds: Option<f64>,
    pub ca_file: Option<PathBuf>,
    pub by_source: Option<BTreeMap<String, Vec<String>>>,
    pub by_characteristic: Option<BTreeMap<String, Vec<String>>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawLog {
    pub format: Option<String>,
    pub level: Option<String>,
}

/// Validated configuration. Every path is absolute or relative to the working directory of
/// the process (already joined with the config file's folder).
#[derive(Debug, Clone)]
pub struct Config {
    /// The file this came from (for messages).
    pub file: PathBuf,
    pub paths: Paths,
    pub watch: Watch,
    pub monitor: Monitor,
    pub alerts: Alerts,
    pub health: Health,
    pub log: Log,
    pub input: Input,
    /// The dashboard, when `web.listen` is set.
    pub web: Option<Web>,
    /// Unit of measure per characteristic (`characteristic.NAME.unit`), for display only.
    pub units: BTreeMap<String, String>,
    /// `[database]`: a PostgreSQL history; None keeps the SQLite file of `paths.database`.
    pub database: Option<Postgres>,
    /// `site.name`: recorded with every file this daemon stores and decision it makes.
    pub site: String,
}

impl Config {
    /// Where the history is, for people and scripts: the PostgreSQL URL (its password shown
    /// as `***`) or the SQLite file's path.
    pub fn history_shown(&self) -> String {
        match &self.database {
            Some(pg) => redacted(&pg.url),
            None => self.paths.database.display().to_string(),
        }
    }

    /// The unit of measure configured for a characteristic, if any.
    pub fn unit(&self, characteristic: &str) -> Option<&str> {
        self.units.get(characteristic).map(String::as_str)
    }
}

/// When the daemon says it is stuck (`crate::health`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Health {
    /// `health.notice_after_minutes`: ingest or delivery failing for longer than this sends
    /// one notice (and one when it recovers). Fractions of a minute are allowed.
    pub notice_after: Duration,
}

#[derive(Debug, Clone)]
pub struct Paths {
    pub inbox: PathBuf,
    pub archive: PathBuf,
    pub quarantine: PathBuf,
    pub database: PathBuf,
}

#[derive(Debug, Clone)]
pub struct Watch {
    /// How long a written file's size and mtime must stay unchanged before it is taken.
    pub settle: Duration,
    /// Full rescans of the inbox, for events that never arrive (network shares, overflow).
    pub rescan: Duration,
    /// Use a polling watcher instead of inotify.
    pub poll: bool,
    pub poll_interval: Duration,
}

/// Which shifts of a characteristic matter.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Direction {
    /// Both directions are a problem.
    TwoSided,
    /// Only a decrease is a problem (an increase is an improvement, never an alert).
    HigherIsBetter,
    /// Only an increase is a problem.
    LowerIsBetter,
}

impl Direction {
    pub fn as_str(self) -> &'static str {
        match self {
            Direction::TwoSided => "two-sided",
            Direction::HigherIsBetter => "higher-is-better",
            Direction::LowerIsBetter => "lower-is-better",
        }
    }
}

/// Settings of one characteristic (defaults for any characteristic not named in the file).
#[derive(Debug, Clone, PartialEq)]
pub struct CharacteristicPolicy {
    pub direction: Direction,
    /// Practical significance, in the characteristic's unit: alert only when the shift is
    /// significantly larger than this. 0 = any shift.
    pub min_shift: f64,
    /// Whether to test the lot's spread (within-lot variance) against the baseline.
    pub spread: bool,
    /// Whether units far outside their lot and baseline are reported as outliers and set
    /// aside from the lot's mean and spread tests (off where single extreme units are the very
    /// thing to alert on).
    pub outliers: bool,
    /// Specification limits, for Cpk reporting (never for alerting).
    pub lsl: Option<f64>,
    pub usl: Option<f64>,
}

/// How the stream of lot tests of a series is controlled over time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OverTime {
    /// The false-alert budget (`false_alert_lots`), shared by the lot test, spread and CUSUM.
    Budget,
    /// Online FDR control of the lot tests by LOND (Javanmard & Montanari 2018).
    Lond,
    /// Online FDR control of the lot tests by LORD++ (Ramdas et al. 2017).
    Lord,
}

impl OverTime {
    pub fn as_str(self) -> &'static str {
        match self {
            OverTime::Budget => "budget",
            OverTime::Lond => "lond",
            OverTime::Lord => "lord++",
        }
    }
}

/// How the tests of one lot's characteristics are adjusted together.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Family {
    Holm,
    BenjaminiHochberg,
}

impl Family {
    pub fn as_str(self) -> &'static str {
        match self {
            Family::Holm => "holm",
            Family::BenjaminiHochberg => "bh",
        }
    }
}

#[derive(Debug, Clone)]
pub struct Monitor {
    pub baseline_lots: usize,
    /// The false-alert budget: at most one false alert per this many in-control lots of a
    /// series (in-control average run length).
    pub false_alert_lots: f64,
    /// Explicit per-lot level of the mean tests (overrides the level derived from the budget).
    pub level: Option<f64>,
    pub family: Family,
    /// Budget (default) or online FDR for the stream of lot mean tests of a series.
    pub over_time: OverTime,
    /// The FDR level of the online procedures.
    pub fdr_level: f64,
    /// CUSUM on standardised lot means, for sustained small shifts.
    pub cusum: bool,
    /// The shift the CUSUM is tuned for, in standard deviations of a lot mean (k = shift / 2).
    pub cusum_shift: f64,
    /// Default for testing spread.
    pub spread: bool,
    /// In-control lots after the last significant one that can resolve an open alert (when
    /// their mean shift is clearly below the alert's; see `engine`).
    pub resolve_after_lots: usize,
    /// A signal within this many lots after the kind's last alert of the series resolved opens
    /// that alert again instead of a new one.
    pub reopen_within_lots: usize,
    /// Default for outlier screening.
    pub outliers: bool,
    /// Sources to monitor; empty means every source.
    pub sources: Vec<String>,
    /// Characteristics to monitor; empty means every characteristic.
    pub characteristics: Vec<String>,
    /// Settings per characteristic name; others get [`Monitor::policy`]'s defaults.
    pub per_characteristic: std::collections::BTreeMap<String, CharacteristicPolicy>,
    /// The watch for sources that stopped sending lots (`crate::silence`).
    pub silence: SilenceWatch,
}

/// Settings of the silence watch: which gap between lots of a source is news.
#[derive(Debug, Clone, PartialEq)]
pub struct SilenceWatch {
    /// `monitor.silence`: the watch runs at all.
    pub enabled: bool,
    /// `monitor.silence_days`: the expected gap in days for every source (else learned).
    pub days: Option<f64>,
    /// `monitor.silence_days_by_source`: the expected gap in days of named sources.
    pub days_by_source: BTreeMap<String, f64>,
}

/// How the false-alert budget is shared between the tests of a series (fractions of
/// 1 / false_alert_lots), stated once.
pub mod budget {
    pub const MEAN: f64 = 0.2;
    pub const SPREAD: f64 = 0.15;
    pub const CUSUM: f64 = 0.55;
    /// Outlier findings (units flagged in in-control lots); not given to the other tests
    /// when outlier screening is off.
    pub const OUTLIER: f64 = 0.1;
}

impl Monitor {
    /// The settings of a characteristic.
    pub fn policy(&self, characteristic: &str) -> CharacteristicPolicy {
        self.per_characteristic
            .get(characteristic)
            .cloned()
            .unwrap_or(CharacteristicPolicy {
                direction: Direction::TwoSided,
                min_shift: 0.0,
                spread: self.spread,
                outliers: self.outliers,
                lsl: None,
                usl: None,
            })
    }

    /// Shares of the per-lot false-alert rate 1 / false_alert_lots: (mean test, spread test,
    /// CUSUM). A disabled part's share goes to the mean test.
    pub fn shares(&self, spread: bool) -> (f64, f64, f64) {
        let rate = 1.0 / self.false_alert_lots;
        let cusum = if self.cusum { budget::CUSUM } else { 0.0 };
        let spread_share = if spread { budget::SPREAD } else { 0.0 };
        let mean = 1.0 - cusum - spread_share - budget::OUTLIER;
        (rate * mean, rate * spread_share, rate * cusum)
    }

    /// The per-lot rate of outlier findings in in-control lots.
    pub fn outlier_share(&self) -> f64 {
        budget::OUTLIER / self.false_alert_lots
    }

    pub fn monitors(&self, source: &str, characteristic: &str) -> bool {
        (self.sources.is_empty() || self.sources.iter().any(|s| s == source))
            && (self.characteristics.is_empty()
                || self.characteristics.iter().any(|c| c == characteristic))
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Channel {
    Log,
    Email,
}

impl Channel {
    pub fn as_str(self) -> &'static str {
        match self {
            Channel::Log => "log",
            Channel::Email => "email",
        }
    }
}

impl fmt::Display for Channel {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

#[derive(Debug, Clone)]
pub struct Alerts {
    pub channels: Vec<Channel>,
    pub email: Option<Email>,
    /// A still-significant open alert is announced again after this long (unless
    /// acknowledged), or at once when its shift has grown by half; None = never.
    pub repeat: Option<Duration>,
    pub retry_initial: Duration,
    pub retry_max: Duration,
    pub expire_after: Duration,
    /// Daily digest of open alerts, when configured.
    pub digest: Option<Digest>,
}

/// The daily digest: a summary of the open alerts, sent once a day at a local time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Digest {
    /// Local time of day (the machine's time zone; `TZ` is honoured).
    pub at: chrono::NaiveTime,
    /// Also send a digest when no alert is open (a daily sign that monitoring runs).
    pub when_empty: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Tls {
    None,
    StartTls,
    Tls,
}

#[derive(Debug, Clone)]
pub struct Email {
    pub smtp_host: String,
    pub smtp_port: u16,
    pub tls: Tls,
    pub from: String,
    pub to: Vec<String>,
    pub username: Option<String>,
    pub password_file: Option<PathBuf>,
    /// Limit of one whole SMTP exchange (connect, commands, message, QUIT).
    pub timeout: Duration,
    /// A PEM file of CA certificates trusted for the server's certificate, besides the
    /// public roots (for a site's private CA).
    pub ca_file: Option<PathBuf>,
    /// Recipients added for alerts of a source, by source name.
    pub by_source: BTreeMap<String, Vec<String>>,
    /// Recipients added for alerts of a characteristic, by characteristic name.
    pub by_characteristic: BTreeMap<String, Vec<String>>,
}

impl Email {
    /// Who receives messages about a series: the default list, then the source's list, then
    /// the characteristic's list, each address once (compared without case) in that order.
    pub fn recipients_for(&self, source: &str, characteristic: &str) -> Vec<String> {
        let lists = [
            Some(&self.to),
            self.by_source.get(source),
            self.by_characteristic.get(characteristic),
        ];
        dedup_addresses(lists.into_iter().flatten().flatten())
    }

    /// Who receives messages about a source as a whole (its silence): the default list, then
    /// the source's list, each address once (compared without case).
    pub fn recipients_for_source(&self, source: &str) -> Vec<String> {
        let lists = [Some(&self.to), self.by_source.get(source)];
        dedup_addresses(lists.into_iter().flatten().flatten())
    }

    /// Every configured address once: the default list first, then the per-source and the
    /// per-characteristic lists.
    pub fn all_recipients(&self) -> Vec<String> {
        dedup_addresses(
            self.to
                .iter()
                .chain(self.by_source.values().flatten())
                .chain(self.by_characteristic.values().flatten()),
        )
    }
}

fn dedup_addresses<'a>(addresses: impl Iterator<Item = &'a String>) -> Vec<String> {
    let mut seen = std::collections::BTreeSet::new();
    addresses
        .filter(|a| seen.insert(a.trim().to_lowercase()))
        .cloned()
        .collect()
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LogFormat {
    Text,
    Json,
}

#[derive(Debug, Clone)]
pub struct Log {
    pub format: LogFormat,
    pub level: String,
}

/// Defaults, stated once.
pub mod defaults {
    pub const BASELINE_LOTS: usize = 20;
    pub const FALSE_ALERT_LOTS: f64 = 500.0;
    pub const CUSUM_SHIFT: f64 = 1.0;
    pub const RESOLVE_AFTER_LOTS: usize = 5;
    pub const REOPEN_WITHIN_LOTS: usize = 20;
    pub const SETTLE_SECONDS: f64 = 2.0;
    pub const RESCAN_SECONDS: f64 = 30.0;
    pub const POLL_SECONDS: f64 = 5.0;
    pub const RETRY_INITIAL_SECONDS: f64 = 30.0;
    pub const RETRY_MAX_SECONDS: f64 = 3600.0;
    pub const EXPIRE_HOURS: f64 = 72.0;
    pub const SMTP_TIMEOUT_SECONDS: f64 = 30.0;
    pub const NOTICE_AFTER_MINUTES: f64 = 30.0;
}

impl Config {
    /// Reads and validates the file at `path`.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        Config::from_toml(path, &text)
    }

    /// Parses `text` as if read from `path` (relative paths resolve against its folder).
    pub fn from_toml(path: &Path, text: &str) -> Result<Config, ConfigError> {
        let raw: RawConfig = toml::from_str(text).map_err(|e| ConfigError::Parse {
            path: path.to_path_buf(),
            message: describe_toml_error(text, &e),
        })?;
        let base = path
            .parent()
            .map(Path::to_path_buf)
            .filter(|p| !p.as_os_str().is_empty())
            .unwrap_or_else(|| PathBuf::from("."));
        validate(path, &base, raw)
    }

    /// The configuration a fresh `lotdrift init DIR` stands for, rooted at `dir`.
    pub fn defaults_in(dir: &Path) -> Config {
        validate(&dir.join("lotdrift.toml"), dir, RawConfig::default())
            .expect("the default configuration is valid")
    }
}

fn describe_toml_error(text: &str, e: &toml::de::Error) -> String {
    let message = e.message().trim().to_string();
    match e.span() {
        Some(span) => {
            let before = &text[..span.start.min(text.len())];
            let line = before.matches('\n').count() + 1;
            let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
            format!("line {line}, column {column}: {message}")
        }
        None => message,
    }
}

struct Problems(Vec<String>);

impl Problems {
    fn push(&mut self, key: &str, message: impl fmt::Display) {
        self.0.push(format!("{key}: {message}"));
    }

    fn seconds(&mut self, key: &str, value: Option<f64>, default: f64, min: f64) -> Duration {
        let v = value.unwrap_or(default);
        if !v.is_finite() || v < min || v > 1e9 {
            self.push(
                key,
                format!("must be a number of seconds ≥ {min} (got {v})"),
            );
            return Duration::from_secs_f64(default);
        }
        Duration::from_secs_f64(v)
    }

    fn count(&mut self, key: &str, value: Option<i64>, default: usize, min: i64) -> usize {
        match value {
            None => default,
            Some(v) if v >= min && v <= 1_000_000 => v as usize,
            Some(v) => {
                self.push(key, format!("must be a whole number ≥ {min} (got {v})"));
                default
            }
        }
    }
}

fn names(problems: &mut Problems, key: &str, list: Option<Vec<String>>) -> Vec<String> {
    let list = list.unwrap_or_default();
    for name in &list {
        if name.trim().is_empty() || name.chars().any(char::is_control) {
            problems.push(key, format!("{name:?} is not a valid name"));
        }
    }
    list
}

fn validate(path: &Path, base: &Path, raw: RawConfig) -> Result<Config, ConfigError> {
    let mut p = Problems(Vec::new());
    let resolve = |value: Option<PathBuf>, default: &str| -> PathBuf {
        let v = value.unwrap_or_else(|| PathBuf::from(default));
        if v.is_absolute() { v } else { base.join(v) }
    };
    let paths = Paths {
        inbox: resolve(raw.paths.inbox, "inbox"),
        archive: resolve(raw.paths.archive, "archive"),
        quarantine: resolve(raw.paths.quarantine, "quarantine"),
        database: resolve(raw.paths.database, "lotdrift.db"),
    };
    if paths.inbox == paths.archive || paths.inbox == paths.quarantine {
        p.push(
            "paths.inbox",
            "must differ from paths.archive and paths.quarantine",
        );
    }

    let watch = Watch {
        settle: p.seconds(
            "watch.settle_seconds",
            raw.watch.settle_seconds,
            defaults::SETTLE_SECONDS,
            0.0,
        ),
        rescan: p.seconds(
            "watch.rescan_seconds",
            raw.watch.rescan_seconds,
            defaults::RESCAN_SECONDS,
            0.1,
        ),
        poll: raw.watch.poll.unwrap_or(false),
        poll_interval: p.seconds(
            "watch.poll_seconds",
            raw.watch.poll_seconds,
            defaults::POLL_SECONDS,
            0.1,
        ),
    };

    let level = raw.monitor.level;
    if let Some(l) = level
        && !(l > 0.0 && l < 0.5)
    {
        p.push(
            "monitor.level",
            format!("must be between 0 and 0.5 (got {l})"),
        );
    }
    let false_alert_lots = raw
        .monitor
        .false_alert_lots
        .unwrap_or(defaults::FALSE_ALERT_LOTS);
    if !(false_alert_lots.is_finite() && (10.0..=1e9).contains(&false_alert_lots)) {
        p.push(
            "monitor.false_alert_lots",
            format!("must be a number of lots from 10 to 1e9 (got {false_alert_lots})"),
        );
    }
    let family = match raw.monitor.family.as_deref() {
        None | Some("holm") => Family::Holm,
        Some("bh") => Family::BenjaminiHochberg,
        Some(other) => {
            p.push(
                "monitor.family",
                format!("unknown method {other:?} (allowed: \"holm\", \"bh\")"),
            );
            Family::Holm
        }
    };
    let over_time = match raw.monitor.over_time.as_deref() {
        None | Some("budget") => OverTime::Budget,
        Some("lond") => OverTime::Lond,
        Some("lord") => OverTime::Lord,
        Some(other) => {
            p.push(
                "monitor.over_time",
                format!("unknown method {other:?} (allowed: \"budget\", \"lond\", \"lord\")"),
            );
            OverTime::Budget
        }
    };
    let fdr_level = raw.monitor.fdr_level.unwrap_or(0.05);
    if !(fdr_level > 0.0 && fdr_level < 1.0) {
        p.push(
            "monitor.fdr_level",
            format!("must be between 0 and 1 (got {fdr_level})"),
        );
    }
    let cusum_shift = raw.monitor.cusum_shift.unwrap_or(defaults::CUSUM_SHIFT);
    if !(cusum_shift.is_finite() && (0.1..=5.0).contains(&cusum_shift)) {
        p.push(
            "monitor.cusum_shift",
            format!("must be between 0.1 and 5 standard deviations (got {cusum_shift})"),
        );
    }
    let spread_default = raw.monitor.spread.unwrap_or(true);
    let outliers_default = raw.monitor.outliers.unwrap_or(true);
    let mut per_characteristic = std::collections::BTreeMap::new();
    let mut units = BTreeMap::new();
    for (name, c) in raw.characteristic {
        let key = |k: &str| format!("characteristic.{name}.{k}");
        if let Some(unit) = validate_unit(&mut p, &key("unit"), c.unit.as_deref()) {
            units.insert(name.clone(), unit);
        }
        let direction = match c.direction.as_deref() {
            None | Some("two-sided") => Direction::TwoSided,
            Some("higher-is-better") => Direction::HigherIsBetter,
            Some("lower-is-better") => Direction::LowerIsBetter,
            Some(other) => {
                p.push(
                    &key("direction"),
                    format!(
                        "unknown direction {other:?} (allowed: \"two-sided\", \
                         \"higher-is-better\", \"lower-is-better\")"
                    ),
                );
                Direction::TwoSided
            }
        };
        let min_shift = c.min_shift.unwrap_or(0.0);
        if !(min_shift.is_finite() && min_shift >= 0.0) {
            p.push(
                &key("min_shift"),
                format!("must be a number ≥ 0 in the characteristic's unit (got {min_shift})"),
            );
        }
        for (k, v) in [("lsl", c.lsl), ("usl", c.usl)] {
            if v.is_some_and(|v| !v.is_finite()) {
                p.push(&key(k), "must be a finite number");
            }
        }
        if let (Some(l), Some(u)) = (c.lsl, c.usl)
            && l >= u
        {
            p.push(&key("lsl"), format!("must be below usl ({l} >= {u})"));
        }
        per_characteristic.insert(
            name,
            CharacteristicPolicy {
                direction,
                min_shift,
                spread: c.spread.unwrap_or(spread_default),
                outliers: c.outliers.unwrap_or(outliers_default),
                lsl: c.lsl,
                usl: c.usl,
            },
        );
    }
    let monitor = Monitor {
        baseline_lots: p.count(
            "monitor.baseline_lots",
            raw.monitor.baseline_lots,
            defaults::BASELINE_LOTS,
            3,
        ),
        false_alert_lots,
        level,
        family,
        over_time,
        fdr_level,
        cusum: raw.monitor.cusum.unwrap_or(true),
        cusum_shift,
        spread: spread_default,
        resolve_after_lots: p.count(
            "monitor.resolve_after_lots",
            raw.monitor.resolve_after_lots,
            defaults::RESOLVE_AFTER_LOTS,
            1,
        ),
        reopen_within_lots: p.count(
            "monitor.reopen_within_lots",
            raw.monitor.reopen_within_lots,
            defaults::REOPEN_WITHIN_LOTS,
            0,
        ),
        outliers: outliers_default,
        sources: names(&mut p, "monitor.sources", raw.monitor.sources),
        characteristics: names(
            &mut p,
            "monitor.characteristics",
            raw.monitor.characteristics,
        ),
        per_characteristic,
        silence: validate_silence(
            &mut p,
            raw.monitor.silence,
            raw.monitor.silence_days,
            raw.monitor.silence_days_by_source,
        ),
    };

    let mut channels = Vec::new();
    for name in raw.alerts.channels.unwrap_or_else(|| vec!["log".into()]) {
        let channel = match name.as_str() {
            "log" => Channel::Log,
            "email" => Channel::Email,
            other => {
                p.push(
                    "alerts.channels",
                    format!("unknown channel {other:?} (allowed: \"log\", \"email\")"),
                );
                continue;
            }
        };
        if !channels.contains(&channel) {
            channels.push(channel);
        }
    }
    let email = raw.alerts.email.map(|e| validate_email(&mut p, base, e));
    if channels.contains(&Channel::Email) && email.is_none() {
        p.push(
            "alerts.email",
            "the \"email\" channel needs an [alerts.email] section",
        );
    }
    let retry_initial = p.seconds(
        "alerts.retry_initial_seconds",
        raw.alerts.retry_initial_seconds,
        defaults::RETRY_INITIAL_SECONDS,
        0.0,
    );
    let retry_max = p.seconds(
        "alerts.retry_max_seconds",
        raw.alerts.retry_max_seconds,
        defaults::RETRY_MAX_SECONDS,
        0.0,
    );
    let expire_hours = raw.alerts.expire_hours.unwrap_or(defaults::EXPIRE_HOURS);
    let expire_after = p.seconds(
        "alerts.expire_hours",
        Some(expire_hours * 3600.0),
        defaults::EXPIRE_HOURS * 3600.0,
        1.0,
    );
    let repeat_hours = raw.alerts.repeat_hours.unwrap_or(24.0);
    let repeat = if repeat_hours == 0.0 {
        None
    } else {
        Some(p.seconds(
            "alerts.repeat_hours",
            Some(repeat_hours * 3600.0),
            24.0 * 3600.0,
            60.0,
        ))
    };
    let digest = raw.alerts.digest.map(|d| validate_digest(&mut p, d));
    let alerts = Alerts {
        channels,
        email,
        repeat,
        retry_initial,
        retry_max,
        expire_after,
        digest,
    };

    let health = validate_health(&mut p, raw.health);

    let format = match raw.log.format.as_deref() {
        None | Some("text") => LogFormat::Text,
        Some("json") => LogFormat::Json,
        Some(other) => {
            p.push(
                "log.format",
                format!("unknown format {other:?} (allowed: \"text\", \"json\")"),
            );
            LogFormat::Text
        }
    };
    let level_name = raw.log.level.unwrap_or_else(|| "info".into());
    if !["error", "warn", "info", "debug", "trace"].contains(&level_name.as_str()) {
        p.push(
            "log.level",
            format!("unknown level {level_name:?} (allowed: error, warn, info, debug, trace)"),
        );
    }
    let log = Log {
        format,
        level: level_name,
    };
    let input = input::validate_input(&mut p, raw.input);
    let web = web::validate_web(&mut p, base, raw.web);
    let database = database::validate_database(&mut p, base, raw.database);
    let site = database::validate_site(&mut p, raw.site);

    if !p.0.is_empty() {
        return Err(ConfigError::Invalid {
            path: path.to_path_buf(),
            problems: p.0,
        });
    }
    Ok(Config {
        file: path.to_path_buf(),
        paths,
        watch,
        monitor,
        alerts,
        health,
        log,
        input,
        units,
        web,
        database,
        site,
    })
}

/// Longest unit of measure accepted (`mAh`, `mOhm`, `N/mm²`; a column, not a sentence).
const MAX_UNIT_CHARS: usize = 16;

/// `characteristic.NAME.unit`: a short label without control characters, trimmed.
fn validate_unit(p: &mut Problems, key: &str, unit: Option<&str>) -> Option<String> {
    let unit = unit?.trim();
    if unit.is_empty() {
        p.push(key, "must not be empty (leave the key out for no unit)");
    } else if unit.chars().count() > MAX_UNIT_CHARS {
        p.push(
            key,
            format!("at most {MAX_UNIT_CHARS} characters (got {unit:?})"),
        );
    } else if unit.chars().any(char::is_control) {
        p.push(
            key,
            format!("must not contain control characters (got {unit:?})"),
        );
    } else {
        return Some(unit.to_string());
    }
    None
}

/// Longest `health.notice_after_minutes` accepted: a week.
const MAX_NOTICE_AFTER_MINUTES: f64 = 7.0 * 24.0 * 60.0;

fn validate_health(p: &mut Problems, raw: RawHealth) -> Health {
    let minutes = raw
        .notice_after_minutes
        .unwrap_or(defaults::NOTICE_AFTER_MINUTES);
    if !(minutes.is_finite() && minutes > 0.0 && minutes <= MAX_NOTICE_AFTER_MINUTES) {
        p.push(
            "health.notice_after_minutes",
            format!(
                "must be a number of minutes > 0, at most {MAX_NOTICE_AFTER_MINUTES} (got {minutes})"
            ),
        );
        return Health {
            notice_after: Duration::from_secs_f64(defaults::NOTICE_AFTER_MINUTES * 60.0),
        };
    }
    Health {
        notice_after: Duration::from_secs_f64(minutes * 60.0),
    }
}

fn validate_email(p: &mut Problems, base: &Path, e: RawEmail) -> Email {
    let smtp_host = e.smtp_host.unwrap_or_default();
    if smtp_host.trim().is_empty() {
        p.push("alerts.email.smtp_host", "is required");
    }
    let tls = match e.tls.as_deref() {
        None | Some("starttls") => Tls::StartTls,
        Some("none") => Tls::None,
        Some("tls") => Tls::Tls,
        Some(other) => {
            p.push(
                "alerts.email.tls",
                format!("unknown mode {other:?} (allowed: \"none\", \"starttls\", \"tls\")"),
            );
            Tls::StartTls
        }
    };
    let default_port = match tls {
        Tls::None => 25,
        Tls::StartTls => 587,
        Tls::Tls => 465,
    };
    let smtp_port = match e.smtp_port {
        None => default_port,
        Some(v) if (1..=65535).contains(&v) => v as u16,
        Some(v) => {
            p.push(
                "alerts.email.smtp_port",
                format!("must be 1 to 65535 (got {v})"),
            );
            default_port
        }
    };
    let from = e.from.unwrap_or_default();
    if !looks_like_address(&from) {
        p.push(
            "alerts.email.from",
            format!("must be an email address (got {from:?})"),
        );
    }
    let to = e.to.unwrap_or_default();
    if to.is_empty() {
        p.push(
            "alerts.email.to",
            "needs at least one recipient (it receives the alerts of every source)",
        );
    }
    check_addresses(p, "alerts.email.to", &to);
    let mut lists = |table: &str, raw: Option<BTreeMap<String, Vec<String>>>| {
        let raw = raw.unwrap_or_default();
        for (name, list) in &raw {
            let key = format!("alerts.email.{table}.{}", toml_key(name));
            if name.trim().is_empty() || name.chars().any(char::is_control) {
                p.push(&key, format!("{name:?} is not a valid name"));
            }
            if list.is_empty() {
                p.push(&key, "needs at least one recipient (or remove the entry)");
            }
            check_addresses(p, &key, list);
        }
        raw
    };
    let by_source = lists("by_source", e.by_source);
    let by_characteristic = lists("by_characteristic", e.by_characteristic);
    let timeout = p.seconds(
        "alerts.email.timeout_seconds",
        e.timeout_seconds,
        defaults::SMTP_TIMEOUT_SECONDS,
        0.1,
    );
    if e.ca_file.is_some() && tls == Tls::None {
        p.push(
            "alerts.email.ca_file",
            "needs tls = \"starttls\" or \"tls\" (with tls = \"none\" no certificate is checked)",
        );
    }
    let resolve = |f: PathBuf| if f.is_absolute() { f } else { base.join(f) };
    Email {
        smtp_host,
        smtp_port,
        tls,
        from,
        to,
        username: e.username,
        password_file: e.password_file.map(resolve),
        timeout,
        ca_file: e.ca_file.map(resolve),
        by_source,
        by_characteristic,
    }
}

fn check_addresses(p: &mut Problems, key: &str, list: &[String]) {
    for address in list {
        if !looks_like_address(address) {
            p.push(key, format!("{address:?} is not an email address"));
        }
    }
}

/// A table key as written in TOML: bare when it can be, quoted otherwise.
fn toml_key(name: &str) -> String {
    if !name.is_empty()
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
    {
        name.to_string()
    } else {
        format!("{name:?}")
    }
}

/// Longest expected gap accepted, in days (a century): keeps time arithmetic in range.
const MAX_SILENCE_DAYS: f64 = 36_500.0;

fn validate_silence(
    p: &mut Problems,
    enabled: Option<bool>,
    days: Option<f64>,
    by_source: Option<BTreeMap<String, f64>>,
) -> SilenceWatch {
    let check = |p: &mut Problems, key: &str, v: f64| {
        if !(v.is_finite() && v > 0.0 && v <= MAX_SILENCE_DAYS) {
            p.push(
                key,
                format!("must be a number of days > 0, at most {MAX_SILENCE_DAYS} (got {v})"),
            );
        }
    };
    if let Some(d) = days {
        check(p, "monitor.silence_days", d);
    }
    let days_by_source = by_source.unwrap_or_default();
    for (name, d) in &days_by_source {
        let key = format!("monitor.silence_days_by_source.{}", toml_key(name));
        if name.trim().is_empty() || name.chars().any(char::is_control) {
            p.push(&key, format!("{name:?} is not a valid name"));
        }
        check(p, &key, *d);
    }
    SilenceWatch {
        enabled: enabled.unwrap_or(true),
        days,
        days_by_source,
    }
}

fn validate_digest(p: &mut Problems, d: RawDigest) -> Digest {
    let at = match d.at.as_deref() {
        None => {
            p.push(
                "alerts.digest.at",
                "is required (a local time such as \"07:30\")",
            );
            chrono::NaiveTime::MIN
        }
        Some(text) => match chrono::NaiveTime::parse_from_str(text.trim(), "%H:%M") {
            Ok(t) => t,
            Err(_) => {
                p.push(
                    "alerts.digest.at",
                    format!("must be a local time HH:MM, 00:00 to 23:59 (got {text:?})"),
                );
                chrono::NaiveTime::MIN
            }
        },
    };
    Digest {
        at,
        when_empty: d.when_empty.unwrap_or(false),
    }
}

/// Whether `s` is an address as the mail library parses it ("a@b.c" or "Name <a@b.c>"), so
/// that `check-config` refuses what sending would refuse later.
fn looks_like_address(s: &str) -> bool {
    !s.chars().any(char::is_control) && s.parse::<lettre::message::Mailbox>().is_ok()
}

/// The commented starter file written by `lotdrift init`.
pub const STARTER: &str = r#"# lotdrift configuration.
# Paths are relative to this file. Every key is optional; the values shown are the defaults.
# Unknown keys are refused, so a typo is reported instead of silently ignored.

[paths]
inbox = "inbox"            # drop lot files here
archive = "archive"        # stored files move to archive/<yyyy-mm>/
quarantine = "quarantine"  # refused files, each with <file>.reason.txt beside it
database = "lotdrift.db"   # SQLite; read it with any SQLite tool while the daemon runs

# One history for several sites: a PostgreSQL database shared by one daemon per site (each
# with its own inbox). Without a url the history is the SQLite file above.
# [database]
# url = "postgres://lotdrift@db.example:5432/lotdrift"
# password_file = "db-password.txt"   # or LOTDRIFT_DATABASE_PASSWORD, or in the url

# [site]
# name = "plant-north"   # recorded with each stored file and decision; default: host name

[watch]
settle_seconds = 2.0   # a written file must keep its size and mtime this long before it is taken
rescan_seconds = 30.0  # full inbox rescan, for events that never arrive (network shares)
poll = false           # true: poll the inbox instead of using file system events
poll_seconds = 5.0

[monitor]
baseline_lots = 20       # the first N lots of a series (in sampling order) form its baseline
false_alert_lots = 500   # budget: at most one false alert per this many in-control lots per series
family = "holm"          # across the characteristics of one lot: "holm" (FWER) or "bh" (FDR)
cusum = true             # CUSUM on standardised lot means, for small sustained shifts
cusum_shift = 1.0        # the shift the CUSUM is tuned for, in sd of a lot mean
spread = true            # also alert when a lot's spread grows
over_time = "budget"     # "budget", or online FDR of the lot tests: "lond" | "lord"
fdr_level = 0.05         # the FDR level of "lond" / "lord"
resolve_after_lots = 5   # in-control lots (clearly back near the baseline) that resolve an alert
reopen_within_lots = 20  # a signal this soon after a resolution reopens the same alert
outliers = true          # report units far outside their lot and set them aside from its tests
sources = []             # only these sources; empty = every source
characteristics = []     # only these characteristics; empty = every characteristic
# level = 0.001          # fix the per-lot level of the mean tests instead of deriving it
silence = true           # notice (once) a source that sent no lot for longer than it usually does
# silence_days = 7       # expected gap in days for every source; unset = learned per source
#                        # (from 8 lots on: max(3 x median interval, 1.5 x largest of the last
#                        # 20 intervals, 1 day)); lot times are sampling times
# [monitor.silence_days_by_source]
# "cedar-energy" = 14    # expected gap of one source, in days

# Per characteristic (any name; others are two-sided, min_shift 0):
# [characteristic.capacity_mah]
# direction = "higher-is-better"   # "two-sided" | "higher-is-better" | "lower-is-better"
# min_shift = 5.0                  # alert only on shifts significantly larger than this (its unit)
# spread = true
# outliers = true                  # false: single extreme units are themselves the concern
# lsl = 2900.0                     # specification limits: Cpk of baseline and lot is reported
# usl = 3100.0
# unit = "mAh"                     # unit of measure, shown in every table and JSON (`unit`)

[alerts]
channels = ["log"]       # "log", "email", or both
repeat_hours = 24        # announce a still-shifting open alert again after this long; 0 = never

# [alerts.email]
# smtp_host = "mail.example.org"
# smtp_port = 587
# tls = "starttls"         # "none" | "starttls" | "tls"
# from = "lotdrift@example.org"
# to = ["quality@example.org"]
# username = "lotdrift"    # password from LOTDRIFT_SMTP_PASSWORD or password_file
# password_file = "smtp-password.txt"
# timeout_seconds = 30.0   # limit of one SMTP exchange (connect to QUIT); then retried
# ca_file = "site-ca.pem"  # PEM CA certificate(s) to trust besides the public roots
#
# Alerts of a source or a characteristic also go to these lists (besides `to`):
# [alerts.email.by_source]
# "cedar-energy" = ["buyer-cedar@example.org"]
# [alerts.email.by_characteristic]
# capacity_mah = ["cell-lab@example.org"]

# Daily digest of the open alerts, at a local time (the machine's time zone; TZ is honoured).
# Each recipient gets the open alerts they receive; sent late (up to 12 h) if lotdrift was not
# running at that time.
# [alerts.digest]
# at = "07:30"
# when_empty = false       # true: also send it when no alert is open

[health]
# Ingest or delivery failing for longer than this sends one notice (log always; email too
# unless email delivery is what fails), and one when it works again. Fractions are allowed.
notice_after_minutes = 30

# The dashboard in the daemon: overview, charts per series, alerts with acknowledgement.
# Off unless listen is set. An address other than loopback needs token_file (first line:
# the access token, at least 16 characters); on loopback without it the daemon writes a
# token to lotdrift-web.token beside the database.
# [web]
# listen = "127.0.0.1:8421"
# token_file = "web-token.txt"

[log]
format = "text"          # "text" or "json"
level = "info"

# Input profiles: how a station's or supplier's files look, when not like the built-in dialect
# (UTF-8, ',' separated, '.' decimals, RFC 3339 times, our column names). Chosen per file by
# a glob on its name (match) or the inbox subfolder it is dropped in (folder); the first
# profile that matches wins. Workbooks (.xlsx, .xlsm, .xlsb, .xls, .ods) are read without one.
# `lotdrift check-file FILE` shows how a file would be read, and stores nothing.
# [[input.profile]]
# name = "birchworks-lab"
# match = "birchworks_*"          # glob on the file name (case-insensitive); or folder = "birchworks"
# delimiter = ";"                 # "," ";" "\t" "|" or "auto" (from the header line)
# decimal = ","                   # "." or ","
# encoding = "auto"               # "auto" (BOM: UTF-8/UTF-16LE/UTF-16BE, else UTF-8), "windows-1252", ...
# timezone = "Europe/Berlin"      # of date-times without an offset; default: the machine's zone
# date_format = "%d.%m.%Y %H:%M"  # besides RFC 3339 and YYYY-MM-DD HH:MM[:SS]
# header_row = 3                  # lines (rows) above the header are skipped
# sheet = "Messwerte"             # workbooks: the sheet (default: the first)
# ignore = ["Operator"]           # their columns to skip
# [input.profile.columns]         # our name = their column header (case-insensitive)
# source = "Supplier"             # or a fixed source for every row: source = "birchworks" above
# lot = "Batch No."
# unit = "Serial"
# sampled_at = "Date"
# [input.profile.characteristics] # their column (or characteristic) = our characteristic
# "Capacity [mAh]" = "capacity_mah"
"#;

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Config, ConfigError> {
        Config::from_toml(Path::new("/etc/lotdrift/lotdrift.toml"), text)
    }

    #[test]
    fn starter_file_is_the_defaults() {
        let c = parse(STARTER).unwrap();
        assert_eq!(c.monitor.baseline_lots, 20);
        assert_eq!(c.paths.inbox, PathBuf::from("/etc/lotdrift/inbox"));
        assert_eq!(c.paths.database, PathBuf::from("/etc/lotdrift/lotdrift.db"));
        assert_eq!(c.alerts.channels, vec![Channel::Log]);
        let d = parse("").unwrap();
        assert_eq!(d.watch.settle, c.watch.settle);
        assert_eq!(d.health, c.health);
        assert_eq!(d.health.notice_after, Duration::from_secs(1800));
    }

    #[test]
    fn notice_after_minutes_takes_fractions_and_bad_values_name_the_key() {
        let c = parse("[health]\nnotice_after_minutes = 0.05\n").unwrap();
        assert_eq!(c.health.notice_after, Duration::from_secs(3));
        for bad in ["0", "-1", "nan", "inf", "20000"] {
            let e = parse(&format!("[health]\nnotice_after_minutes = {bad}\n"))
                .unwrap_err()
                .to_string();
            assert!(
                e.contains("health.notice_after_minutes: must be"),
                "{bad}: {e}"
            );
        }
        let e = parse("[health]\nnotice_after = 3\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("notice_after"), "{e}");
    }

    #[test]
    fn unknown_key_is_named_with_position() {
        let e = parse("[monitor]\nbaseline_lot = 3\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("baseline_lot"), "{e}");
        assert!(e.contains("line 2"), "{e}");
    }

    #[test]
    fn invalid_values_name_their_keys() {
        let e = parse(
            "[monitor]\nbaseline_lots = 1\nlevel = 2.0\n[alerts]\nchannels = [\"pager\"]\n\
             [characteristic.mass_g]\ndirection = \"up\"\nmin_shift = -1\n",
        )
        .unwrap_err()
        .to_string();
        for key in [
            "monitor.baseline_lots",
            "monitor.level",
            "alerts.channels",
            "characteristic.mass_g.direction",
            "characteristic.mass_g.min_shift",
        ] {
            assert!(e.contains(key), "{key} missing in {e}");
        }
    }

    #[test]
    fn email_channel_needs_its_section() {
        let e = parse("[alerts]\nchannels = [\"email\"]\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("alerts.email"), "{e}");
        let ok = parse(
            "[alerts]\nchannels = [\"email\", \"log\"]\n[alerts.email]\nsmtp_host = \"127.0.0.1\"\nsmtp_port = 2525\ntls = \"none\"\nfrom = \"a@b.c\"\nto = [\"q@b.c\"]\n",
        )
        .unwrap();
        let email = ok.alerts.email.unwrap();
        assert_eq!(email.smtp_port, 2525);
        assert_eq!(email.tls, Tls::None);
        assert_eq!(email.ca_file, None);
    }

    #[test]
    fn ca_file_resolves_against_the_config_and_needs_tls() {
        let section = "[alerts.email]\nsmtp_host = \"mail.example.org\"\nfrom = \"a@b.c\"\nto = [\"q@b.c\"]\nca_file = \"ca.pem\"\n";
        let c = parse(section).unwrap();
        assert_eq!(
            c.alerts.email.unwrap().ca_file,
            Some(PathBuf::from("/etc/lotdrift/ca.pem"))
        );
        let e = parse(&format!("{section}tls = \"none\"\n"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("alerts.email.ca_file"), "{e}");
    }

    #[test]
    fn the_commented_alert_blocks_are_valid_when_uncommented() {
        let mut text = String::new();
        let mut in_alerts = false;
        for line in STARTER.lines() {
            let header = line
                .strip_prefix("# ")
                .filter(|l| l.starts_with("[alerts."));
            if let Some(header) = header {
                in_alerts = true;
                text.push_str(header);
            } else if line.starts_with('[') {
                in_alerts = false;
                text.push_str(line);
            } else if in_alerts && line.starts_with("# ") && line.contains(" = ") {
                text.push_str(&line[2..]);
            } else {
                text.push_str(line);
            }
            text.push('\n');
        }
        let c = parse(&text).unwrap();
        let email = c.alerts.email.unwrap();
        assert_eq!(email.tls, Tls::StartTls);
        assert!(email.ca_file.is_some());
        assert_eq!(
            email.recipients_for("cedar-energy", "capacity_mah"),
            vec![
                "quality@example.org",
                "buyer-cedar@example.org",
                "cell-lab@example.org"
            ]
        );
        let digest = c.alerts.digest.unwrap();
        assert_eq!(
            digest.at,
            chrono::NaiveTime::from_hms_opt(7, 30, 0).unwrap()
        );
        assert!(!digest.when_empty);
        assert_eq!(
            email.recipients_for_source("cedar-energy"),
            vec!["quality@example.org", "buyer-cedar@example.org"]
        );
    }

    #[test]
    fn recipients_add_up_per_source_and_characteristic_each_address_once() {
        let c = parse(
            "[alerts.email]\nsmtp_host = \"m\"\nfrom = \"a@b.c\"\nto = [\"team@x.org\"]\n\
             [alerts.email.by_source]\n\"birchworks\" = [\"bw@x.org\", \"Team@X.org\"]\n\
             [alerts.email.by_characteristic]\nmass_g = [\"lab@x.org\", \"bw@x.org\"]\n",
        )
        .unwrap();
        let email = c.alerts.email.unwrap();
        assert_eq!(
            email.recipients_for("alder-cells", "ocv_v"),
            vec!["team@x.org"]
        );
        assert_eq!(
            email.recipients_for("birchworks", "ocv_v"),
            vec!["team@x.org", "bw@x.org"]
        );
        assert_eq!(
            email.recipients_for("birchworks", "mass_g"),
            vec!["team@x.org", "bw@x.org", "lab@x.org"]
        );
        assert_eq!(
            email.recipients_for("alder-cells", "mass_g"),
            vec!["team@x.org", "lab@x.org", "bw@x.org"]
        );
        assert_eq!(
            email.all_recipients(),
            vec!["team@x.org", "bw@x.org", "lab@x.org"]
        );
    }

    #[test]
    fn addresses_are_parsed_as_the_mail_library_does() {
        // Regression: `from = "a@b c"` and `to = ["x y@z"]` passed the check and failed only
        // when sending.
        let e = parse("[alerts.email]\nsmtp_host = \"m\"\nfrom = \"a@b c\"\nto = [\"x y@z\"]\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("alerts.email.from"), "{e}");
        assert!(e.contains("\"x y@z\" is not an email address"), "{e}");
        assert!(
            parse(
                "[alerts.email]\nsmtp_host = \"m\"\nfrom = \"Lab <lab@x.org>\"\n\
                 to = [\"q@x.org\"]\n"
            )
            .is_ok()
        );
    }

    #[test]
    fn bad_recipient_lists_and_digest_times_name_their_keys() {
        let e = parse(
            "[alerts.email]\nsmtp_host = \"m\"\nfrom = \"a@b.c\"\nto = [\"team@x.org\"]\n\
             [alerts.email.by_source]\n\"cedar energy\" = [\"nobody\"]\nbirchworks = []\n\
             [alerts.digest]\nat = \"7.30\"\n",
        )
        .unwrap_err()
        .to_string();
        for needle in [
            "alerts.email.by_source.\"cedar energy\": \"nobody\" is not an email address",
            "alerts.email.by_source.birchworks: needs at least one recipient",
            "alerts.digest.at: must be a local time HH:MM",
        ] {
            assert!(e.contains(needle), "{needle} missing in {e}");
        }
        let e = parse("[alerts.digest]\nwhen_empty = true\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("alerts.digest.at: is required"), "{e}");
        let e = parse("[alerts.digest]\nat = \"24:00\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("alerts.digest.at"), "{e}");
    }

    #[test]
    fn bundled_configs_are_valid() {
        let example = parse(include_str!("../config/lotdrift.example.toml")).unwrap();
        assert_eq!(example.alerts.channels, vec![Channel::Log, Channel::Email]);
        let names: Vec<&str> = example
            .input
            .profiles
            .iter()
            .map(|p| p.name.as_str())
            .collect();
        assert_eq!(names, ["birchworks-lab", "alder-workbook"]);
        let demo = parse(include_str!("../config/demo.toml")).unwrap();
        assert_eq!(demo.watch.settle, Duration::ZERO);
    }

    #[test]
    fn silence_settings_default_on_learned_and_bad_days_name_their_keys() {
        let d = parse("").unwrap().monitor.silence;
        assert!(d.enabled);
        assert_eq!(d.days, None);
        assert!(d.days_by_source.is_empty());
        let c = parse(
            "[monitor]\nsilence = false\nsilence_days = 2.5\n\
             [monitor.silence_days_by_source]\n\"cedar energy\" = 14\n",
        )
        .unwrap()
        .monitor
        .silence;
        assert!(!c.enabled);
        assert_eq!(c.days, Some(2.5));
        assert_eq!(c.days_by_source.get("cedar energy"), Some(&14.0));
        let e = parse(
            "[monitor]\nsilence_days = 0\n[monitor.silence_days_by_source]\n\
             birchworks = -1\n\"cedar energy\" = nan\n",
        )
        .unwrap_err()
        .to_string();
        for needle in [
            "monitor.silence_days: must be a number of days > 0",
            "monitor.silence_days_by_source.birchworks: must be",
            "monitor.silence_days_by_source.\"cedar energy\": must be",
        ] {
            assert!(e.contains(needle), "{needle} missing in {e}");
        }
        let e = parse("[monitor]\nsilence_day = 3\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("silence_day"), "{e}");
    }

    #[test]
    fn absolute_paths_are_kept() {
        let c = parse("[paths]\ndatabase = \"/var/lib/lotdrift/x.db\"\n").unwrap();
        assert_eq!(c.paths.database, PathBuf::from("/var/lib/lotdrift/x.db"));
    }
}
