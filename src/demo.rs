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
            say!("    {}", reason.lines().next().unwrap_or(""));
        }
    }
    say!();
    say!(
        "Evaluation: each series' first {} lots form its baseline; {} later tests (lot mean \
         against the baseline lot means, spread, CUSUM) under a budget of one false alert per \
         {} lots per series.",
        config.monitor.baseline_lots,
        r.engine.evaluations,
        config.monitor.false_alert_lots
    );
    let alerts = store.alerts(false).await.context("demo alerts")?;
    say!("Alerts ({} opened):", alerts.len());
    say_part!("{}", indent(&report::alerts_text(&alerts, &config.units)));
    say!();
    let db = abs(&config.paths.database);
    let cfg = abs(&config_path);
    say!("Database: {}", db.display());
    say!("Next:");
    say!("  lotdrift alerts --config {}", cfg.display());
    say!(
        "  lotdrift history cedar-energy capacity_mah --config {}",
        cfg.display()
    );
    say!("  lotdrift status --json --config {}", cfg.display());
    say!(
        "  lotdrift report --out {} --config {}   # charts and alerts, one HTML file",
        abs(dir).join("report.html").display(),
        cfg.display()
    );
    say!(
        "  sqlite3 {} \"SELECT source, characteristic, lot, kind, test, p_adjusted \
         FROM decision_view WHERE significant = 1\"",
        db.display()
    );
    store.close().await;
    Ok(())
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
