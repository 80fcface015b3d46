//! The command line: parses arguments, loads the config, calls the library, prints results.
//!
//! Exit codes are part of the scripting contract: 0 ok, 2 usage or config error (the message
//! names the flag or key), 1 runtime failure. Nothing here decides anything about drift.

use std::io::Read;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use clap::{Args, Parser, Subcommand};
use tokio_util::sync::CancellationToken;

use crate::config::{Config, ConfigError, LogFormat, STARTER};
use crate::daemon;
use crate::demo;
use crate::ingest;
use crate::report;
use crate::stats;
use crate::store::{Location, Store};

mod check_file;
mod conventions;
mod logline;
mod progress;

use conventions::{AlternativeArg, MethodArg, TestArg, name_of, who};
mod html_report;

#[derive(Parser, Debug)]
#[command(
    name = "lotdrift",
    version,
    about = "Watches incoming-inspection lot files and alerts when a source drifts from its baseline"
)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Args, Debug, Clone)]
struct ConfigArg {
    /// The config file (paths in it are relative to it).
    #[arg(
        long,
        value_name = "FILE",
        env = "LOTDRIFT_CONFIG",
        default_value = "lotdrift.toml"
    )]
    config: PathBuf,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Write DIR/lotdrift.toml (commented) and DIR/inbox, archive, quarantine.
    Init {
        dir: PathBuf,
        /// Overwrite an existing lotdrift.toml.
        #[arg(long)]
        force: bool,
    },
    /// Run the daemon: watch the inbox, store, evaluate, alert.
    Run {
        #[command(flatten)]
        config: ConfigArg,
        /// Process what is in the inbox, evaluate, deliver once, and exit.
        #[arg(long)]
        once: bool,
        /// Log as JSON lines (overrides log.format).
        #[arg(long)]
        log_json: bool,
    },
    /// A self-contained tour on the bundled demo data (SQLite, log alerts).
    Demo {
        /// Where to put the demo's config, folders and database.
        #[arg(long, value_name = "DIR", default_value = "lotdrift-demo")]
        dir: PathBuf,
    },
    /// Print the resolved configuration, or every problem in it.
    CheckConfig {
        #[command(flatten)]
        config: ConfigArg,
        /// One object: `ok`, `file`, and `problems` (each naming its key) or a summary.
        #[arg(long)]
        json: bool,
    },
    /// Read a lot file with the input profile it would get and print what would be stored
    /// (lots, characteristics, units, first values with times in UTC) or every problem.
    /// Stores nothing; exit 1 when the file would be refused.
    CheckFile {
        file: PathBuf,
        /// Read with this profile instead of the one the file's name and folder select.
        #[arg(long, value_name = "NAME")]
        profile: Option<String>,
        #[command(flatten)]
        config: ConfigArg,
        #[arg(long)]
        json: bool,
    },
    /// Counts of what is stored, open alerts and undelivered messages.
    Status {
        #[command(flatten)]
        config: ConfigArg,
        #[arg(long)]
        json: bool,
    },
    /// Alerts, newest first.
    Alerts {
        #[command(flatten)]
        config: ConfigArg,
        /// Only open alerts.
        #[arg(long)]
        open: bool,
        #[arg(long)]
        json: bool,
        #[command(subcommand)]
        action: Option<AlertsAction>,
    },
    /// One row per lot of a source, with its summary and decision.
    History {
        source: String,
        characteristic: Option<String>,
        #[command(flatten)]
        config: ConfigArg,
        #[arg(long, conflicts_with = "csv")]
        json: bool,
        #[arg(long)]
        csv: bool,
    },
    /// Store a corrected lot file, replacing values already stored for its lots (audited).
    Replace {
        file: PathBuf,
        /// Why the stored values are replaced (kept with the old values).
        #[arg(long)]
        reason: String,
        /// Who replaces them, for the audit trail (default: the login name).
        #[arg(long, value_name = "NAME")]
        by: Option<String>,
        #[command(flatten)]
        config: ConfigArg,
    },
    /// Write one self-contained HTML report (charts with the decision limits, alerts, what
    /// the engine cannot know) for every source or one source; no network or script needed.
    Report {
        /// The HTML file to write.
        #[arg(long, value_name = "FILE.html")]
        out: PathBuf,
        /// Only this source.
        #[arg(long, value_name = "S")]
        source: Option<String>,
        /// Only lots sampled on or after this date (YYYY-MM-DD).
        #[arg(long, value_name = "DATE")]
        from: Option<String>,
        /// Only lots sampled on or before this date (YYYY-MM-DD).
        #[arg(long, value_name = "DATE")]
        to: Option<String>,
        #[command(flatten)]
        config: ConfigArg,
    },
    /// Show or change a series' baseline (changes are audited; past decisions stay).
    Baseline {
        #[command(subcommand)]
        action: BaselineAction,
    },
    /// Write a consistent copy of the database to FILE (safe while the daemon runs) and check it.
    Backup {
        /// Where to write the copy; must not exist.
        file: PathBuf,
        #[command(flatten)]
        config: ConfigArg,
    },
    /// Copy the SQLite history (paths.database) into an empty PostgreSQL database, in one
    /// transaction checked table by table before it commits. Stop the daemon first: what it
    /// stores after the copy began is not copied.
    MigrateStore {
        /// The PostgreSQL database: postgres://USER@HOST:PORT/DATABASE.
        #[arg(long, value_name = "URL")]
        to: String,
        /// A file whose first line is the password, when LOTDRIFT_DATABASE_PASSWORD is not set
        /// (without either, the URL's).
        #[arg(long, value_name = "FILE")]
        password_file: Option<PathBuf>,
        #[command(flatten)]
        config: ConfigArg,
    },
    /// Two-sample test of two files of numbers, or of two stored sources' lot means.
    Compare(CompareArgs),
    /// Adjust p-values for multiplicity.
    Adjust(AdjustArgs),
    /// Print the shell completion script for SHELL (e.g. `lotdrift completions bash >
    /// /etc/bash_completion.d/lotdrift`).
    Completions {
        #[arg(value_enum)]
        shell: clap_complete::Shell,
    },
    /// Print the man page (roff), or write one page per command into a folder.
    Man {
        /// Write lotdrift.1, lotdrift-run.1, ... into this folder instead.
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
    },
}

