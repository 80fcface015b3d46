//! `history` written lot by lot as the store reads it ([`crate::store::Store::history_each`]).
//!
//! CSV and JSON go out as each lot arrives, so a 100,000-lot series is never held in memory.
//! The text table needs every row before it can fit its columns and round its numbers (to the
//! series' median sd), so each series keeps its text cells in one string and its numbers in
//! one vector, and is printed when the next series starts ([`super::fitted`]).

use std::io::{self, Write};

use super::{Units, cusum_text, date, decimals_for, fitted, with_unit};
use crate::numbers::{push_fixed, push_p_value};
use crate::store::{HistoryLot, LotTest};

/// How `history` is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HistoryFormat {
    /// One table per characteristic, fitted to `width` columns.
    Text { width: u16 },
    /// One record per lot under [`HISTORY_HEADER`], numbers in full.
    Csv,
    /// A pretty-printed array of one object per lot ([`HistoryJson`]), ending in a newline.
    Json,
}

const HISTORY_HEADER: [&str; 15] = [
    "source",
    "characteristic",
    "lot",
    "sampled_at",
    "n",
    "mean",
    "sd",
    "min",
    "max",
    "role",
    "p_value",
    "p_adjusted",
    "alert",
    "events",
    "outliers",
];

const TABLE_HEADER: [&str; 9] = [
    "lot",
    "n",
    "mean",
    "sd",
    "min – max",
    "role",
    "mean test",
    "spread test",
    "alerts, outliers",
];

/// The table's columns that wrap: the decisions and the notes.
const TABLE_WRAP: [usize; 3] = [6, 7, 8];

/// Writes `history` in one of its forms; [`HistoryWriter::finish`] writes what is still owed.
/// Text goes to `out` a line at a time and JSON a lot at a time: give it a buffered writer.
pub struct HistoryWriter<'u, W: Write> {
    units: &'u Units,
    to: To<W>,
}

enum To<W: Write> {
    Text {
        out: W,
        width: u16,
        series: Option<SeriesTable>,
        tables: usize,
    },
    Csv {
        csv: Box<csv::Writer<W>>,
        field: String,
        header: bool,
    },
    Json {
        out: W,
        lots: usize,
        /// One lot's JSON, written to `out` at once: `serde_json`'s many small writes cost
        /// less into a `Vec` than through a `BufWriter` (3 % of `history --json`).
        object: Vec<u8>,
    },
}

