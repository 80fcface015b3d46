//! The dashboard of the daemon (`[web] listen`): an overview of every series and its state,
//! a page per series with the report's charts and its lots, and the alerts with
//! acknowledgement. Server-rendered HTML (axum, minijinja templates of `page`), no script.
//!
//! **Reads through `store` and formats through `page`; decides nothing.** The only change it
//! can make is an acknowledgement, and that needs both the access token (from
//! `web.token_file`, or a token the daemon writes beside the database on loopback) and the
//! CSRF check: the form's hidden value must equal the `SameSite=Strict` cookie the page set,
//! and a request that names its origin must come from the dashboard's own. On loopback, a
//! request must name the dashboard by a loopback Host (no DNS rebinding). Every name from a
//! lot file is escaped by the templates. Runs under the daemon's cancellation token.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;

use axum::Router;
use axum::extract::{Form, Path, State};
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::{get, post};
use minijinja::value::Serde;
use minijinja::{Value, context};
use tokio_util::sync::CancellationToken;

use crate::config::{Config, Web};
use crate::page::model::{self, Scope};
use crate::store::Store;

#[derive(Debug, thiserror::Error)]
pub enum WebError {
    #[error("cannot listen on {addr} (web.listen)")]
    Bind {
        addr: SocketAddr,
        source: std::io::Error,
    },
    #[error("cannot read the access token from {path} (web.token_file)")]
    Token {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("the dashboard stopped")]
    Serve(#[source] std::io::Error),
}

/// Lots per series a series page shows at most (the latest).
const MAX_LOTS: i64 = 300;

/// The name of the CSRF cookie.
const CSRF_COOKIE: &str = "lotdrift_csrf";

/// What every request handler shares.
struct Shared {
    store: Arc<Store>,
    config: Arc<Config>,
    /// The access token acknowledgements must carry.
    token: String,
    templates: minijinja::Environment<'static>,
}

type AppState = Arc<Shared>;

/// A random value of 32 hex digits (the OS-seeded CSPRNG behind `rand::rng`).
fn random_hex() -> String {
    use rand::Rng as _;
    let bytes: [u8; 16] = rand::rng().random();
    crate::numbers::hex(&bytes)
}

/// The access token: the first line of `web.token_file`, else a new token written to
/// `lotdrift-web.token` beside the database (readable by its owner only).
fn access_token(web: &Web, config: &Config) -> Result<String, WebError> {
    if let Some(path) = &web.token_file {
        let text = std::fs::read_to_string(path).map_err(|source| WebError::Token {
            path: path.clone(),
            source,
        })?;
        return Ok(text.lines().next().unwrap_or_default().trim().to_string());
    }
    let path = config.paths.database.parent().map_or_else(
        || PathBuf::from("lotdrift-web.token"),
        |d| d.join("lotdrift-web.token"),
    );
    let token = random_hex();
    write_private(&path, &format!("{token}\n")).map_err(|source| WebError::Token {
        path: path.clone(),
        source,
    })?;
    tracing::info!(path = %path.display(), "dashboard access token written (acknowledgements need it)");
    Ok(token)
}

fn write_private(path: &std::path::Path, text: &str) -> std::io::Result<()> {
    use std::io::Write as _;
    let mut options = std::fs::OpenOptions::new();
    options.write(true).create(true).truncate(true);
    #[cfg(unix)]
    std::os::unix::fs::OpenOptionsExt::mode(&mut options, 0o600);
    options.open(path)?.write_all(text.as_bytes())
}

/// Binds the dashboard's address (before the daemon's tasks start, so a taken port is an
/// error at start).
pub async fn bind(web: &Web) -> Result<tokio::net::TcpListener, WebError> {
    tokio::net::TcpListener::bind(web.listen)
        .await
        .map_err(|source| WebError::Bind {
            addr: web.listen,
            source,
        })
}

/// Serves the dashboard on `listener` until `cancel`.
pub async fn serve(
    listener: tokio::net::TcpListener,
    store: Arc<Store>,
    config: Arc<Config>,
    web: Web,
    cancel: CancellationToken,
) -> Result<(), WebError> {
    let token = access_token(&web, &config)?;
    let shared = Arc::new(Shared {
        store,
        config,
        token,
        templates: crate::page::templates(),
    });
    tracing::info!(address = %web.listen, "dashboard listening");
    axum::serve(listener, router(shared, web.listen))
        .with_graceful_shutdown(cancel.cancelled_owned())
        .await
        .map_err(WebError::Serve)
}

/// On a loopback address, the Host names a request may carry: a page of another site that
/// made its name resolve to 127.0.0.1 (DNS rebinding) must not read the dashboard.
fn allowed_hosts(listen: SocketAddr) -> Option<Vec<String>> {
    if !listen.ip().is_loopback() {
        return None;
    }
    let port = listen.port();
    Some(vec![
        format!("127.0.0.1:{port}"),
        format!("localhost:{port}"),
        format!("[::1]:{port}"),
    ])
}

/// Refuses (421) a request whose Host is not one of `allowed` (when there is such a list).
async fn check_host(
    State(allowed): State<Arc<Option<Vec<String>>>>,
    request: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let host = request
        .headers()
        .get(header::HOST)
        .and_then(|v| v.to_str().ok());
    match (allowed.as_ref(), host) {
        (None, _) => next.run(request).await,
        (Some(list), Some(h)) if list.iter().any(|a| a.eq_ignore_ascii_case(h)) => {
            next.run(request).await
        }
        _ => (
            StatusCode::MISDIRECTED_REQUEST,
            "unknown host name for this dashboard",
        )
            .into_response(),
    }
}

fn router(shared: AppState, listen: SocketAddr) -> Router {
    let hosts = Arc::new(allowed_hosts(listen));
    Router::new()
        .route("/", get(overview))
        .route("/series/{id}", get(series))
        .route("/alerts", get(alerts))
        .route("/alerts/{id}/ack", post(acknowledge))
        .route("/favicon.ico", get(|| async { StatusCode::NO_CONTENT }))
        .layer(axum::middleware::from_fn_with_state(hosts, check_host))
        .with_state(shared)
}

/// The CSRF value of the request's cookie, if it has one.
fn csrf_cookie(headers: &HeaderMap) -> Option<String> {
    headers
        .get_all(header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(';'))
        .filter_map(|kv| kv.trim().split_once('='))
        .find(|(k, v)| {
            *k == CSRF_COOKIE && v.len() == 32 && v.bytes().all(|b| b.is_ascii_hexdigit())
        })
        .map(|(_, v)| v.to_string())
}

/// A page: the template `dashboard.html` with `ctx`, the CSRF cookie set when the request
/// had none, and headers that keep the page from loading or running anything else.
fn page(shared: &Shared, headers: &HeaderMap, status: StatusCode, ctx: Value) -> Response {
    let csrf = csrf_cookie(headers);
    let fresh = csrf.is_none();
    let csrf = csrf.unwrap_or_else(random_hex);
    let ctx = context! { ack => context! { csrf => csrf.clone() }, css => crate::page::CSS, ..ctx };
    let body = match shared
        .templates
        .get_template("dashboard.html")
        .and_then(|t| t.render(ctx))
    {
        Ok(b) => b,
        Err(e) => {
            tracing::error!(error = %e, "dashboard page failed");
            return (StatusCode::INTERNAL_SERVER_ERROR, "page failed").into_response();
        }
    };
    let mut r = (status, Html(body)).into_response();
    let h = r.headers_mut();
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(
            "default-src 'none'; style-src 'unsafe-inline'; img-src data:; \
             form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
        ),
    );
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    if fresh
        && let Ok(v) = HeaderValue::from_str(&format!(
            "{CSRF_COOKIE}={csrf}; Path=/; HttpOnly; SameSite=Strict"
        ))
    {
        h.insert(header::SET_COOKIE, v);
    }
    r
}