#[derive(Subcommand, Debug)]
enum BaselineAction {
    /// The baseline's lots, design and change history.
    Show {
        source: String,
        characteristic: String,
        #[command(flatten)]
        config: ConfigArg,
        #[arg(long)]
        json: bool,
    },
    /// Retire the baseline: the next `monitor.baseline_lots` undecided lots form a new one.
    Reset {
        source: String,
        characteristic: String,
        #[arg(long)]
        reason: String,
        /// Who resets it, for the audit trail (default: the login name).
        #[arg(long, value_name = "NAME")]
        by: Option<String>,
        #[command(flatten)]
        config: ConfigArg,
    },
    /// Freeze a new baseline from chosen lots (a list, or a sampling-date range).
    Set {
        source: String,
        characteristic: String,
        /// Lot codes, comma-separated.
        #[arg(long, value_delimiter = ',', conflicts_with_all = ["from", "to"])]
        lots: Vec<String>,
        /// First sampling date (RFC 3339 date or date-time), inclusive.
        #[arg(long)]
        from: Option<String>,
        /// Last sampling date, inclusive.
        #[arg(long)]
        to: Option<String>,
        #[arg(long)]
        reason: String,
        /// Who sets it, for the audit trail (default: the login name).
        #[arg(long, value_name = "NAME")]
        by: Option<String>,
        #[command(flatten)]
        config: ConfigArg,
    },
}

#[derive(Subcommand, Debug)]
enum AlertsAction {
    /// Record that someone has seen an alert and why (kept with the alert; every
    /// acknowledgement stays in the audit table alert_ack).
    Ack {
        id: i64,
        #[arg(long)]
        note: String,
        /// Who acknowledges, for the audit trail (default: the login name).
        #[arg(long, value_name = "NAME")]
        by: Option<String>,
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
    },
    /// Send a test message to the configured recipients and print what the server replied.
    TestEmail {
        /// The config file (default: the one given to `alerts`, else ./lotdrift.toml).
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
        /// An array: `recipient`, `accepted`, `reply` (the server's reply or the error).
        #[arg(long)]
        json: bool,
    },
}

#[derive(Args, Debug)]
struct CompareArgs {
    /// Two stored sources to compare (SOURCE_A SOURCE_B), instead of --a/--b files: each
    /// lot's mean is one observation, so lots count as lots, not as independent units.
    #[arg(num_args = 2, value_names = ["SOURCE_A", "SOURCE_B"], conflicts_with_all = ["a", "b"])]
    sources: Vec<String>,
    /// With two sources: the characteristic to compare.
    #[arg(long, requires = "sources")]
    characteristic: Option<String>,
    /// With two sources: the window, the latest N lots of each (default: all).
    #[arg(long, value_name = "N", requires = "sources")]
    lots: Option<usize>,
    /// With two sources: the config file.
    #[arg(
        long,
        value_name = "FILE",
        env = "LOTDRIFT_CONFIG",
        default_value = "lotdrift.toml"
    )]
    config: PathBuf,
    /// Sample a: numbers separated by newlines, commas or spaces.
    #[arg(long, value_name = "FILE", required_unless_present = "sources")]
    a: Option<PathBuf>,
    /// Sample b.
    #[arg(long, value_name = "FILE", required_unless_present = "sources")]
    b: Option<PathBuf>,
    /// The test.
    #[arg(long, value_enum, ignore_case = true, default_value_t = TestArg::Welch)]
    test: TestArg,
    /// The alternative hypothesis, for a − b.
    #[arg(long, value_enum, ignore_case = true, default_value_t = AlternativeArg::TwoSided)]
    alternative: AlternativeArg,
    /// Hypothesised difference of means a − b (t tests).
    #[arg(long, default_value_t = 0.0, allow_negative_numbers = true)]
    delta: f64,
    /// Significance level for the decision and 1 − confidence of the interval.
    #[arg(long, default_value_t = 0.05)]
    alpha: f64,
    #[arg(long)]
    json: bool,
}