impl<'u, W: Write> HistoryWriter<'u, W> {
    pub fn new(format: HistoryFormat, units: &'u Units, out: W) -> HistoryWriter<'u, W> {
        let to = match format {
            HistoryFormat::Text { width } => To::Text {
                out,
                width,
                series: None,
                tables: 0,
            },
            HistoryFormat::Csv => To::Csv {
                csv: Box::new(csv::Writer::from_writer(out)),
                field: String::new(),
                header: false,
            },
            HistoryFormat::Json => To::Json {
                out,
                lots: 0,
                object: Vec::new(),
            },
        };
        HistoryWriter { units, to }
    }

    /// Writes one lot (or, for the table, keeps its cells until its series is complete).
    pub fn lot(&mut self, lot: &HistoryLot<'_>) -> io::Result<()> {
        match &mut self.to {
            To::Text {
                out,
                width,
                series,
                tables,
            } => {
                if series
                    .as_ref()
                    .is_some_and(|s| s.characteristic != lot.characteristic)
                {
                    let done = series.take().expect("a series is open");
                    done.write(out, *width, self.units, tables)?;
                }
                series
                    .get_or_insert_with(|| SeriesTable::new(lot))
                    .push(lot);
                Ok(())
            }
            To::Csv { csv, field, header } => {
                if !*header {
                    csv.write_record(HISTORY_HEADER)?;
                    *header = true;
                }
                write_record(csv, field, lot)
            }
            To::Json { out, lots, object } => {
                out.write_all(if *lots == 0 { b"[\n  " } else { b",\n  " })?;
                *lots += 1;
                write_element(out, object, lot, self.units)
            }
        }
    }

    /// Writes the last table, the header of a CSV without lots, or the end of the array, and
    /// flushes.
    pub fn finish(self) -> io::Result<()> {
        match self.to {
            To::Text {
                mut out,
                width,
                series,
                mut tables,
            } => {
                if let Some(s) = series {
                    s.write(&mut out, width, self.units, &mut tables)?;
                }
                out.flush()
            }
            To::Csv {
                mut csv, header, ..
            } => {
                if !header {
                    csv.write_record(HISTORY_HEADER)?;
                }
                csv.flush()
            }
            To::Json { mut out, lots, .. } => {
                out.write_all(if lots == 0 { b"[]\n" } else { b"\n]\n" })?;
                out.flush()
            }
        }
    }
}

/// One lot as a CSV record: numbers in full (Rust's shortest round-trip form), empty fields
/// for what is missing. `field` is a buffer the numbers are written into.
fn write_record<W: Write>(
    csv: &mut csv::Writer<W>,
    field: &mut String,
    r: &HistoryLot<'_>,
) -> io::Result<()> {
    let mut number = |csv: &mut csv::Writer<W>, v: Option<&dyn std::fmt::Display>| {
        use std::fmt::Write as _;
        field.clear();
        if let Some(v) = v {
            let _ = write!(field, "{v}");
        }
        csv.write_field(field.as_bytes())
    };
    csv.write_field(r.source)?;
    csv.write_field(r.characteristic)?;
    csv.write_field(r.lot)?;
    csv.write_field(r.sampled_at.unwrap_or_default())?;
    number(csv, Some(&r.n))?;
    number(csv, Some(&r.mean))?;
    number(csv, r.sd.as_ref().map(|v| v as _))?;
    number(csv, Some(&r.min))?;
    number(csv, Some(&r.max))?;
    csv.write_field(r.role)?;
    number(csv, r.p_value.as_ref().map(|v| v as _))?;
    number(csv, r.p_adjusted.as_ref().map(|v| v as _))?;
    number(csv, r.alert_id.as_ref().map(|v| v as _))?;
    csv.write_field(r.events)?;
    csv.write_field(r.outliers)?;
    Ok(csv.write_record(None::<&[u8]>)?)
}

/// One `history --json` element. The keys are in alphabetical order, as the earlier output
/// printed them (a `serde_json` map sorts its keys); `decisions` is the one key added since.
#[derive(serde::Serialize)]
struct HistoryJson<'a> {
    alert_id: Option<i64>,
    characteristic: &'a str,
    decisions: Vec<DecisionJson<'a>>,
    events: &'a str,
    lot: &'a str,
    max: f64,
    mean: f64,
    min: f64,
    n: i64,
    outliers: &'a str,
    p_adjusted: Option<f64>,
    p_value: Option<f64>,
    role: &'a str,
    sampled_at: Option<&'a str>,
    sd: Option<f64>,
    significant: Option<bool>,
    source: &'a str,
    /// The characteristic's unit of measure, where one is configured.
    #[serde(skip_serializing_if = "Option::is_none")]
    unit_of_measure: Option<&'a str>,
}

/// One decision of a lot in `history --json`, named as in `decision_view` (keys in
/// alphabetical order like the lot's).
#[derive(serde::Serialize)]
struct DecisionJson<'a> {
    alert_id: Option<i64>,
    cusum_h: Option<f64>,
    cusum_lower: Option<f64>,
    cusum_signal: bool,
    cusum_upper: Option<f64>,
    kind: &'a str,
    p_adjusted: Option<f64>,
    p_value: Option<f64>,
    significant: bool,
    statistic: Option<f64>,
    test: &'a str,
    threshold: f64,
}

impl<'a> DecisionJson<'a> {
    fn of(d: &LotTest<'a>) -> DecisionJson<'a> {
        DecisionJson {
            alert_id: d.alert_id,
            cusum_h: d.cusum_h,
            cusum_lower: d.cusum_lower,
            cusum_signal: d.cusum_signal,
            cusum_upper: d.cusum_upper,
            kind: d.kind,
            p_adjusted: d.p_adjusted,
            p_value: d.p_value,
            significant: d.significant,
            statistic: d.statistic,
            test: d.test,
            threshold: d.threshold,
        }
    }
}

impl<'a> HistoryJson<'a> {
    fn of(r: &HistoryLot<'a>, units: &'a Units) -> HistoryJson<'a> {
        HistoryJson {
            alert_id: r.alert_id,
            characteristic: r.characteristic,
            decisions: r.decisions().map(DecisionJson::of).collect(),
            events: r.events,
            lot: r.lot,
            max: r.max,
            mean: r.mean,
            min: r.min,
            n: r.n,
            outliers: r.outliers,
            p_adjusted: r.p_adjusted,
            p_value: r.p_value,
            role: r.role,
            sampled_at: r.sampled_at,
            sd: r.sd,
            significant: r.significant,
            source: r.source,
            unit_of_measure: units.get(r.characteristic).map(String::as_str),
        }
    }
}

