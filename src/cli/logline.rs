//! Text log lines for a person at a terminal: the time, the level, the message and its fields,
//! wrapped at spaces to the terminal's width (100 columns when it is not known) with the
//! continuation lines indented, so a long alert or quarantine line is never cut by the
//! terminal. The fields and their values are the ones the plain format writes; JSON logs and
//! logs that go to a file or a journal keep tracing's own one-line format.

use std::fmt;

use tracing::field::{Field, Visit};
use tracing::{Event, Level, Subscriber};
use tracing_subscriber::fmt::format::Writer;
use tracing_subscriber::fmt::{FmtContext, FormatEvent, FormatFields};
use tracing_subscriber::registry::LookupSpan;

/// Formats events as wrapped lines of at most `width` columns.
pub struct Wrapped {
    pub width: usize,
}

/// The message and the other fields of an event, as the plain format writes them.
#[derive(Default)]
struct Fields {
    message: String,
    rest: Vec<String>,
}

impl Visit for Fields {
    fn record_str(&mut self, field: &Field, value: &str) {
        if field.name() == "message" {
            self.message = value.to_string();
        } else {
            self.rest.push(format!("{}={value:?}", field.name()));
        }
    }

    fn record_error(&mut self, field: &Field, value: &(dyn std::error::Error + 'static)) {
        self.rest.push(format!("{}={value}", field.name()));
    }

    fn record_debug(&mut self, field: &Field, value: &dyn fmt::Debug) {
        if field.name() == "message" {
            self.message = format!("{value:?}");
        } else {
            self.rest.push(format!("{}={value:?}", field.name()));
        }
    }
}

/// One event as text: `time LEVEL target: message key=value ...` (runs of spaces as one),
/// wrapped at `width` with
/// continuation lines indented by four spaces; a line is longer only where one word is.
pub fn wrapped_line(time: &str, level: &str, target: &str, text: &str, width: usize) -> String {
    let target = target.strip_prefix("lotdrift::").unwrap_or(target);
    crate::report::wrap(&format!("{time} {level} {target}: {text}"), width, "    ")
}

/// The level's name in its colour (as tracing's own format colours it).
fn coloured(level: &Level) -> String {
    let code = match *level {
        Level::ERROR => 31,
        Level::WARN => 33,
        Level::INFO => 32,
        Level::DEBUG => 34,
        Level::TRACE => 35,
    };
    format!("\x1b[{code}m{level}\x1b[0m")
}

impl<S, N> FormatEvent<S, N> for Wrapped
where
    S: Subscriber + for<'a> LookupSpan<'a>,
    N: for<'a> FormatFields<'a> + 'static,
{
    fn format_event(
        &self,
        _ctx: &FmtContext<'_, S, N>,
        mut writer: Writer<'_>,
        event: &Event<'_>,
    ) -> fmt::Result {
        let mut fields = Fields::default();
        event.record(&mut fields);
        let mut text = fields.message;
        for f in fields.rest {
            text.push(' ');
            text.push_str(&f);
        }
        let meta = event.metadata();
        let level = meta.level().to_string();
        let time = crate::time::now_rfc3339();
        let mut out = wrapped_line(&time, &level, meta.target(), &text, self.width);
        if writer.has_ansi_escapes() {
            // Colour after wrapping: escape codes take no columns.
            out = out.replacen(&level, &coloured(meta.level()), 1);
        }
        writer.write_str(&out)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_long_log_line_is_wrapped_to_the_width_with_its_words_kept() {
        let text = "quarantined file=/srv/lotdrift/inbox/alder-cells_AC-26-041_comma-decimal.csv \
                    reason=\"alder-cells_AC-26-041_comma-decimal.csv:3:4 (column value): expected \
                    a number with '.' as decimal separator, found \\\"2998,4\\\"\"";
        let out = wrapped_line(
            "2026-12-02T21:01:17.751Z",
            "WARN",
            "lotdrift::ingest",
            text,
            100,
        );
        assert!(
            out.starts_with("2026-12-02T21:01:17.751Z WARN ingest: quarantined\n    file="),
            "{out}"
        );
        assert!(out.lines().count() >= 3, "{out}");
        assert!(out.lines().all(|l| l.chars().count() <= 100), "{out}");
        assert!(out.lines().skip(1).all(|l| l.starts_with("    ")), "{out}");
        let words = |s: &str| s.split_whitespace().map(String::from).collect::<Vec<_>>();
        assert_eq!(words(&out)[3..], words(text)[..]);
    }
}