#[derive(Args, Debug)]
struct AdjustArgs {
    /// The adjustment.
    #[arg(long, value_enum, ignore_case = true)]
    method: MethodArg,
    /// Level for the reject decisions.
    #[arg(long, default_value_t = 0.05)]
    level: f64,
    /// File of p-values (newlines, commas or spaces); - or absent for standard input.
    file: Option<PathBuf>,
    #[arg(long)]
    json: bool,
}

/// A failure with the exit code it maps to.
#[derive(Debug)]
pub enum Failure {
    /// Usage or config error: exit 2.
    Usage(anyhow::Error),
    /// Runtime failure: exit 1.
    Runtime(anyhow::Error),
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure::Runtime(e)
    }
}

impl From<ConfigError> for Failure {
    fn from(e: ConfigError) -> Self {
        Failure::Usage(e.into())
    }
}

fn usage(msg: impl std::fmt::Display) -> Failure {
    Failure::Usage(anyhow::anyhow!("{msg}"))
}

/// Entry point of the binary.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            warn_line!("lotdrift: cannot start the runtime: {e}");
            return ExitCode::from(1);
        }
    };
    match runtime.block_on(dispatch(cli.command)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::Usage(e)) => {
            warn_line!(
                "lotdrift: {}",
                crate::errors::join(e.chain().map(|c| c.to_string()))
            );
            ExitCode::from(2)
        }
        Err(Failure::Runtime(e)) => {
            warn_line!(
                "lotdrift: {}",
                crate::errors::join(e.chain().map(|c| c.to_string()))
            );
            ExitCode::from(1)
        }
    }
}

fn init_tracing(format: LogFormat, level: &str) {
    init_tracing_for(
        format,
        level,
        std::io::IsTerminal::is_terminal(&std::io::stderr()),
    );
}

/// Logs of `format` at `level`; text `for_people` is wrapped to the terminal's width
/// (`logline`), else one line per event as tracing writes it.
fn init_tracing_for(format: LogFormat, level: &str, for_people: bool) {
    let builder = tracing_subscriber::fmt()
        .with_env_filter(conventions::log_filter(level))
        // Colour codes only on a terminal (and not with NO_COLOR): a log file or journal
        // gets plain text.
        .with_ansi(conventions::colour_on_stderr())
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Json => builder.json().try_init(),
        LogFormat::Text if for_people => builder.event_format(wrapped()).try_init(),
        LogFormat::Text => builder.try_init(),
    };
}

/// Text log lines wrapped to the terminal's width (100 columns when it is not known).
fn wrapped() -> logline::Wrapped {
    logline::Wrapped {
        width: usize::from(report::width()),
    }
}

/// Text logs with the progress line of `run --once` below them: the per-batch lines become
/// the progress line instead of scrolling by.
fn init_tracing_with_progress(level: &str, progress: &progress::Progress) {
    use tracing_subscriber::prelude::*;
    let lines = tracing_subscriber::fmt::layer()
        .event_format(wrapped())
        .with_ansi(conventions::colour_on_stderr())
        .with_writer(progress.writer())
        .with_filter(tracing_subscriber::filter::filter_fn(|meta| {
            meta.fields().field("taken").is_none()
        }));
    let _ = tracing_subscriber::registry()
        .with(conventions::log_filter(level))
        .with(lines)
        .with(progress.layer())
        .try_init();
}

fn load(arg: &ConfigArg) -> Result<Config, Failure> {
    Ok(Config::load(&arg.config)?)
}

/// Opens the history the config names: the PostgreSQL database of `[database]`, else the
/// SQLite file of `paths.database`.
async fn open_store(config: &Config) -> Result<Store, Failure> {
    let opened = match &config.database {
        None => Store::connect(Location::Sqlite(&config.paths.database), &config.site).await,
        Some(pg) => {
            let password = pg.password().map_err(|e| Failure::Runtime(e.into()))?;
            let location = Location::Postgres {
                url: &pg.url,
                password: password.as_deref(),
            };
            let key = format!("database.url in {}", config.file.display());
            return Store::connect(location, &config.site)
                .await
                .map_err(|e| Failure::Runtime(anyhow::Error::new(e).context(key)));
        }
    };
    opened.map_err(|e| Failure::Runtime(e.into()))
}

/// Opens the database for a read command; a database that does not exist yet is an error
/// rather than silently created in the wrong place.
async fn open_existing(config: &Config) -> Result<Store, Failure> {
    if config.database.is_none() && !config.paths.database.exists() {
        return Err(Failure::Runtime(anyhow::anyhow!(
            "no database at {} (run `lotdrift run` first, or check paths.database in {})",
            config.paths.database.display(),
            config.file.display()
        )));
    }
    open_store(config).await
}

fn print_json(v: &serde_json::Value) {
    say!(
        "{}",
        serde_json::to_string_pretty(v).expect("JSON values serialise")
    );
}