/// Writes one lot as a pretty-printed object indented as an element of the top-level array.
fn write_element(
    out: &mut impl Write,
    object: &mut Vec<u8>,
    r: &HistoryLot<'_>,
    units: &Units,
) -> io::Result<()> {
    use serde::Serialize as _;
    object.clear();
    let mut json = serde_json::Serializer::with_formatter(&mut *object, Element::default());
    HistoryJson::of(r, units).serialize(&mut json)?;
    out.write_all(object)
}

/// `serde_json`'s pretty layout (two spaces a level) one level in: an element of an array
/// whose brackets are written by hand.
struct Element {
    level: usize,
    has_value: bool,
}

impl Default for Element {
    fn default() -> Element {
        Element {
            level: 1,
            has_value: false,
        }
    }
}

impl Element {
    fn open<W: ?Sized + Write>(&mut self, out: &mut W, bracket: &[u8]) -> io::Result<()> {
        self.level += 1;
        self.has_value = false;
        out.write_all(bracket)
    }

    fn close<W: ?Sized + Write>(&mut self, out: &mut W, bracket: &[u8]) -> io::Result<()> {
        self.level -= 1;
        if self.has_value {
            self.new_line(out)?;
        }
        out.write_all(bracket)
    }

    fn next<W: ?Sized + Write>(&mut self, out: &mut W, first: bool) -> io::Result<()> {
        if !first {
            out.write_all(b",")?;
        }
        self.new_line(out)
    }

    fn new_line<W: ?Sized + Write>(&self, out: &mut W) -> io::Result<()> {
        out.write_all(b"\n")?;
        (0..self.level).try_for_each(|_| out.write_all(b"  "))
    }
}

impl serde_json::ser::Formatter for Element {
    fn begin_array<W: ?Sized + Write>(&mut self, out: &mut W) -> io::Result<()> {
        self.open(out, b"[")
    }
    fn end_array<W: ?Sized + Write>(&mut self, out: &mut W) -> io::Result<()> {
        self.close(out, b"]")
    }
    fn begin_array_value<W: ?Sized + Write>(&mut self, out: &mut W, first: bool) -> io::Result<()> {
        self.next(out, first)
    }
    fn end_array_value<W: ?Sized + Write>(&mut self, _: &mut W) -> io::Result<()> {
        self.has_value = true;
        Ok(())
    }
    fn begin_object<W: ?Sized + Write>(&mut self, out: &mut W) -> io::Result<()> {
        self.open(out, b"{")
    }
    fn end_object<W: ?Sized + Write>(&mut self, out: &mut W) -> io::Result<()> {
        self.close(out, b"}")
    }
    fn begin_object_key<W: ?Sized + Write>(&mut self, out: &mut W, first: bool) -> io::Result<()> {
        self.next(out, first)
    }
    fn begin_object_value<W: ?Sized + Write>(&mut self, out: &mut W) -> io::Result<()> {
        out.write_all(b": ")
    }
    fn end_object_value<W: ?Sized + Write>(&mut self, _: &mut W) -> io::Result<()> {
        self.has_value = true;
        Ok(())
    }
}

/// The lots of one series as the table shows them, kept until the series is complete: the
/// text cells of every lot in one string, the numbers (rounded only once the series' median
/// sd is known) in one vector.
struct SeriesTable {
    source: String,
    characteristic: String,
    /// The cells lot, n, role, mean test, spread test and notes of every lot, in that order.
    text: String,
    /// Where each cell of `text` ends.
    ends: Vec<usize>,
    numbers: Vec<Numbers>,
}

/// Cells of `text` per lot.
const TEXT_CELLS: usize = 6;

struct Numbers {
    mean: f64,
    sd: Option<f64>,
    min: f64,
    max: f64,
}

impl SeriesTable {
    fn new(lot: &HistoryLot<'_>) -> SeriesTable {
        SeriesTable {
            source: lot.source.to_string(),
            characteristic: lot.characteristic.to_string(),
            text: String::new(),
            ends: Vec::new(),
            numbers: Vec::new(),
        }
    }

