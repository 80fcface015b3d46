//! The progress line of `run --once` on a terminal: files taken of those found, values per
//! second, time left. Drawn from the log events the ingest already writes ("inbox scanned",
//! "batch stored"), so ingest knows nothing of terminals. Only when standard error is a
//! terminal; otherwise the same events are plain log lines.
//!
//! Log lines and the progress line share standard error: [`Writer`] clears the progress line
//! before a log line and draws it again after, so neither overwrites the other.

use std::io::Write;
use std::sync::{Arc, Mutex};
use std::time::Instant;

use tracing::field::{Field, Visit};
use tracing_subscriber::Layer;
use tracing_subscriber::fmt::MakeWriter;

/// What the progress line shows, updated from the log events.
#[derive(Debug)]
struct State {
    total: u64,
    files: u64,
    values: u64,
    started: Instant,
    shown: bool,
    done: bool,
}

/// Shared by the layer that counts and the writer that draws.
#[derive(Clone, Debug)]
pub struct Progress(Arc<Mutex<State>>);

impl Progress {
    pub fn new() -> Progress {
        Progress(Arc::new(Mutex::new(State {
            total: 0,
            files: 0,
            values: 0,
            started: Instant::now(),
            shown: false,
            done: false,
        })))
    }

    /// The layer that counts; the fmt layer should write through [`Progress::writer`].
    pub fn layer(&self) -> Counter {
        Counter(self.clone())
    }

    pub fn writer(&self) -> Writer {
        Writer(self.clone())
    }

    /// Removes the progress line (at the end of the run).
    pub fn finish(&self) {
        let mut s = self.0.lock().expect("progress lock");
        s.done = true;
        let mut err = std::io::stderr().lock();
        clear(&mut s, &mut err);
    }
}

/// The text of the progress line.
fn line(s: &State) -> String {
    let secs = s.started.elapsed().as_secs_f64().max(1e-3);
    let rate = s.values as f64 / secs;
    let left = if s.files > 0 && s.total > s.files {
        let per_file = secs / s.files as f64;
        format!(
            ", about {} left",
            duration((s.total - s.files) as f64 * per_file)
        )
    } else {
        String::new()
    };
    format!(
        "files {}/{} ({:.0} %), {:.0} values/s{left}",
        s.files,
        s.total,
        100.0 * s.files as f64 / s.total.max(1) as f64,
        rate
    )
}

/// `42 s`, `3 min 5 s`, `1 h 12 min`.
fn duration(secs: f64) -> String {
    let secs = secs.round() as u64;
    match secs {
        0..60 => format!("{secs} s"),
        60..3600 => format!("{} min {} s", secs / 60, secs % 60),
        _ => format!("{} h {} min", secs / 3600, (secs % 3600) / 60),
    }
}

fn clear(s: &mut State, out: &mut impl Write) {
    if s.shown {
        let _ = out.write_all(b"\r\x1b[K");
        let _ = out.flush();
        s.shown = false;
    }
}

fn draw(s: &mut State, out: &mut impl Write) {
    if s.total == 0 || s.done {
        return;
    }
    let _ = write!(out, "\r\x1b[K{}", line(s));
    let _ = out.flush();
    s.shown = true;
}

/// Counts files and values from the ingest's log events and redraws the line.
pub struct Counter(Progress);

#[derive(Default)]
struct Fields {
    message: String,
    files: Option<u64>,
    taken: Option<u64>,
    values: Option<u64>,
}

impl Visit for Fields {
    fn record_u64(&mut self, field: &Field, value: u64) {
        match field.name() {
            "files" => self.files = Some(value),
            "taken" => self.taken = Some(value),
            "values" => self.values = Some(value),
            _ => {}
        }
    }

    fn record_i64(&mut self, field: &Field, value: i64) {
        self.record_u64(field, value.max(0) as u64);
    }

    fn record_debug(&mut self, field: &Field, value: &dyn std::fmt::Debug) {
        if field.name() == "message" {
            self.message = format!("{value:?}");
        }
    }
}

impl<S: tracing::Subscriber> Layer<S> for Counter {
    fn on_event(&self, event: &tracing::Event<'_>, _: tracing_subscriber::layer::Context<'_, S>) {
        let mut f = Fields::default();
        event.record(&mut f);
        let mut s = self.0.0.lock().expect("progress lock");
        match f.message.as_str() {
            "inbox scanned" => {
                s.total = f.files.unwrap_or(0);
                s.started = Instant::now();
            }
            "batch stored" => {
                s.files += f.taken.unwrap_or(0);
                s.values += f.values.unwrap_or(0);
            }
            _ => return,
        }
        let mut err = std::io::stderr().lock();
        draw(&mut s, &mut err);
        if s.total > 0 && s.files >= s.total && s.shown {
            // Every file taken: the last line stays as a summary; evaluation's logs follow.
            let _ = err.write_all(b"\n");
            s.shown = false;
            s.done = true;
        }
    }
}

/// Standard error for log lines, around the progress line.
#[derive(Clone)]
pub struct Writer(Progress);

impl Write for Writer {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let mut s = self.0.0.lock().expect("progress lock");
        let mut err = std::io::stderr().lock();
        clear(&mut s, &mut err);
        err.write_all(buf)?;
        if buf.ends_with(b"\n") {
            draw(&mut s, &mut err);
        }
        Ok(buf.len())
    }

    fn flush(&mut self) -> std::io::Result<()> {
        std::io::stderr().flush()
    }
}

impl<'a> MakeWriter<'a> for Writer {
    type Writer = Writer;
    fn make_writer(&'a self) -> Writer {
        self.clone()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_line_says_files_rate_and_time_left() {
        let s = State {
            total: 200,
            files: 50,
            values: 60_000,
            started: Instant::now() - std::time::Duration::from_secs(10),
            shown: false,
            done: false,
        };
        let l = line(&s);
        assert!(l.starts_with("files 50/200 (25 %), "), "{l}");
        assert!(l.contains("values/s"), "{l}");
        assert!(l.contains("about 30 s left"), "{l}");
        assert_eq!(duration(185.0), "3 min 5 s");
        assert_eq!(duration(4320.0), "1 h 12 min");
    }
}