async fn dispatch(command: Command) -> Result<(), Failure> {
    match command {
        Command::Init { dir, force } => init(&dir, force),
        Command::Run {
            config,
            once,
            log_json,
        } => {
            let config = load(&config)?;
            let format = if log_json {
                LogFormat::Json
            } else {
                config.log.format
            };
            let progress = (once
                && format == LogFormat::Text
                && std::io::IsTerminal::is_terminal(&std::io::stderr()))
            .then(progress::Progress::new);
            match &progress {
                Some(p) => init_tracing_with_progress(&config.log.level, p),
                None => init_tracing(format, &config.log.level),
            }
            let store = open_store(&config).await?;
            store
                .set_units(&config.units)
                .await
                .context("recording the units of measure")?;
            if once {
                let r = daemon::run_once(&store, &config).await;
                if let Some(p) = &progress {
                    p.finish();
                }
                let r = r.context("run --once")?;
                tracing::info!(
                    stored = r.ingest.stored(),
                    duplicates = r.ingest.duplicates(),
                    quarantined = r.ingest.quarantined(),
                    tests = r.engine.evaluations,
                    alerts_opened = r.engine.opened,
                    silences_opened = r.silence.opened,
                    silences_resolved = r.silence.resolved,
                    delivered = r.delivery.delivered,
                    retrying = r.delivery.retrying,
                    "done"
                );
                store.close().await;
                Ok(())
            } else {
                let store = Arc::new(store);
                let result =
                    daemon::run(store.clone(), Arc::new(config), CancellationToken::new()).await;
                if let Ok(store) = Arc::try_unwrap(store) {
                    store.close().await;
                }
                result.context("daemon")?;
                Ok(())
            }
        }
        Command::Demo { dir } => {
            // The demo is read by a person, on a terminal or not.
            init_tracing_for(LogFormat::Text, "warn", true);
            demo::run(&dir).await
        }
        Command::CheckConfig { config, json } => check_config(&config, json),
        Command::CheckFile {
            file,
            profile,
            config,
            json,
        } => {
            let config = load(&config)?;
            check_file::run(&config, &file, profile.as_deref(), json)
        }
        Command::Status { config, json } => status(&load(&config)?, json).await,
        Command::Alerts {
            action: Some(AlertsAction::TestEmail { config: own, json }),
            config,
            ..
        } => {
            let config = load(&own.map_or(config, |config| ConfigArg { config }))?;
            let sent = crate::alert::test_email(&config)
                .await
                .map_err(|e| Failure::Usage(e.into()))?;
            if json {
                print_json(&report::test_email_json(&sent));
            } else {
                say_part!("{}", crate::alert::test_email_text(&sent));
            }
            match sent.iter().filter(|d| d.outcome.is_err()).count() {
                0 => Ok(()),
                n => Err(Failure::Runtime(anyhow::anyhow!(
                    "test message not accepted for {n} of {} recipient(s)",
                    sent.len()
                ))),
            }
        }
        Command::Alerts {
            action:
                Some(AlertsAction::Ack {
                    id,
                    note,
                    by,
                    config: own,
                }),
            config,
            ..
        } => {
            let config = load(&own.map_or(config, |config| ConfigArg { config }))?;
            if note.trim().is_empty() {
                return Err(usage("--note must say what was done or decided"));
            }
            let by = who(by.as_deref())?;
            let store = open_existing(&config).await?;
            let at = crate::time::now_rfc3339();
            if !store
                .acknowledge(id, &by, &at, &note)
                .await
                .context("alerts ack")?
            {
                return Err(Failure::Runtime(anyhow::anyhow!("no alert with id {id}")));
            }
            say!("alert {id} acknowledged by {by} at {at}");
            store.close().await;
            Ok(())
        }
        Command::Alerts {
            config, open, json, ..
        } => {
            let config = load(&config)?;
            let store = open_existing(&config).await?;
            let alerts = store.alerts(open).await.context("alerts")?;
            if json {
                print_json(&report::alerts_json(&alerts, &config.units));
            } else {
                say_part!("{}", report::alerts_text(&alerts, &config.units));
            }
            Ok(())
        }
        Command::History {
            source,
            characteristic,
            config,
            json,
            csv,
        } => {
            let config = load(&config)?;
            let store = open_existing(&config).await?;
            if !store.source_exists(&source).await.context("history")? {
                return Err(Failure::Runtime(anyhow::anyhow!(
                    "no source named {source:?} is stored"
                )));
            }
            let format = match (json, csv) {
                (true, _) => report::HistoryFormat::Json,
                (_, true) => report::HistoryFormat::Csv,
                _ => report::HistoryFormat::Text {
                    width: report::width(),
                },
            };
            // Lots go out as they are read. A closed standard output (`| head`) ends the read
            // early and is not a failure, as with every other command's output.
            let out = std::io::BufWriter::new(std::io::stdout().lock());
            let mut writer = report::HistoryWriter::new(format, &config.units, out);
            let written = store
                .history_each(&source, characteristic.as_deref(), |lot| writer.lot(lot))
                .await
                .context("history")?;
            if written.is_ok() {
                let _ = writer.finish();
            }
            Ok(())
        }
        Command::Replace {
            file,
            reason,
            by,
            config,
        } => {
            let config = load(&config)?;
            if reason.trim().is_empty() {
                return Err(usage("--reason must say why the values are replaced"));
            }
            let by = who(by.as_deref())?;
            init_tracing(config.log.format, &config.log.level);
            let store = open_store(&config).await?;
            let why = crate::store::Replacement {
                reason: &reason,
                by: &by,
            };
            replace(&store, &config, &file, &why).await?;
            store.close().await;
            Ok(())
        }
        Command::Baseline { action } => baseline(action).await,
        Command::Compare(args) => {
            if args.sources.is_empty() {
                let a = read_numbers(args.a.as_deref(), "--a")?;
                let b = read_numbers(args.b.as_deref(), "--b")?;
                compare(args, a, b)
            } else {
                let (a, b) = source_lot_means(&args).await?;
                if !args.json {
                    say!(
                        "lot means of {} ({} lots) against {} ({} lots), {}",
                        args.sources[0],
                        a.len(),
                        args.sources[1],
                        b.len(),
                        args.characteristic.as_deref().unwrap_or_default()
                    );
                }
                compare(args, a, b)
            }
        }
        Command::Adjust(args) => adjust(args),
        Command::Backup { file, config } => backup(&load(&config)?, &file).await,
        Command::MigrateStore {
            to,
            password_file,
            config,
        } => migrate_store(&load(&config)?, to, password_file).await,
        Command::Report {
            out,
            source,
            from,
            to,
            config,
        } => {
            let config = load(&config)?;
            let store = open_existing(&config).await?;
            html_report::run(&store, &config, &out, source, from, to).await
        }
        Command::Completions { shell } => {
            conventions::completions(shell);
            Ok(())
        }
        Command::Man { out } => conventions::man(out.as_deref()),
    }
}

