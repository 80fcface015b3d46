//! `lotdrift report --out FILE.html`: the self-contained HTML report (`page::report`).

use std::path::Path;

use anyhow::Context as _;

use super::Failure;
use crate::config::Config;
use crate::page::{model::Scope, report};
use crate::store::Store;

/// Lots per series a report shows at most (the latest of the range).
const MAX_LOTS: i64 = 2_000;

/// A `--from`/`--to` value: a calendar date.
fn date(flag: &str, v: Option<String>) -> Result<Option<String>, Failure> {
    match v {
        None => Ok(None),
        Some(d) => match chrono::NaiveDate::parse_from_str(&d, "%Y-%m-%d") {
            Ok(_) => Ok(Some(d)),
            Err(_) => Err(super::usage(format!(
                "{flag}: expected a date as YYYY-MM-DD, got {d:?}"
            ))),
        },
    }
}

/// Writes the report for `source` (every source when None) and the lots sampled in
/// `from..=to` to `out`.
pub(super) async fn run(
    store: &Store,
    config: &Config,
    out: &Path,
    source: Option<String>,
    from: Option<String>,
    to: Option<String>,
) -> Result<(), Failure> {
    let scope = Scope {
        from: date("--from", from)?,
        to: date("--to", to)?,
        max_lots: MAX_LOTS,
        source,
    };
    if let Some(s) = &scope.source
        && !store.source_exists(s).await.context("report")?
    {
        return Err(super::usage(format!(
            "--source: no source named {s:?} is stored"
        )));
    }
    let html = report::render(store, config, &scope)
        .await
        .context("report")?;
    std::fs::write(out, html).with_context(|| format!("writing {}", out.display()))?;
    say!("report written to {}", out.display());
    Ok(())
}
