//! A real browser for the page tests: Debian's `chromium`, headless, driven over the Chrome
//! DevTools Protocol (a websocket, one JSON message per command or event).
//!
//! Only what the tests need: open a page and wait for its load event, evaluate an expression
//! in it, collect console messages, uncaught exceptions, log entries and dialogs, and take a
//! full-page screenshot. When chromium is missing the test fails and says how to get it
//! (`scripts/test` installs it); it is never skipped.
#![allow(dead_code)]

use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use base64::Engine as _;
use serde_json::{Value, json};
use tungstenite::{Message, WebSocket};

/// Where the browser is expected (Debian's package), unless `LOTDRIFT_CHROMIUM` names another.
pub const CHROMIUM: &str = "/usr/bin/chromium";

/// Folder for the screenshots the tests save: `target/screenshots`.
pub fn screenshot_dir() -> PathBuf {
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .parent()
        .unwrap()
        .join("screenshots");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

pub struct Browser {
    child: Child,
    ws: WebSocket<TcpStream>,
    session: String,
    next_id: u64,
    /// Every event received so far.
    pub events: Vec<Value>,
    _profile: tempfile::TempDir,
}

impl Drop for Browser {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn chromium_path() -> PathBuf {
    let path = std::env::var_os("LOTDRIFT_CHROMIUM")
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from(CHROMIUM));
    assert!(
        path.exists(),
        "the page tests need a browser and there is none at {}: run `scripts/test` (as root it \
         installs Debian's chromium with apt-get), or `apt-get install chromium`, or set \
         LOTDRIFT_CHROMIUM to a Chromium binary",
        path.display()
    );
    path
}

/// Waits for chromium to write the DevTools port and path into its profile folder.
fn devtools_url(profile: &Path, child: &mut Child) -> String {
    let file = profile.join("DevToolsActivePort");
    let start = Instant::now();
    loop {
        if let Ok(text) = std::fs::read_to_string(&file) {
            let mut lines = text.lines();
            if let (Some(port), Some(path)) = (lines.next(), lines.next()) {
                return format!("ws://127.0.0.1:{port}{path}");
            }
        }
        if let Ok(Some(status)) = child.try_wait() {
            panic!("chromium exited before it was ready: {status}");
        }
        assert!(
            start.elapsed() < Duration::from_secs(60),
            "chromium did not open its DevTools port within 60 s"
        );
        std::thread::sleep(Duration::from_millis(50));
    }
}

impl Browser {
    /// Starts a headless chromium with a fresh profile and one page.
    pub fn launch() -> Browser {
        let path = chromium_path();
        let profile = tempfile::tempdir().unwrap();
        let mut child = Command::new(&path)
            .args([
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-dev-shm-usage",
                "--no-first-run",
                "--no-default-browser-check",
                "--disable-extensions",
                "--disable-background-networking",
                "--hide-scrollbars",
                "--remote-debugging-port=0",
                "--window-size=1200,900",
            ])
            .arg(format!("--user-data-dir={}", profile.path().display()))
            .arg("about:blank")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("cannot start {}: {e}", path.display()));
        let url = devtools_url(profile.path(), &mut child);
        let rest = url.trim_start_matches("ws://");
        let host = &rest[..rest.find('/').unwrap()];
        let stream = TcpStream::connect(host).unwrap();
        stream
            .set_read_timeout(Some(Duration::from_secs(60)))
            .unwrap();
        let (ws, _) = tungstenite::client(url.as_str(), stream).expect("DevTools handshake");
        let mut b = Browser {
            child,
            ws,
            session: String::new(),
            next_id: 0,
            events: Vec::new(),
            _profile: profile,
        };
        let target = b.call_browser("Target.createTarget", json!({"url": "about:blank"}));
        let target_id = target["targetId"].as_str().unwrap().to_string();
        let attached = b.call_browser(
            "Target.attachToTarget",
            json!({"targetId": target_id, "flatten": true}),
        );
        b.session = attached["sessionId"].as_str().unwrap().to_string();
        for domain in ["Page.enable", "Runtime.enable", "Log.enable"] {
            b.call(domain, json!({}));
        }
        b
    }

    fn send(&mut self, method: &str, params: Value, session: bool) -> Value {
        self.next_id += 1;
        let id = self.next_id;
        let mut msg = json!({"id": id, "method": method, "params": params});
        if session {
            msg["sessionId"] = json!(self.session);
        }
        self.ws.send(Message::text(msg.to_string())).unwrap();
        loop {
            let v = self.next_message();
            if v["id"] == json!(id) {
                assert!(v.get("error").is_none(), "{method} failed: {}", v["error"]);
                return v["result"].clone();
            }
            self.events.push(v);
        }
    }

    fn next_message(&mut self) -> Value {
        loop {
            match self.ws.read().expect("reading from chromium") {
                Message::Text(t) => return serde_json::from_str(t.as_str()).unwrap(),
                Message::Close(_) => panic!("chromium closed the DevTools connection"),
                _ => continue,
            }
        }
    }

    fn call_browser(&mut self, method: &str, params: Value) -> Value {
        self.send(method, params, false)
    }

    /// A command to the page's session.
    pub fn call(&mut self, method: &str, params: Value) -> Value {
        self.send(method, params, true)
    }

    /// Waits until an event named `method` arrives after the event count `since`.
    fn wait_event(&mut self, method: &str, since: usize) {
        let start = Instant::now();
        loop {
            if self.events[since..].iter().any(|e| e["method"] == method) {
                return;
            }
            assert!(
                start.elapsed() < Duration::from_secs(60),
                "no {method} within 60 s"
            );
            let v = self.next_message();
            self.events.push(v);
        }
    }

    /// Opens `url` and waits for its load event.
    pub fn goto(&mut self, url: &str) {
        let since = self.events.len();
        let r = self.call("Page.navigate", json!({"url": url}));
        assert!(
            r.get("errorText").is_none(),
            "cannot open {url}: {}",
            r["errorText"]
        );
        self.wait_event("Page.loadEventFired", since);
    }

    /// Runs `f` (which makes the page navigate, e.g. submits a form) and waits for the new
    /// page's load event.
    pub fn navigating(&mut self, expression: &str) {
        let since = self.events.len();
        self.eval(expression);
        self.wait_event("Page.loadEventFired", since);
    }

    /// The value of a JavaScript expression in the page.
    pub fn eval(&mut self, expression: &str) -> Value {
        let r = self.call(
            "Runtime.evaluate",
            json!({"expression": expression, "returnByValue": true}),
        );
        assert!(
            r.get("exceptionDetails").is_none(),
            "{expression} threw: {}",
            r["exceptionDetails"]
        );
        r["result"]["value"].clone()
    }

    /// Console errors and warnings, uncaught exceptions, error log entries and dialogs seen so
    /// far, as text.
    pub fn problems(&self) -> Vec<String> {
        self.events
            .iter()
            .filter_map(|e| {
                let p = &e["params"];
                match e["method"].as_str()? {
                    "Runtime.consoleAPICalled"
                        if ["error", "warning", "assert"].contains(&p["type"].as_str()?) =>
                    {
                        Some(format!("console {}: {}", p["type"], p["args"]))
                    }
                    "Runtime.exceptionThrown" => {
                        Some(format!("exception: {}", p["exceptionDetails"]))
                    }
                    "Log.entryAdded"
                        if ["error", "warning"].contains(&p["entry"]["level"].as_str()?) =>
                    {
                        Some(format!("log: {}", p["entry"]))
                    }
                    "Page.javascriptDialogOpening" => Some(format!("dialog: {}", p["message"])),
                    _ => None,
                }
            })
            .collect()
    }

    /// Saves a screenshot of the whole page as `name`.png under `target/screenshots`.
    pub fn screenshot(&mut self, name: &str) -> PathBuf {
        let metrics = self.call("Page.getLayoutMetrics", json!({}));
        let height = metrics["cssContentSize"]["height"]
            .as_f64()
            .unwrap_or(900.0)
            .clamp(300.0, 12_000.0);
        self.call(
            "Emulation.setDeviceMetricsOverride",
            json!({"width": 1200, "height": height.ceil() as i64, "deviceScaleFactor": 1, "mobile": false}),
        );
        let shot = self.call("Page.captureScreenshot", json!({"format": "png"}));
        self.call("Emulation.clearDeviceMetricsOverride", json!({}));
        let bytes = base64::engine::general_purpose::STANDARD
            .decode(shot["data"].as_str().unwrap())
            .unwrap();
        let path = screenshot_dir().join(format!("{name}.png"));
        std::fs::write(&path, bytes).unwrap();
        path
    }
}