fn failed(shared: &Shared, headers: &HeaderMap, e: impl std::fmt::Display) -> Response {
    tracing::error!(error = %e, "dashboard cannot read the database");
    let ctx = context! { title => "Dashboard", page => "none", message => "The database could not be read; see the daemon's log.", bad => true };
    page(shared, headers, StatusCode::INTERNAL_SERVER_ERROR, ctx)
}

fn now() -> String {
    crate::page::fmt::when(&crate::time::now_rfc3339())
}

async fn overview(State(shared): State<AppState>, headers: HeaderMap) -> Response {
    let rows = match shared.store.series_list(None).await {
        Ok(r) => r,
        Err(e) => return failed(&shared, &headers, crate::errors::chain(&e)),
    };
    let series: Vec<_> = rows
        .into_iter()
        .map(|r| model::brief(r, &shared.config))
        .collect();
    let alerts = match shared.store.alerts(true).await {
        Ok(a) => model::alert_lines(&a, &Scope::default(), &shared.config),
        Err(e) => return failed(&shared, &headers, crate::errors::chain(&e)),
    };
    let ctx = context! {
        title => "Overview", page => "overview", made_at => now(),
        series => Value::from(Serde(&series)), alerts => Value::from(Serde(&alerts)),
    };
    page(&shared, &headers, StatusCode::OK, ctx)
}

