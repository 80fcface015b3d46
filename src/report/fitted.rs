//! Long tables fitted to a width, printed byte for byte as [`super::table_in`] prints them,
//! without holding a comfy-table cell per value: `history` of a 100,000-lot series.
//!
//! The rows are walked twice ([`Rows`]). The first walk measures: per column its widest line,
//! and for the columns that wrap every distinct line. comfy-table then decides the widths on a
//! stand-in table with the same header and only those lines, which is enough for the same
//! decision: it looks at no more than each column's widest line and, for wrapping columns, at
//! how each line breaks. The stand-in's header and rule are the table's own. The second walk
//! prints: a row whose every line fits its column is padded here; rows with a line to break
//! go through comfy-table, a few at a time, with the widths fixed.

use std::collections::HashSet;
use std::io::{self, Write};

use comfy_table::{ColumnConstraint, Table, Width};
use unicode_width::UnicodeWidthStr;

use super::{constrain_columns, styled_table};

/// The rows of a table, walked in order as many times as asked; each row holds one cell per
/// column, a cell's lines separated by `\n`.
pub trait Rows {
    fn each(&self, row: &mut dyn FnMut(&[&str]) -> io::Result<()>) -> io::Result<()>;
}

/// Rows that break a line, printed through comfy-table together.
const BATCH: usize = 256;

/// Writes the table as `table_in(width, header, rows, wrap)` would return it. The header must
/// name every column and hold something other than dashes and spaces.
pub fn write_table(
    out: &mut dyn Write,
    width: u16,
    header: &[&str],
    wrap: &[usize],
    rows: &dyn Rows,
) -> io::Result<()> {
    let measured = measure(header.len(), wrap, rows)?;
    let widths = write_header(out, width, header, wrap, &measured)?;
    write_rows(out, width, &widths, rows)
}

/// What decides the widths: per column the widest line, or every distinct line of a column
/// that wraps.
struct Measured {
    widest: Vec<String>,
    lines: Vec<HashSet<String>>,
}

fn measure(columns: usize, wrap: &[usize], rows: &dyn Rows) -> io::Result<Measured> {
    let mut m = Measured {
        widest: vec![String::new(); columns],
        lines: vec![HashSet::new(); columns],
    };
    let mut widths = vec![0; columns];
    let wraps: Vec<bool> = (0..columns).map(|i| wrap.contains(&i)).collect();
    rows.each(&mut |cells| {
        for (i, cell) in cells.iter().enumerate().take(columns) {
            for line in cell.split('\n') {
                if wraps[i] {
                    if !m.lines[i].contains(line) {
                        m.lines[i].insert(line.to_string());
                    }
                    continue;
                }
                let w = width_of(line);
                if w > widths[i] {
                    widths[i] = w;
                    m.widest[i] = line.to_string();
                }
            }
        }
        Ok(())
    })?;
    Ok(m)
}

/// Writes the header and its rule as comfy-table lays them out for the measured lines, and
/// returns each column's content width, read off the rule (a column's dashes cover its
/// content and its padding).
fn write_header(
    out: &mut dyn Write,
    width: u16,
    header: &[&str],
    wrap: &[usize],
    m: &Measured,
) -> io::Result<Vec<usize>> {
    let mut t = styled_table(width);
    t.set_header(header.to_vec());
    let height = m.lines.iter().map(HashSet::len).max().unwrap_or(0).max(1);
    let mut lines: Vec<_> = m.lines.iter().map(sorted).collect();
    for k in 0..height {
        let row: Vec<&str> = (0..header.len())
            .map(|i| match (wrap.contains(&i), k) {
                (true, _) => lines[i].next().unwrap_or(""),
                (false, 0) => m.widest[i].as_str(),
                (false, _) => "",
            })
            .collect();
        t.add_row(row);
    }
    constrain_columns(&mut t, wrap);
    for line in t.lines() {
        let line = line.trim_end();
        out.write_all(line.as_bytes())?;
        out.write_all(b"\n")?;
        if !line.is_empty() && line.chars().all(|c| c == '-' || c == ' ') {
            let last = header.len() - 1;
            let runs = line.split(' ').map(str::len).enumerate();
            return Ok(runs.map(|(i, n)| n - usize::from(i < last)).collect());
        }
    }
    Err(io::Error::other("a table without a header rule"))
}

/// The lines in order, so the stand-in table is the same from run to run.
fn sorted(lines: &HashSet<String>) -> std::vec::IntoIter<&str> {
    let mut v: Vec<&str> = lines.iter().map(String::as_str).collect();
    v.sort_unstable();
    v.into_iter()
}

fn write_rows(
    out: &mut dyn Write,
    width: u16,
    widths: &[usize],
    rows: &dyn Rows,
) -> io::Result<()> {
    let mut block = String::new();
    let mut batch: Vec<Vec<String>> = Vec::new();
    rows.each(&mut |cells| {
        if padded(&mut block, widths, cells) {
            write_batch(out, width, widths, &mut batch)?;
            out.write_all(block.as_bytes())
        } else {
            batch.push(cells.iter().map(|c| c.to_string()).collect());
            if batch.len() == BATCH {
                write_batch(out, width, widths, &mut batch)?;
            }
            Ok(())
        }
    })?;
    write_batch(out, width, widths, &mut batch)
}