/// `lotdrift check-config`: the resolved configuration, or every problem (exit 2).
fn check_config(arg: &ConfigArg, json: bool) -> Result<(), Failure> {
    match Config::load(&arg.config) {
        Ok(c) if json => {
            print_json(&serde_json::json!(report::CheckConfigJson::of(&c)));
            Ok(())
        }
        Ok(c) => {
            say!("{c:#?}");
            Ok(())
        }
        Err(e) => {
            if json {
                let problems = match &e {
                    ConfigError::Invalid { problems, .. } => problems.clone(),
                    other => vec![crate::errors::chain(other)],
                };
                print_json(&serde_json::json!(report::CheckConfigJson::failed(
                    &arg.config,
                    problems
                )));
            }
            Err(e.into())
        }
    }
}

/// `lotdrift status`: counts, undelivered messages, series, silent sources and health.
async fn status(config: &Config, json: bool) -> Result<(), Failure> {
    let store = open_existing(config).await?;
    let counts = store.status().await.context("status")?;
    let undelivered = store.undelivered().await.context("status")?;
    let series = series_status(&store, config).await?;
    let silent = store.silent_sources().await.context("status")?;
    let health = crate::health::status(
        &store.health().await.context("status")?,
        &counts,
        config.health.notice_after,
        chrono::Utc::now(),
    );
    if json {
        print_json(&report::status_json(
            &counts,
            &undelivered,
            &series,
            &silent,
            &health,
        ));
    } else {
        let db = config.history_shown();
        say_part!("{}", report::status_text(&counts, &undelivered, &db));
        say_part!("{}", report::series_text(&series));
        say_part!("{}", report::silent_text(&silent));
        say_part!("{}", report::health_text(&health));
    }
    Ok(())
}

/// Every series with a frozen baseline, as `status` shows it.
async fn series_status(
    store: &Store,
    config: &Config,
) -> Result<Vec<report::SeriesStatus>, Failure> {
    let designs = store.series_designs().await.context("status")?;
    Ok(designs
        .into_iter()
        .map(|(source, characteristic, d)| report::SeriesStatus {
            baseline_cpk: crate::engine::baseline_cpk(&d, &config.monitor, &characteristic)
                .map(|c| [c.cpk, c.low, c.high]),
            detectable_shift: crate::engine::detectable_shift(&d, &config.monitor, &characteristic),
            unit: config.unit(&characteristic).map(String::from),
            source,
            characteristic,
            baseline_lots: d.re.m,
            baseline_mean: d.re.mean_of_means,
            between_lot_sd: d.re.var_between.sqrt(),
            within_lot_sd: d.re.var_within.sqrt(),
            model: if d.re.var_between > 0.0 {
                "lot-means"
            } else {
                "units"
            },
            level_mean: d.level_mean,
            cusum_h: d.cusum.map(|c| c.1),
            normality_p: d.normality_p,
            test: if crate::engine::distribution_free(&d) {
                "mann-whitney"
            } else {
                "lot-mean-t"
            },
        })
        .collect())
}

fn init(dir: &Path, force: bool) -> Result<(), Failure> {
    let file = dir.join("lotdrift.toml");
    if file.exists() && !force {
        return Err(usage(format!(
            "{} exists already (use --force to overwrite)",
            file.display()
        )));
    }
    for sub in ["inbox", "archive", "quarantine"] {
        std::fs::create_dir_all(dir.join(sub))
            .with_context(|| format!("creating {}", dir.join(sub).display()))?;
    }
    std::fs::write(&file, STARTER).with_context(|| format!("writing {}", file.display()))?;
    say!("wrote {}", file.display());
    say!(
        "drop lot files in {}, then run: lotdrift run --config {}",
        dir.join("inbox").display(),
        file.display()
    );
    Ok(())
}