async fn series(
    State(shared): State<AppState>,
    Path(id): Path<i64>,
    headers: HeaderMap,
) -> Response {
    let row = match shared.store.series_list(None).await {
        Ok(rows) => rows.into_iter().find(|r| r.id == id),
        Err(e) => return failed(&shared, &headers, crate::errors::chain(&e)),
    };
    let Some(row) = row else {
        let ctx = context! { title => "Not found", page => "none", message => format!("No series {id}."), bad => true };
        return page(&shared, &headers, StatusCode::NOT_FOUND, ctx);
    };
    let scope = Scope {
        source: Some(row.source.clone()),
        max_lots: MAX_LOTS,
        ..Scope::default()
    };
    let (source, characteristic) = (row.source.clone(), row.characteristic.clone());
    let s = match model::series_page(&shared.store, &shared.config, &scope, row).await {
        Ok(s) => s,
        Err(e) => return failed(&shared, &headers, crate::errors::chain(&e)),
    };
    let alerts = match shared.store.alerts(false).await {
        Ok(a) => model::alert_lines(&a, &scope, &shared.config),
        Err(e) => return failed(&shared, &headers, crate::errors::chain(&e)),
    };
    let alerts: Vec<_> = alerts
        .into_iter()
        .filter(|a| a.characteristic == characteristic && a.source == source)
        .collect();
    let ctx = context! {
        title => format!("{source} · {characteristic}"), page => "series", made_at => now(),
        s => Value::from(Serde(&s)), alerts => Value::from(Serde(&alerts)),
    };
    page(&shared, &headers, StatusCode::OK, ctx)
}

async fn alerts(State(shared): State<AppState>, headers: HeaderMap) -> Response {
    alerts_page(&shared, &headers, StatusCode::OK, None).await
}

async fn alerts_page(
    shared: &Shared,
    headers: &HeaderMap,
    status: StatusCode,
    message: Option<(String, bool)>,
) -> Response {
    let alerts = match shared.store.alerts(false).await {
        Ok(a) => model::alert_lines(&a, &Scope::default(), &shared.config),
        Err(e) => return failed(shared, headers, crate::errors::chain(&e)),
    };
    let (message, bad) = message.unzip();
    let ctx = context! {
        title => "Alerts", page => "alerts", made_at => now(),
        alerts => Value::from(Serde(&alerts)), message, bad,
    };
    page(shared, headers, status, ctx)
}

/// The acknowledgement form.
#[derive(Debug, serde::Deserialize)]
struct AckForm {
    csrf: String,
    #[serde(default)]
    token: String,
    by: String,
    #[serde(default)]
    note: String,
}

