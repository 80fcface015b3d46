//! The self-contained HTML report: every series of a site or of one source, its charts with
//! the engine's limits, the open and recent alerts, and what the engine cannot know.

use minijinja::value::Serde;
use minijinja::{Value, context};

use super::model::{self, Scope};
use crate::config::Config;
use crate::store::{Store, StoreError};

#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    #[error("reading the database for the report")]
    Store(#[from] StoreError),
    #[error("rendering the report")]
    Render(#[from] minijinja::Error),
}

/// The whole report as one HTML document.
pub async fn render(store: &Store, config: &Config, scope: &Scope) -> Result<String, ReportError> {
    let series = model::series_pages(store, config, scope).await?;
    let alerts = model::report_alerts(&store.alerts(false).await?, scope, config);
    let open = alerts.iter().filter(|a| a.state == "open").count();
    let title = match &scope.source {
        Some(s) => format!("Lot drift report: {s}"),
        None => "Lot drift report: every source".to_string(),
    };
    let range = match (&scope.from, &scope.to) {
        (None, None) => "all lots".to_string(),
        (Some(f), None) => format!("lots sampled from {f}"),
        (None, Some(t)) => format!("lots sampled up to {t}"),
        (Some(f), Some(t)) => format!("lots sampled {f} to {t}"),
    };
    let env = super::templates();
    let html = env.get_template("report.html")?.render(context! {
        title,
        scope => range,
        made_at => super::fmt::when(&crate::time::now_rfc3339()),
        version => env!("CARGO_PKG_VERSION"),
        css => super::CSS,
        series => Value::from(Serde(&series)),
        alerts => Value::from(Serde(&alerts)),
        open_alerts => open,
    })?;
    Ok(html)
}