/// The lines of a row into `block`, every column padded to its width, one space of padding
/// and one between columns, trailing spaces removed; false (and `block` of no use) when a
/// line is wider than its column and must be broken.
fn padded(block: &mut String, widths: &[usize], cells: &[&str]) -> bool {
    block.clear();
    let height = cells.iter().map(|c| c.split('\n').count()).max();
    for k in 0..height.unwrap_or(0) {
        let start = block.len();
        for (i, (cell, w)) in cells.iter().zip(widths).enumerate() {
            let text = cell.split('\n').nth(k).unwrap_or("");
            let text_width = width_of(text);
            if text_width > *w {
                return false;
            }
            if i > 0 {
                block.push_str("  ");
            }
            block.push_str(text);
            if i + 1 < widths.len() {
                block.extend(std::iter::repeat_n(' ', w - text_width));
            }
        }
        let end = start + block[start..].trim_end().len();
        block.truncate(end);
        block.push('\n');
    }
    true
}

/// The columns `text` takes in a terminal: its length when it is printable ASCII (almost
/// every cell; counted without a table lookup per character), else its Unicode width.
fn width_of(text: &str) -> usize {
    if text.bytes().all(|b| (b' '..=b'~').contains(&b)) {
        text.len()
    } else {
        text.width()
    }
}

/// Rows with a line to break, through comfy-table with every column's width fixed.
fn write_batch(
    out: &mut dyn Write,
    width: u16,
    widths: &[usize],
    batch: &mut Vec<Vec<String>>,
) -> io::Result<()> {
    if batch.is_empty() {
        return Ok(());
    }
    let mut t: Table = styled_table(width);
    for r in batch.drain(..) {
        t.add_row(r);
    }
    constrain_columns(&mut t, &[]);
    let last = widths.len() - 1;
    for (i, c) in t.column_iter_mut().enumerate() {
        let padded = widths[i] + usize::from(i < last);
        let fixed = u16::try_from(padded).unwrap_or(u16::MAX);
        c.set_constraint(ColumnConstraint::Absolute(Width::Fixed(fixed)));
    }
    for line in t.lines() {
        out.write_all(line.trim_end().as_bytes())?;
        out.write_all(b"\n")?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use proptest::prelude::*;

    use super::*;
    use crate::report::table_in;

    impl Rows for Vec<Vec<String>> {
        fn each(&self, row: &mut dyn FnMut(&[&str]) -> io::Result<()>) -> io::Result<()> {
            for r in self {
                row(&r.iter().map(String::as_str).collect::<Vec<_>>())?;
            }
            Ok(())
        }
    }

    const HEADER: [&str; 5] = ["lot", "n", "mean test", "spread", "alerts, outliers"];
    const WRAP: [usize; 3] = [2, 3, 4];

    fn streamed(width: u16, rows: &Vec<Vec<String>>) -> String {
        let mut out = Vec::new();
        write_table(&mut out, width, &HEADER, &WRAP, rows).unwrap();
        String::from_utf8(out).unwrap()
    }

    fn cell(words: &[&str]) -> String {
        words.join(" ")
    }

    #[test]
    fn rows_that_fit_and_rows_that_break_print_as_comfy_table_prints_them() {
        let rows = vec![
            vec![
                "L1\n2026-03-01".into(),
                "5".into(),
                "p 0.31".into(),
                "p 0.9".into(),
                String::new(),
            ],
            vec![
                "L2 ünïcödé 漢字\n-".into(),
                "12".into(),
                "p 1.2e-5, CUSUM 6.1\n> h 5.2 signal".into(),
                "p 0.04 signal".into(),
                cell(&[
                    "opened mean alert 3;",
                    "U17 = 31.5 (9.2 sd, set aside);",
                    "averyveryverylongserialnumberwithoutanyspaceinit = 2 (5.0 sd)",
                ]),
            ],
        ];
        for width in [40, 52, 64, 80, 100, 140, 300] {
            assert_eq!(
                streamed(width, &rows),
                table_in(width, &HEADER, &rows, &WRAP),
                "width {width}"
            );
        }
    }

    fn any_cell() -> impl Strategy<Value = String> {
        let word = prop_oneof![
            "[a-z0-9.=;()-]{0,9}",
            "[A-Z]{12,40}",
            Just("–".to_string()),
            Just("漢字".to_string()),
            Just("\n".to_string()),
        ];
        prop::collection::vec(word, 0..8).prop_map(|w| w.join(" "))
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(200))]
        /// Any cells, any width: the same bytes as the whole table built by comfy-table.
        #[test]
        fn any_table_prints_as_comfy_table_prints_it(
            width in 40u16..160,
            rows in prop::collection::vec(prop::collection::vec(any_cell(), 5), 1..12),
        ) {
            prop_assert_eq!(streamed(width, &rows), table_in(width, &HEADER, &rows, &WRAP));
        }
    }
}
