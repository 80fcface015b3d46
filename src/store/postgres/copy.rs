//! Unit values into PostgreSQL with `COPY ... FROM STDIN` (text format): one line per sample,
//! its values, serials and times as array literals, with the NULL conventions of SQLite's
//! `sample_values` (serials NULL when no unit has one, times NULL when every value has the
//! sample's own time).

use sqlx::{Postgres, Transaction};

use super::*;
use crate::lotfile::{Serials, Stamp};

/// Bytes handed to the server per `send`.
const CHUNK_BYTES: usize = 1 << 20;

/// Writes the `sample_values` rows of `samples` ((sample id, sample)) inside the open
/// transaction.
pub(super) async fn sample_values(
    tx: &mut Transaction<'static, Postgres>,
    samples: &[(i64, &NewSample)],
) -> Result<()> {
    if samples.is_empty() {
        return Ok(());
    }
    let mut copy = tx
        .copy_in_raw(
            "COPY sample_values (sample_id, unit_values, unit_serials, unit_times) FROM STDIN",
        )
        .await
        .doing("starting to copy unit values")?;
    let mut buf = String::with_capacity(CHUNK_BYTES + 4096);
    for (id, s) in samples {
        line(&mut buf, *id, s);
        if buf.len() >= CHUNK_BYTES {
            copy.send(buf.as_bytes())
                .await
                .doing("copying unit values")?;
            buf.clear();
        }
    }
    if !buf.is_empty() {
        copy.send(buf.as_bytes())
            .await
            .doing("copying unit values")?;
    }
    copy.finish().await.doing("copying unit values")?;
    Ok(())
}

/// One sample's line: `id \t {values} \t {serials}|\N \t {times}|\N \n`.
fn line(out: &mut String, id: i64, s: &NewSample) {
    let n = s.values.len();
    let (units, times) = (&s.track.units[..n], &s.track.sampled_at[..n]);
    out.push_str(&id.to_string());
    out.push('\t');
    values(out, &s.values);
    out.push('\t');
    if units.iter().any(|u| s.serials.get(*u).is_some()) {
        serials(out, units, &s.serials);
    } else {
        out.push_str("\\N");
    }
    out.push('\t');
    if times.iter().any(|t| *t != times[0]) {
        stamps(out, times);
    } else {
        out.push_str("\\N");
    }
    out.push('\n');
}

/// `{v0,v1,...}`, each the shortest text that reads back as the same double.
pub(in crate::store) fn values(out: &mut String, values: &[f64]) {
    let mut buffer = ryu::Buffer::new();
    out.push('{');
    for (k, v) in values.iter().enumerate() {
        if k > 0 {
            out.push(',');
        }
        out.push_str(buffer.format_finite(*v));
    }
    out.push('}');
}

fn serials(out: &mut String, units: &[u32], serials: &Serials) {
    element_list(out, units.iter().map(|u| serials.get(*u)));
}

fn stamps(out: &mut String, times: &[Stamp]) {
    let texts: Vec<Option<String>> = times
        .iter()
        .map(|t| t.get().map(|t| t.to_rfc3339()))
        .collect();
    element_list(out, texts.iter().map(Option::as_deref));
}

/// `{"a",NULL,...}`: every element quoted, so any text (commas, braces, quotes, the word
/// NULL) survives the array syntax; then escaped for COPY's text format.
pub(in crate::store) fn element_list<'a>(
    out: &mut String,
    items: impl Iterator<Item = Option<&'a str>>,
) {
    out.push('{');
    for (k, item) in items.enumerate() {
        if k > 0 {
            out.push(',');
        }
        match item {
            None => out.push_str("NULL"),
            Some(text) => {
                // Array quoting doubles as a backslash level; COPY's text format adds its
                // own: a backslash in the serial becomes four on the wire.
                out.push('"');
                for c in text.chars() {
                    match c {
                        '"' => out.push_str("\\\\\""),
                        '\\' => out.push_str("\\\\\\\\"),
                        '\t' => out.push_str("\\t"),
                        '\n' => out.push_str("\\n"),
                        '\r' => out.push_str("\\r"),
                        c => out.push(c),
                    }
                }
                out.push('"');
            }
        }
    }
    out.push('}');
}

#[cfg(test)]
mod tests {
    use super::element_list;

    /// The wire text of an array literal (checked against a server in tests/pg_*.rs).
    fn wire(items: &[Option<&str>]) -> String {
        let mut out = String::new();
        element_list(&mut out, items.iter().copied());
        out
    }

    #[test]
    fn serials_are_quoted_and_escaped_for_arrays_and_copy() {
        assert_eq!(wire(&[Some("U1"), None]), r#"{"U1",NULL}"#);
        assert_eq!(wire(&[Some("NULL")]), r#"{"NULL"}"#);
        assert_eq!(wire(&[Some(r#"a"b"#)]), r#"{"a\\"b"}"#);
        assert_eq!(wire(&[Some(r"a\b")]), r#"{"a\\\\b"}"#);
        assert_eq!(wire(&[Some("a,b}{")]), r#"{"a,b}{"}"#);
        assert_eq!(wire(&[Some("tab\there")]), r#"{"tab\there"}"#);
    }
}