/// `lotdrift backup FILE`: `VACUUM INTO` a new file, then check the copy and print it.
async fn backup(config: &Config, file: &Path) -> Result<(), Failure> {
    if std::fs::symlink_metadata(file).is_ok() {
        return Err(usage(format!(
            "{} exists; a backup never overwrites a file (choose a new name)",
            file.display()
        )));
    }
    let store = open_existing(config).await?;
    let written = store.backup_into(file).await;
    store.close().await;
    written.context("backup")?;
    let check = Store::check_copy(file).await.context("backup")?;
    if check.integrity != "ok" {
        return Err(Failure::Runtime(anyhow::anyhow!(
            "the backup {} failed its integrity check:\n{}",
            file.display(),
            check.integrity
        )));
    }
    let size = std::fs::metadata(file)
        .with_context(|| format!("reading the size of the backup {}", file.display()))?
        .len();
    say!(
        "backup written to {} ({size} bytes; integrity ok): {} lots, {} measurements",
        file.display(),
        check.lots,
        check.measurements
    );
    Ok(())
}

/// `lotdrift migrate-store --to URL`: the SQLite history of the config into an empty
/// PostgreSQL database; one line per table, then what to change in the config.
async fn migrate_store(
    config: &Config,
    url: String,
    password_file: Option<PathBuf>,
) -> Result<(), Failure> {
    if let Some(pg) = &config.database {
        return Err(usage(format!(
            "{} already uses the PostgreSQL history {} ([database] url); migrate-store copies \
             the SQLite file of paths.database: remove [database] to copy it",
            config.file.display(),
            crate::config::redacted(&pg.url)
        )));
    }
    if !config.paths.database.is_file() {
        return Err(Failure::Runtime(anyhow::anyhow!(
            "no SQLite history at {} (check paths.database in {})",
            config.paths.database.display(),
            config.file.display()
        )));
    }
    let target = crate::config::Postgres { url, password_file };
    let password = target.password().map_err(|e| usage(e.to_string()))?;
    let report = crate::store::copy_sqlite_to_postgres(
        &config.paths.database,
        &target.url,
        password.as_deref(),
    )
    .await
    .context("migrate-store")?;
    for t in report.tables.iter().chain([&report.values]) {
        say!(
            "{:<22} {:>10} rows  sha256 {}",
            t.table,
            t.rows,
            &t.checksum[..16]
        );
    }
    say!(
        "copied {} into {}; set [database] url = \"{}\" in {} (with the password in \
         LOTDRIFT_DATABASE_PASSWORD or database.password_file) to use it",
        config.paths.database.display(),
        crate::config::redacted(&target.url),
        crate::config::redacted(&target.url),
        config.file.display()
    );
    Ok(())
}

async fn replace(
    store: &Store,
    config: &Config,
    file: &Path,
    why: &crate::store::Replacement<'_>,
) -> Result<(), Failure> {
    let bytes = std::fs::read(file).with_context(|| format!("reading {}", file.display()))?;
    let name = file
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let profile = check_file::profile_for(config, file);
    let parsed = ingest::build_file_as(&name, &ingest::content_hash(&bytes), &bytes, profile)
        .map_err(|e| Failure::Runtime(anyhow::anyhow!("{e}")))?;
    let outcome = store
        .ingest_batch(&[parsed], &crate::time::now_rfc3339(), Some(why))
        .await
        .context("replace")?;
    match &outcome[0] {
        crate::store::FileOutcome::Stored { samples, .. } => {
            say!("stored {samples} sample(s) from {}", file.display());
        }
        crate::store::FileOutcome::Duplicate { first_name } => {
            say!(
                "{} is already stored (as {first_name}); nothing changed",
                file.display()
            );
        }
        crate::store::FileOutcome::Conflict(_) => {
            return Err(Failure::Runtime(anyhow::anyhow!(
                "unexpected conflict while replacing"
            )));
        }
    }
    crate::engine::evaluate(store, config)
        .await
        .context("evaluating after replace")?;
    // A quarantined copy of the same file has done its job.
    let quarantined = config.paths.quarantine.join(&name);
    if quarantined.exists() && std::fs::read(&quarantined).ok().as_deref() == Some(&bytes[..]) {
        let _ = std::fs::remove_file(ingest::reason_path_for(&quarantined));
        let _ = std::fs::remove_file(&quarantined);
    }
    Ok(())
}