    fn push(&mut self, r: &HistoryLot<'_>) {
        use std::fmt::Write as _;
        let _ = write!(self.text, "{}\n{}", r.lot, date(r.sampled_at));
        self.end_cell();
        let _ = write!(self.text, "{}", r.n);
        self.end_cell();
        self.text.push_str(r.role);
        self.end_cell();
        decision_text(&mut self.text, r.decisions[0].as_ref());
        self.end_cell();
        decision_text(&mut self.text, r.decisions[1].as_ref());
        self.end_cell();
        let notes = [r.events, r.outliers];
        let mut notes = notes.iter().filter(|t| !t.is_empty());
        if let Some(first) = notes.next() {
            self.text.push_str(first);
        }
        for more in notes {
            self.text.push_str("; ");
            self.text.push_str(more);
        }
        self.end_cell();
        self.numbers.push(Numbers {
            mean: r.mean,
            sd: r.sd,
            min: r.min,
            max: r.max,
        });
    }

    fn end_cell(&mut self) {
        self.ends.push(self.text.len());
    }

    /// The title and the table, after a blank line when a table came before.
    fn write(
        self,
        out: &mut impl Write,
        width: u16,
        units: &Units,
        tables: &mut usize,
    ) -> io::Result<()> {
        if *tables > 0 {
            out.write_all(b"\n")?;
        }
        *tables += 1;
        let unit = units.get(&self.characteristic).map(String::as_str);
        writeln!(
            out,
            "{} / {}",
            self.source,
            with_unit(&self.characteristic, unit)
        )?;
        let rows = Rounded::of(&self, decimals_for(self.median_sd()));
        fitted::write_table(out, width, &TABLE_HEADER, &TABLE_WRAP, &rows)
    }

    /// The median sd of the series' lots, the scale its numbers are rounded to.
    fn median_sd(&self) -> f64 {
        let mut sds: Vec<f64> = self
            .numbers
            .iter()
            .filter_map(|n| n.sd)
            .filter(|v| *v > 0.0)
            .collect();
        if sds.is_empty() {
            return f64::NAN;
        }
        sds.sort_by(f64::total_cmp);
        sds[sds.len() / 2]
    }
}

/// A series' rows with their numbers rounded to `decimals`, written once into one string:
/// the cells mean, sd and min – max of every lot.
struct Rounded<'a> {
    table: &'a SeriesTable,
    text: String,
    ends: Vec<usize>,
}

/// Cells of [`Rounded::text`] per lot.
const NUMBER_CELLS: usize = 3;

impl<'a> Rounded<'a> {
    fn of(table: &'a SeriesTable, d: usize) -> Rounded<'a> {
        let mut r = Rounded {
            table,
            text: String::new(),
            ends: Vec::with_capacity(table.numbers.len() * NUMBER_CELLS),
        };
        for n in &table.numbers {
            push_fixed(&mut r.text, Some(n.mean), d);
            r.ends.push(r.text.len());
            push_fixed(&mut r.text, n.sd, d);
            r.ends.push(r.text.len());
            push_fixed(&mut r.text, Some(n.min), d);
            r.text.push_str(" – ");
            push_fixed(&mut r.text, Some(n.max), d);
            r.ends.push(r.text.len());
        }
        r
    }
}

/// The cells of row `i` of a table kept as one string and the end of each cell.
fn cells_of<'t, const N: usize>(text: &'t str, ends: &[usize], i: usize) -> [&'t str; N] {
    let mut start = if i == 0 { 0 } else { ends[i * N - 1] };
    let mut cells = [""; N];
    for (cell, end) in cells.iter_mut().zip(&ends[i * N..(i + 1) * N]) {
        *cell = &text[start..*end];
        start = *end;
    }
    cells
}

impl fitted::Rows for Rounded<'_> {
    fn each(&self, row: &mut dyn FnMut(&[&str]) -> io::Result<()>) -> io::Result<()> {
        let t = self.table;
        for i in 0..t.numbers.len() {
            let [lot, count, role, mean_test, spread_test, notes] =
                cells_of::<TEXT_CELLS>(&t.text, &t.ends, i);
            let [mean, sd, range] = cells_of::<NUMBER_CELLS>(&self.text, &self.ends, i);
            row(&[
                lot,
                count,
                mean,
                sd,
                range,
                role,
                mean_test,
                spread_test,
                notes,
            ])?;
        }
        Ok(())
    }
}

/// A lot's decision of one kind: the adjusted p-value (and the CUSUM when it signalled),
/// marked `signal` when significant; nothing when none was made.
fn decision_text(out: &mut String, d: Option<&LotTest<'_>>) {
    let Some(d) = d else {
        return;
    };
    out.push_str("p ");
    push_p_value(out, d.p_adjusted.or(d.p_value));
    if d.cusum_signal {
        out.push_str(", ");
        out.push_str(&cusum_text(d.cusum_upper, d.cusum_lower, d.cusum_h));
    }
    if d.significant {
        out.push_str(" signal");
    }
}