/// Equal strings, compared in time that does not depend on where they differ.
fn same_secret(a: &str, b: &str) -> bool {
    a.len() == b.len()
        && a.bytes()
            .zip(b.bytes())
            .fold(0u8, |acc, (x, y)| acc | (x ^ y))
            == 0
}

/// A request that names its origin must name the dashboard's own (the Host it was sent to).
fn same_origin(headers: &HeaderMap) -> bool {
    let Some(origin) = headers.get(header::ORIGIN).and_then(|v| v.to_str().ok()) else {
        return true;
    };
    let host = headers.get(header::HOST).and_then(|v| v.to_str().ok());
    let stripped = origin
        .strip_prefix("http://")
        .or_else(|| origin.strip_prefix("https://"));
    matches!((stripped, host), (Some(o), Some(h)) if o == h)
}

/// Why an acknowledgement is refused, if it is.
fn refusal(shared: &Shared, headers: &HeaderMap, form: &AckForm) -> Option<&'static str> {
    let cookie = csrf_cookie(headers);
    if !same_origin(headers) || cookie.is_none_or(|c| !same_secret(&c, &form.csrf)) {
        return Some(
            "the form did not come from this dashboard (CSRF check); reload the page and try again",
        );
    }
    if !same_secret(form.token.trim(), &shared.token) {
        return Some("wrong or missing access token");
    }
    if form.by.trim().is_empty() || form.note.trim().is_empty() {
        return Some("say who acknowledges and what was done or decided (name and note)");
    }
    None
}

async fn acknowledge(
    State(shared): State<AppState>,
    Path(id): Path<i64>,
    headers: HeaderMap,
    Form(form): Form<AckForm>,
) -> Response {
    if let Some(why) = refusal(&shared, &headers, &form) {
        tracing::warn!(
            alert = id,
            reason = why,
            "dashboard acknowledgement refused"
        );
        let msg = format!("Alert A{id} was not acknowledged: {why}.");
        return alerts_page(&shared, &headers, StatusCode::FORBIDDEN, Some((msg, true))).await;
    }
    let by = form.by.trim().chars().take(80).collect::<String>();
    let note = form.note.trim().chars().take(400).collect::<String>();
    let at = crate::time::now_rfc3339();
    let (status, msg) = match shared.store.acknowledge(id, &by, &at, &note).await {
        Ok(true) => (
            StatusCode::OK,
            (format!("Alert A{id} acknowledged by {by}."), false),
        ),
        Ok(false) => (StatusCode::NOT_FOUND, (format!("No alert A{id}."), true)),
        Err(e) => return failed(&shared, &headers, crate::errors::chain(&e)),
    };
    tracing::info!(alert = id, by = %by, "alert acknowledged on the dashboard");
    alerts_page(&shared, &headers, status, Some(msg)).await
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn secrets_and_origins_are_compared_strictly() {
        assert!(same_secret("abc", "abc"));
        assert!(!same_secret("abc", "abd") && !same_secret("abc", "abcd"));
        let mut h = HeaderMap::new();
        assert!(
            same_origin(&h),
            "a request without Origin is judged by its token and cookie"
        );
        h.insert(header::HOST, HeaderValue::from_static("127.0.0.1:8421"));
        h.insert(
            header::ORIGIN,
            HeaderValue::from_static("http://127.0.0.1:8421"),
        );
        assert!(same_origin(&h));
        h.insert(
            header::ORIGIN,
            HeaderValue::from_static("http://evil.example"),
        );
        assert!(!same_origin(&h));
    }

    #[test]
    fn only_a_well_formed_csrf_cookie_counts() {
        let mut h = HeaderMap::new();
        h.insert(
            header::COOKIE,
            HeaderValue::from_static("a=1; lotdrift_csrf=0123456789abcdef0123456789abcdef"),
        );
        assert_eq!(
            csrf_cookie(&h).as_deref(),
            Some("0123456789abcdef0123456789abcdef")
        );
        h.insert(
            header::COOKIE,
            HeaderValue::from_static("lotdrift_csrf=short"),
        );
        assert_eq!(csrf_cookie(&h), None);
    }
}