async fn baseline(action: BaselineAction) -> Result<(), Failure> {
    let (source, characteristic, config) = match &action {
        BaselineAction::Show {
            source,
            characteristic,
            config,
            ..
        }
        | BaselineAction::Reset {
            source,
            characteristic,
            config,
            ..
        }
        | BaselineAction::Set {
            source,
            characteristic,
            config,
            ..
        } => (source.clone(), characteristic.clone(), load(config)?),
    };
    let store = open_existing(&config).await?;
    let Some(series) = store
        .series_named(&source, &characteristic)
        .await
        .context("baseline")?
    else {
        return Err(Failure::Runtime(anyhow::anyhow!(
            "no series {source:?} / {characteristic:?} is stored"
        )));
    };
    let by = match &action {
        BaselineAction::Reset { by, .. } | BaselineAction::Set { by, .. } => who(by.as_deref())?,
        BaselineAction::Show { .. } => String::new(),
    };
    let at = crate::time::now_rfc3339();
    match action {
        BaselineAction::Show { json, .. } => {
            baseline_show(&store, &config, series, (&source, &characteristic), json).await?;
        }
        BaselineAction::Reset { reason, .. } => {
            if reason.trim().is_empty() {
                return Err(usage("--reason must say why the baseline is reset"));
            }
            let definition = format!(
                "next {} undecided lots after {at}",
                config.monitor.baseline_lots
            );
            store
                .change_baseline(series, None, &definition, &by, &reason, &at)
                .await
                .context("baseline reset")?;
            say!("{source} / {characteristic}: baseline retired; {definition} form the next");
        }
        BaselineAction::Set {
            lots,
            from,
            to,
            reason,
            ..
        } => {
            if reason.trim().is_empty() {
                return Err(usage("--reason must say why the baseline changes"));
            }
            let all = store.series_samples(series).await.context("baseline")?;
            let (chosen, definition): (Vec<_>, String) = if !lots.is_empty() {
                let missing: Vec<&String> = lots
                    .iter()
                    .filter(|l| !all.iter().any(|s| &s.lot == *l))
                    .collect();
                if !missing.is_empty() {
                    return Err(usage(format!(
                        "--lots: not stored for this series: {missing:?}"
                    )));
                }
                (
                    all.iter()
                        .filter(|s| lots.contains(&s.lot))
                        .cloned()
                        .collect(),
                    format!("lots {}", lots.join(",")),
                )
            } else {
                let (Some(from), Some(to)) = (from, to) else {
                    return Err(usage("give --lots, or both --from and --to"));
                };
                let bound = |v: &str, key: &str, end: bool| -> Result<String, Failure> {
                    if v.len() == 10 {
                        chrono::NaiveDate::parse_from_str(v, "%Y-%m-%d").map_err(|_| {
                            usage(format!("{key}: {v:?} is not a date (YYYY-MM-DD)"))
                        })?;
                        Ok(format!(
                            "{v}T{}",
                            if end {
                                "23:59:59.999Z"
                            } else {
                                "00:00:00.000Z"
                            }
                        ))
                    } else {
                        crate::time::parse_utc(v)
                            .map(crate::time::format_utc)
                            .ok_or_else(|| usage(format!("{key}: {v:?} is not an RFC 3339 date")))
                    }
                };
                let (lo, hi) = (bound(&from, "--from", false)?, bound(&to, "--to", true)?);
                if lo > hi {
                    return Err(usage(format!("--from {from} is after --to {to}")));
                }
                (
                    all.iter()
                        .filter(|s| s.order_time >= lo && s.order_time <= hi)
                        .cloned()
                        .collect(),
                    format!("lots sampled {from} to {to}"),
                )
            };
            if chosen.len() < 3 {
                return Err(usage(format!(
                    "a baseline needs at least 3 lots; {} chosen",
                    chosen.len()
                )));
            }
            let summaries: Vec<crate::stats::Summary> = chosen.iter().map(|s| s.summary).collect();
            let ids: Vec<i64> = chosen.iter().map(|s| s.sample_id).collect();
            let residuals = store.residuals(&ids, 5000).await.context("baseline")?;
            let design = crate::engine::design(
                &summaries,
                Some(&residuals),
                &config.monitor,
                &characteristic,
                &mut Default::default(),
            )
            .map_err(|e| Failure::Runtime(anyhow::anyhow!("{e}")))?;
            let merged = summaries[1..].iter().fold(summaries[0], |a, s| a.merge(s));
            let new = crate::store::NewBaseline {
                series_id: series,
                definition: definition.clone(),
                sample_ids: ids,
                summary: merged,
                last_order_time: chosen[chosen.len() - 1].order_time.clone(),
                note: crate::engine::design_note(&design, &config.monitor),
                design,
            };
            store
                .change_baseline(series, Some(&new), &definition, &by, &reason, &at)
                .await
                .context("baseline set")?;
            say!("{source} / {characteristic}: new baseline, {definition}");
            say!("design: {}", new.note);
        }
    }
    store.close().await;
    Ok(())
}

/// `baseline show`: the current baseline and every change, as text or JSON.
async fn baseline_show(
    store: &Store,
    config: &Config,
    series: i64,
    (source, characteristic): (&str, &str),
    json: bool,
) -> Result<(), Failure> {
    let baseline = store.baseline_of(series).await.context("baseline")?.map(
        |(definition, design, frozen_at, lots)| report::BaselineNow {
            definition,
            frozen_at,
            lots,
            design,
        },
    );
    let changes = store
        .baseline_changes(series)
        .await
        .context("baseline")?
        .into_iter()
        .map(|(at, by, reason, from, to)| report::BaselineChange {
            at,
            by,
            reason,
            from,
            to,
        })
        .collect();
    let shown = report::BaselineShow {
        source: source.to_string(),
        characteristic: characteristic.to_string(),
        unit: config.unit(characteristic).map(String::from),
        baseline,
        changes,
    };
    if json {
        print_json(&serde_json::json!(shown));
    } else {
        say_part!(
            "{}",
            report::baseline_text(&shown, config.monitor.baseline_lots)
        );
    }
    Ok(())
}

