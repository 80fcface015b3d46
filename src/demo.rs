//! The demo: the whole job on bundled, invented data, in a folder of its own.
//!
//! Writes a config (from `config/demo.toml`) and the demo lot files (`demo-data/inbox/`,
//! embedded at build time) into the demo folder, runs the pipeline once exactly as
//! `lotdrift run --once` does, and prints what happened and where to look next.

use std::path::Path;

use anyhow::Context;

use crate::cli::Failure;
use crate::config::Config;
use crate::daemon;
use crate::ingest::FileResult;
use crate::report;
use crate::store::Store;

include!(concat!(env!("OUT_DIR"), "/demo_files.rs"));

/// The demo's configuration file.
pub const DEMO_CONFIG: &str = include_str!("../config/demo.toml");

/// Marks a folder as made by the demo, so a second run may clear it.
const MARKER: &str = ".lotdrift-demo";

pub async fn run(dir: &Path) -> Result<(), Failure> {
    prepare(dir)?;
    let config_path = dir.join("lotdrift.toml");
    let config = Config::load(&config_path)?;
    daemon::ensure_folders(&config).context("demo folders")?;
    for (name, bytes) in DEMO_FILES {
        std::fs::write(config.paths.inbox.join(name), bytes)
            .with_context(|| format!("writing demo file {name}"))?;
    }
    let store = Store::open(&config.paths.database)
        .await
        .context("opening the demo database")?;
    store
        .set_units(&config.units)
        .await
        .context("demo units of measure")?;
    let r = daemon::run_once(&store, &config)
        .await
        .context("demo run")?;

    let abs = |p: &Path| std::fs::canonicalize(p).unwrap_or_else(|_| p.to_path_buf());
    let status = store.status().await.context("demo status")?;
    say!("lotdrift demo: 18650 battery cells from three invented suppliers");
    say!();
    say!(
        "Files: {} stored, {} duplicate(s) archived, {} quarantined ({} measurements in {} lots).",
        r.ingest.stored(),
        r.ingest.duplicates(),
        r.ingest.quarantined(),
        status.measurements,
        status.lots
    );
    say!();
    say!("Lots per source:");
    for (source, lots) in store.lots_per_source().await.context("demo")? {
        say!("  {source:<14} {lots}");
    }
    say!();
    say!(
        "Quarantined files (reasons beside them in {}):",
        abs(&config.paths.quarantine).display()
    );
    for (path, result) in &r.ingest.files {
        if let FileResult::Quarantined { reason, .. } = result {
            let name = path.file_name().unwrap_or_default().to_string_lossy();
            say!("  {name}");
            let reason = reason.lines().next().unwrap_or("");
            say_part!(
                "{}",
                report::wrap(&format!("    {reason}"), WIDTH, "      ")
            );
        }
    }
    say!();
    let evaluation = format!(
        "Evaluation: each series' first {} lots form its baseline; {} later tests (lot mean \
         against the baseline lot means, spread, CUSUM) under a budget of one false alert per \
         {} lots per series.",
        config.monitor.baseline_lots, r.engine.evaluations, config.monitor.false_alert_lots
    );
    say_part!("{}", report::wrap(&evaluation, WIDTH, ""));
    let alerts = store.alerts(false).await.context("demo alerts")?;
    say!("Alerts ({} opened):", alerts.len());
    say_part!("{}", indent(&report::alerts_text(&alerts, &config.units)));
    say!();
    say!("Database: {}", abs(&config.paths.database).display());
    say_part!("{}", next_steps(&abs(dir)));
    store.close().await;
    Ok(())
}

/// The width the tour is written for: a terminal of 100 columns shows every line unbroken
/// (only a long path of the user's own may make a line longer).
const WIDTH: usize = 100;

/// Commands to try next, run in the demo folder (so that none repeats its long path).
const NEXT: [&str; 6] = [
    "lotdrift alerts --config lotdrift.toml",
    "lotdrift history cedar-energy capacity_mah --config lotdrift.toml",
    "lotdrift status --json --config lotdrift.toml",
    "lotdrift report --out report.html --config lotdrift.toml   # charts, alerts: one page",
    "sqlite3 lotdrift.db \"SELECT source, characteristic, lot, kind, test, p_adjusted",
    "  FROM decision_view WHERE significant = 1\"",
];

/// What to try next, in the demo folder `dir`.
fn next_steps(dir: &Path) -> String {
    let mut s = format!("Next, in the demo folder:\n  cd {}\n", dir.display());
    for line in NEXT {
        s.push_str(&format!("  {line}\n"));
    }
    s
}

fn indent(s: &str) -> String {
    s.lines().map(|l| format!("  {l}\n")).collect()
}

/// Makes `dir` an empty demo folder with the demo config. Refuses a folder that is not empty
/// and was not made by the demo.
fn prepare(dir: &Path) -> Result<(), Failure> {
    if dir.exists() {
        let is_demo = dir.join(MARKER).exists();
        let empty = std::fs::read_dir(dir)
            .map(|mut d| d.next().is_none())
            .unwrap_or(false);
        if !is_demo && !empty {
            return Err(Failure::Usage(anyhow::anyhow!(
                "--dir {}: the folder exists and was not made by the demo; choose another",
                dir.display()
            )));
        }
        if is_demo {
            std::fs::remove_dir_all(dir)
                .with_context(|| format!("clearing the previous demo in {}", dir.display()))?;
        }
    }
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    std::fs::write(dir.join(MARKER), "made by lotdrift demo; safe to delete\n")
        .context("writing the demo marker")?;
    std::fs::write(dir.join("lotdrift.toml"), DEMO_CONFIG).context("writing the demo config")?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_next_steps_fit_the_tour_width() {
        let next = next_steps(Path::new("/home/engineer/lotdrift-demo"));
        assert!(
            next.contains("\n  cd /home/engineer/lotdrift-demo\n"),
            "{next}"
        );
        assert!(next.lines().all(|l| l.chars().count() <= WIDTH), "{next}");
    }
}
