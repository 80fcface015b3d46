//! lotdrift: watches a folder for incoming-inspection lot files, stores every measurement in
//! SQLite, compares each source's new lots with that source's baseline, and alerts (log or
//! email) when a significant shift appears.
//!
//! The crate follows the data flow, one module per stage:
//!
//! - [`lotfile`]: pure parsing of lot files (CSV, long and wide layouts) into typed lots.
//! - [`intake`]: input profiles: other delimiters, decimal commas, encodings, local times,
//!   column names and workbooks, read into the same typed lots.
//! - [`watch`]: which inbox files are complete (file events, startup scan, periodic rescan).
//! - [`ingest`]: one file end to end: read, hash, parse, store, then archive or quarantine.
//! - [`store`]: the only module that speaks SQL (sqlx, SQLite in WAL mode, embedded migrations).
//! - [`stats`]: pure mathematics (summaries, two-sample tests, multiplicity); no I/O.
//! - [`engine`]: the monitoring policy: baselines, tests, families, alert decisions.
//! - [`alert`]: outbox delivery through the channels (log, SMTP email).
//! - [`report`]: stored state formatted for people and scripts; [`numbers`]: numbers as
//!   people write them (rounded to their scale, p-values as `0.0012` or `< 1e-9`).
//! - [`silence`]: the watch for sources that sent no lot for longer than they usually do.
//! - [`health`]: the daemon says when ingest or delivery is stuck, and when it recovers.
//! - [`config`]: TOML into a typed, validated configuration.
//! - [`daemon`]: the tasks of `lotdrift run` and their shutdown; [`demo`]: the bundled tour.
//! - [`page`]: the HTML report and the dashboard's pages (templates, inline SVG charts with
//!   the engine's own limits); [`web`]: the dashboard served by the daemon.
//! - [`cli`]: the commands; `main.rs` only calls [`cli::main`].

/// `println!` that never panics: a reader that closed its end (`lotdrift history … | head`)
/// is not a failure of ours, so the rest of the output is dropped quietly.
macro_rules! say {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        let _ = writeln!(std::io::stdout(), $($t)*);
    }};
}

/// `print!` that never panics (see [`say!`]).
macro_rules! say_part {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        let _ = write!(std::io::stdout(), $($t)*);
    }};
}

/// `eprintln!` that never panics (see [`say!`]).
macro_rules! warn_line {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        let _ = writeln!(std::io::stderr(), $($t)*);
    }};
}

pub mod alert;
pub mod chart;
pub mod cli;
pub mod config;
pub mod daemon;
pub mod demo;
pub mod digest;
pub mod engine;
pub mod errors;
pub mod health;
pub mod ingest;
pub mod intake;
pub mod lotfile;
pub mod numbers;
pub mod page;
pub mod report;
pub mod silence;
pub mod stats;
pub mod store;
pub mod time;
pub mod watch;
pub mod web;