/// Reads numbers separated by newlines, commas, semicolons, tabs or spaces.
fn read_numbers(path: Option<&Path>, what: &str) -> Result<Vec<f64>, Failure> {
    let text = match path {
        Some(p) if p.as_os_str() != "-" => std::fs::read_to_string(p)
            .map_err(|e| usage(format!("{what}: cannot read {}: {e}", p.display())))?,
        _ => {
            let mut s = String::new();
            std::io::stdin()
                .read_to_string(&mut s)
                .map_err(|e| usage(format!("{what}: cannot read standard input: {e}")))?;
            s
        }
    };
    let shown = path.map_or("standard input".to_string(), |p| p.display().to_string());
    let mut out = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        for tok in line
            .split(|c: char| c == ',' || c == ';' || c.is_whitespace())
            .filter(|t| !t.is_empty())
        {
            match tok.parse::<f64>() {
                Ok(v) if v.is_finite() => out.push(v),
                _ => {
                    return Err(usage(format!(
                        "{what} ({shown}), line {}: {tok:?} is not a finite number",
                        i + 1
                    )));
                }
            }
        }
    }
    Ok(out)
}

/// The lot means of two stored sources' series of one characteristic (latest `--lots`).
async fn source_lot_means(args: &CompareArgs) -> Result<(Vec<f64>, Vec<f64>), Failure> {
    let Some(characteristic) = &args.characteristic else {
        return Err(usage(
            "--characteristic: required when comparing two sources",
        ));
    };
    let config = Config::load(&args.config)?;
    let store = open_existing(&config).await?;
    let mut out = Vec::new();
    for source in &args.sources {
        let Some(series) = store
            .series_named(source, characteristic)
            .await
            .context("compare")?
        else {
            return Err(Failure::Runtime(anyhow::anyhow!(
                "no series {source:?} / {characteristic:?} is stored"
            )));
        };
        let samples = store.series_samples(series).await.context("compare")?;
        let skip = args.lots.map_or(0, |n| samples.len().saturating_sub(n));
        out.push(
            samples[skip..]
                .iter()
                .map(|s| s.summary.mean())
                .collect::<Vec<f64>>(),
        );
    }
    store.close().await;
    let b = out.pop().unwrap_or_default();
    let a = out.pop().unwrap_or_default();
    Ok((a, b))
}

fn compare(args: CompareArgs, a: Vec<f64>, b: Vec<f64>) -> Result<(), Failure> {
    let test: stats::compare::TestKind = name_of(args.test)
        .parse()
        .map_err(|e| usage(format!("--test: {e}")))?;
    let alternative: stats::Alternative = name_of(args.alternative)
        .parse()
        .map_err(|e| usage(format!("--alternative: {e}")))?;
    if !(args.alpha > 0.0 && args.alpha < 1.0) {
        return Err(usage(format!(
            "--alpha: must be between 0 and 1 (got {})",
            args.alpha
        )));
    }
    if !args.delta.is_finite() {
        return Err(usage("--delta: must be a finite number"));
    }
    let result = stats::compare::compare(&a, &b, test, alternative, args.delta, args.alpha)
        .map_err(|e| Failure::Runtime(anyhow::anyhow!("{e}")))?;
    if args.json {
        print_json(&report::compare_json(&result, args.alpha));
    } else {
        say_part!("{}", report::compare_text(&result, args.alpha));
    }
    Ok(())
}

fn adjust(args: AdjustArgs) -> Result<(), Failure> {
    let method_name = name_of(args.method);
    let method: stats::multiplicity::Method = method_name
        .parse()
        .map_err(|e| usage(format!("--method: {e}")))?;
    if !(args.level > 0.0 && args.level < 1.0) {
        return Err(usage(format!(
            "--level: must be between 0 and 1 (got {})",
            args.level
        )));
    }
    let p = read_numbers(args.file.as_deref(), "p-values")?;
    let adjusted =
        stats::multiplicity::adjust(&p, method).map_err(|e| usage(format!("p-values: {e}")))?;
    let reject = stats::multiplicity::reject(&adjusted, args.level);
    if args.json {
        print_json(&serde_json::json!(report::AdjustJson {
            method: &method_name,
            level: args.level,
            adjusted: &adjusted,
            reject: &reject,
        }));
    } else {
        let rows: Vec<Vec<String>> = p
            .iter()
            .zip(&adjusted)
            .zip(&reject)
            .map(|((p, a), r)| {
                vec![
                    format!("{p}"),
                    format!("{a:.6}"),
                    if *r { "reject".into() } else { "".into() },
                ]
            })
            .collect();
        say_part!(
            "{}",
            report::table(&["p", "adjusted", &format!("at {}", args.level)], &rows)
        );
    }
    Ok(())
}
