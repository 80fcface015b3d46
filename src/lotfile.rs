//! Parser for lot files: the CSV files that incoming inspection drops for every
//! lot of a purchased part, one measured value per unit and characteristic.
//!
//! This module owns the lot-file format and nothing else: layout detection
//! (long or wide), header rules, the syntax of numbers and sampling times,
//! grouping of values by (source, lot, characteristic), physical line numbers
//! and the wording of every error message.
//!
//! It never touches the file system, never does I/O beyond reading the bytes
//! or the stream it is given, never reads the clock, never logs and never
//! stores anything. A file is accepted whole or rejected whole (no partial
//! lots), and [`parse`] never panics, whatever the bytes.
//!
//! Memory: a stream is read through a small window ([`parse_reader`]), never
//! held whole; values are kept as numbers, unit serials once per file
//! ([`Serials`]), and a wide row's unit and time once for all its
//! characteristics ([`Track`]), so a large export costs less than its own size
//! (DEVELOPERS.md, "One large file", has the figures).
//!
//! # Format decisions beyond the written contract
//!
//! * A record whose fields are all empty after trimming (`,,,`, a line of
//!   spaces, `"",""`) is blank and skipped, like an empty line, whatever its
//!   number of fields.
//! * A line is a comment only when `#` is its very first byte (after a UTF-8
//!   BOM on the first line). `  # x` is data, and `"#1",...` is data whose
//!   first field is `#1`; a `#` inside a quoted field is never a comment.
//! * Trimming removes ASCII whitespace around a field. Name fields (source,
//!   lot, characteristic, unit, header cells) are checked for control
//!   characters before trimming, so a tab or line end anywhere in a name is an
//!   error, while a quoted value `"2.5\n"` is accepted as 2.5.
//! * Quoting follows RFC 4180 strictly: a quote inside an unquoted field, text
//!   after a closing quote and an unterminated quoted field are
//!   [`ErrorKind::Csv`] errors (the csv crate would silently accept them).
//! * Line numbers count LF bytes. The csv crate's `Position::line` lags after
//!   CRLF line ends, blank lines and comments, so the line of a record is
//!   derived from `Position::byte` instead. Lone-CR line ends are not
//!   supported.
//! * `unit` cells may be empty (no serial for that row); the repeated
//!   measurement check only applies to rows with a unit. `sampled_at` cells
//!   may be empty too. Both get the same checks as names when present.
//! * A date-time needs an offset (`Z` or `+02:00`); a bare local time is
//!   rejected. Timestamps must fall in the years 0000..=9999 in UTC.
//! * A number that underflows to zero (`1e-400`) is accepted as zero.

use std::collections::HashMap;
use std::collections::hash_map::Entry;
use std::fmt;
use std::io::Read;
use std::sync::Arc;

mod serials;
mod stream;

pub use serials::{NO_UNIT, Serials};
use stream::{Record, Window};

use chrono::{DateTime, Datelike, NaiveDate, NaiveTime, Timelike, Utc};

/// Longest accepted name (source, lot, characteristic, unit, header cell), in characters.
pub const MAX_NAME_CHARS: usize = 200;

/// How much of an offending text an error message quotes, in characters.
const FOUND_CHARS: usize = 40;

const UTF8_BOM: &[u8] = b"\xEF\xBB\xBF";

/// The two shapes a lot file can have.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Layout {
    /// One row per unit and characteristic: `source,characteristic,lot,value[,sampled_at][,unit]`.
    Long,
    /// One row per unit, one column per characteristic: `source,lot[,sampled_at][,unit],<characteristic>...`.
    Wide,
}

/// A parsed lot file.
#[derive(Debug, Clone, PartialEq)]
pub struct LotFile {
    pub layout: Layout,
    /// One group per (source, lot, characteristic), in order of first appearance.
    pub groups: Vec<Group>,
    /// Number of data rows (not counting the header, comments and blank rows).
    pub rows: usize,
    /// Number of measured values over all groups.
    pub values: usize,
    /// The unit serials that [`Group::units`] refer to.
    pub serials: Arc<Serials>,
}

/// All values of one (source, lot, characteristic) in this file, in file order.
#[derive(Debug, Clone, PartialEq)]
pub struct Group {
    pub source: String,
    pub lot: String,
    pub characteristic: String,
    pub values: Vec<f64>,
    /// The unit and sampling time of each value (shared with the lot's other characteristics
    /// in the wide layout).
    pub track: Arc<Track>,
    /// Line of the row that created this group.
    pub first_line: u64,
}

impl Group {
    /// Serial of the measured unit per value, an id into [`LotFile::serials`]; [`NO_UNIT`]
    /// without a `unit` column or for an empty cell.
    pub fn units(&self) -> &[u32] {
        &self.track.units
    }

    /// Sampling time per value; [`Stamp::NONE`] without a `sampled_at` column or for an
    /// empty cell.
    pub fn sampled_at(&self) -> &[Stamp] {
        &self.track.sampled_at
    }
}

/// Per value of a group, its unit serial id and sampling time, in file order. A wide row
/// gives one value to each characteristic of its (source, lot) with one unit and one time, so
/// those groups share one track: a held value then costs its 8 bytes plus 12 bytes per row,
/// not 20 bytes per value (a year's export in the wide layout has about 22 bytes of text per
/// value).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Track {
    pub units: Vec<u32>,
    pub sampled_at: Vec<Stamp>,
}

impl Track {
    /// One value's unit and time.
    pub fn push(&mut self, unit: u32, sampled_at: Stamp) {
        self.units.push(unit);
        self.sampled_at.push(sampled_at);
    }

    fn shrink_to_fit(&mut self) {
        self.units.shrink_to_fit();
        self.sampled_at.shrink_to_fit();
    }
}

/// A sampling time or none, in 8 bytes (a year's export holds one per value): whole
/// microseconds since 1970 and whether only a date was given. Stored times are written to the
/// millisecond, so nothing shown or stored is lost.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stamp(i64);

impl Stamp {
    pub const NONE: Stamp = Stamp(i64::MIN);

    pub fn get(self) -> Option<Timestamp> {
        if self == Stamp::NONE {
            return None;
        }
        let utc = DateTime::from_timestamp_micros(self.0 >> 1)?;
        Some(Timestamp {
            utc,
            date_only: self.0 & 1 == 1,
        })
    }
}

impl From<Option<Timestamp>> for Stamp {
    fn from(t: Option<Timestamp>) -> Self {
        // Years 0000..=9999 (the parser's range) are about ±2.5e17 µs: doubled, far inside i64.
        t.map_or(Stamp::NONE, |t| {
            Stamp(t.utc.timestamp_micros() * 2 + i64::from(t.date_only))
        })
    }
}

/// A sampling time normalised to UTC, with a flag whether only a date was given.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Timestamp {
    pub utc: DateTime<Utc>,
    /// True when the file gave only a date; `utc` is then 00:00:00 UTC of that date.
    pub date_only: bool,
}

impl Timestamp {
    /// Fixed-width `YYYY-MM-DDTHH:MM:SS.mmmZ` (milliseconds truncated), so
    /// that text order equals time order.
    pub fn to_rfc3339(&self) -> String {
        // The naive UTC time once: each field read of a `DateTime<Utc>` applies the (zero)
        // offset again, which showed in ingest profiles.
        let t = self.utc.naive_utc();
        if !(0..=9999).contains(&t.year()) {
            return t.format("%Y-%m-%dT%H:%M:%S%.3fZ").to_string();
        }
        // Written by hand, digit by digit: chrono's format strings and `write!` showed in
        // ingest profiles (one timestamp per measured unit).
        let millis = (t.nanosecond() % 1_000_000_000) / 1_000_000;
        let mut b = *b"0000-00-00T00:00:00.000Z";
        put_digits(&mut b[0..4], t.year() as u32);
        put_digits(&mut b[5..7], t.month());
        put_digits(&mut b[8..10], t.day());
        put_digits(&mut b[11..13], t.hour());
        put_digits(&mut b[14..16], t.minute());
        put_digits(&mut b[17..19], t.second());
        put_digits(&mut b[20..23], millis);
        String::from(std::str::from_utf8(&b).expect("digits and ASCII separators"))
    }
}

/// Writes `value` in decimal into `out`, right-aligned and zero-padded (its high digits
/// dropped if it does not fit).
fn put_digits(out: &mut [u8], mut value: u32) {
    for c in out.iter_mut().rev() {
        *c = b'0' + (value % 10) as u8;
        value /= 10;
    }
}

impl fmt::Display for Timestamp {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.to_rfc3339())
    }
}

/// What went wrong, for callers that react by kind rather than by message.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ErrorKind {
    /// Invalid UTF-8 (or a UTF-16 file).
    Encoding,
    /// Malformed RFC 4180 quoting.
    Csv,
    /// No header row, or a wide header without characteristic columns.
    Header,
    /// A required column is absent from the header.
    MissingColumn,
    /// A long-layout header has a column that is not one of the known ones.
    UnknownColumn,
    /// Two header cells name the same column (case-insensitive).
    DuplicateColumn,
    /// A data row has a different number of fields than the header.
    FieldCount,
    /// A required cell (or a header cell) is empty.
    EmptyField,
    /// A name contains a control character.
    ControlCharacter,
    /// A name is longer than [`MAX_NAME_CHARS`].
    TooLong,
    /// A value is not a number in the accepted syntax.
    BadNumber,
    /// A value is NaN, an infinity, or overflows f64.
    NonFiniteNumber,
    /// A `sampled_at` cell is not an accepted date or date-time.
    BadTimestamp,
    /// The same (source, lot, characteristic, unit) appears twice.
    DuplicateMeasurement,
    /// A header but no data rows.
    NoData,
}

impl ErrorKind {
    /// A stable snake_case name, for logs and metrics.
    pub fn as_str(self) -> &'static str {
        match self {
            ErrorKind::Encoding => "encoding",
            ErrorKind::Csv => "csv",
            ErrorKind::Header => "header",
            ErrorKind::MissingColumn => "missing_column",
            ErrorKind::UnknownColumn => "unknown_column",
            ErrorKind::DuplicateColumn => "duplicate_column",
            ErrorKind::FieldCount => "field_count",
            ErrorKind::EmptyField => "empty_field",
            ErrorKind::ControlCharacter => "control_character",
            ErrorKind::TooLong => "too_long",
            ErrorKind::BadNumber => "bad_number",
            ErrorKind::NonFiniteNumber => "non_finite_number",
            ErrorKind::BadTimestamp => "bad_timestamp",
            ErrorKind::DuplicateMeasurement => "duplicate_measurement",
            ErrorKind::NoData => "no_data",
        }
    }
}

impl fmt::Display for ErrorKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Why a lot file was rejected, with its place in the file.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{file}:{line}{}: {message}", ColumnSuffix(.column, .column_name))]
pub struct LotFileError {
    pub file: String,
    /// 1-based physical line; for a record spanning lines, the line where it starts.
    pub line: u64,
    /// 1-based field index, when the error is about one field.
    pub column: Option<u64>,
    /// The header text of that column, when known.
    pub column_name: Option<String>,
    pub kind: ErrorKind,
    /// What was expected and what was found.
    pub message: String,
}

struct ColumnSuffix<'a>(&'a Option<u64>, &'a Option<String>);

impl fmt::Display for ColumnSuffix<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match (self.0, self.1) {
            (Some(n), Some(name)) => write!(f, ":{n} (column {name})"),
            (Some(n), None) => write!(f, ":{n}"),
            (None, _) => Ok(()),
        }
    }
}

/// Parses one lot file. `file_name` is only used in error messages.
pub fn parse(file_name: &str, bytes: &[u8]) -> Result<LotFile, LotFileError> {
    parse_reader(file_name, bytes).map_err(|e| match e {
        ReadError::Lot(e) => e,
        // Reading a byte slice cannot fail; kept total rather than panicking.
        ReadError::Io(e) => LotFileError {
            file: file_name.to_owned(),
            line: 1,
            column: None,
            column_name: None,
            kind: ErrorKind::Csv,
            message: format!("expected readable bytes, found a read error: {e}"),
        },
    })
}

/// Why [`parse_reader`] gave no lot file.
#[derive(Debug)]
pub enum ReadError {
    /// The bytes are not a valid lot file.
    Lot(LotFileError),
    /// The stream failed; nothing is known about the file's content.
    Io(std::io::Error),
}

/// Parses one lot file from a stream, reading it once through a small window. Stops at the
/// first error; the caller reads whatever is left if it needs all the bytes (for a hash).
pub fn parse_reader<R: Read>(file_name: &str, reader: R) -> Result<LotFile, ReadError> {
    Parser::new(file_name, Window::new(reader)).run()
}

// ---------------------------------------------------------------------------
// Text helpers

/// Quotes a found text for a message: escaped, at most [`FOUND_CHARS`] characters.
pub(crate) fn found(text: &str) -> String {
    let mut out = String::with_capacity(text.len().min(FOUND_CHARS * 2) + 4);
    out.push('"');
    let mut chars = text.chars();
    for c in chars.by_ref().take(FOUND_CHARS) {
        out.extend(c.escape_debug());
    }
    if chars.next().is_some() {
        out.push('…');
    }
    out.push('"');
    out
}

/// Trims ASCII whitespace. Name fields are checked for control characters
/// before trimming, so for them this only removes spaces.
fn trim(s: &str) -> &str {
    s.trim_ascii()
}

pub(crate) fn count_newlines(bytes: &[u8]) -> u64 {
    bytes.iter().filter(|&&b| b == b'\n').count() as u64
}

/// Where the csv reader really starts its next record when it starts reading
/// at `i`: it skips line-end bytes and `#` comment lines (which run to LF).
pub(crate) fn record_start(data: &[u8], mut i: usize) -> usize {
    loop {
        while i < data.len() && (data[i] == b'\r' || data[i] == b'\n') {
            i += 1;
        }
        if i < data.len() && data[i] == b'#' {
            match data[i..].iter().position(|&b| b == b'\n') {
                Some(k) => i += k + 1,
                None => return data.len(),
            }
        } else {
            return i.min(data.len());
        }
    }
}

/// A quoting problem in a raw record.
struct QuoteProblem {
    /// 1-based field index.
    col: u64,
    /// Byte offset of the field's start within the raw record.
    field_start: usize,
    /// What was expected, without the found part.
    expected: &'static str,
}

/// Checks RFC 4180 quoting of one raw record (its bytes from the start up to
/// the reader's position after it).
fn check_quotes(raw: &[u8]) -> Result<(), QuoteProblem> {
    if !raw.contains(&b'"') {
        return Ok(());
    }
    let n = raw.len();
    let mut i = 0;
    let mut col = 1u64;
    loop {
        let field_start = i;
        let problem = |expected| QuoteProblem {
            col,
            field_start,
            expected,
        };
        if i < n && raw[i] == b'"' {
            i += 1;
            loop {
                let Some(k) = raw[i.min(n)..].iter().position(|&b| b == b'"') else {
                    return Err(problem(
                        "expected a closing quote for the quoted field before the end of the file",
                    ));
                };
                i += k + 1;
                if i < n && raw[i] == b'"' {
                    i += 1;
                } else {
                    break;
                }
            }
            match raw.get(i) {
                None | Some(b'\r' | b'\n') => return Ok(()),
                Some(b',') => {
                    i += 1;
                    col += 1;
                }
                Some(_) => {
                    return Err(problem(
                        "expected ',' or a line end right after the closing quote \
                         (quote the whole field, double inner quotes)",
                    ));
                }
            }
        } else {
            loop {
                match raw.get(i) {
                    None | Some(b'\r' | b'\n') => return Ok(()),
                    Some(b',') => {
                        i += 1;
                        col += 1;
                        break;
                    }
                    Some(b'"') => {
                        return Err(problem(
                            "expected no '\"' inside an unquoted field \
                             (quote the whole field, double inner quotes)",
                        ));
                    }
                    Some(_) => i += 1,
                }
            }
        }
    }
}

/// Why a value cell was rejected.
pub(crate) enum NumberError {
    Empty,
    Bad,
    NonFinite,
    Overflow,
}

pub(crate) fn parse_number(text: &str) -> Result<f64, NumberError> {
    let t = trim(text);
    if t.is_empty() {
        return Err(NumberError::Empty);
    }
    let allowed = t
        .bytes()
        .all(|b| b.is_ascii_digit() || matches!(b, b'.' | b'+' | b'-' | b'e' | b'E'));
    if !allowed {
        let unsigned = t.strip_prefix(['+', '-']).unwrap_or(t);
        let non_finite = ["nan", "inf", "infinity"]
            .iter()
            .any(|w| unsigned.eq_ignore_ascii_case(w));
        return Err(if non_finite {
            NumberError::NonFinite
        } else {
            NumberError::Bad
        });
    }
    match t.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => Err(NumberError::Overflow),
        Err(_) => Err(NumberError::Bad),
    }
}

pub(crate) fn parse_timestamp(text: &str) -> Option<Timestamp> {
    let b = text.as_bytes();
    let ts = if b.len() == 10 {
        let digits = [0, 1, 2, 3, 5, 6, 8, 9];
        if b[4] != b'-' || b[7] != b'-' || !digits.iter().all(|&i| b[i].is_ascii_digit()) {
            return None;
        }
        let num = |r: std::ops::Range<usize>| {
            b[r].iter()
                .fold(0u32, |acc, &d| acc * 10 + u32::from(d - b'0'))
        };
        let date = NaiveDate::from_ymd_opt(i32::try_from(num(0..4)).ok()?, num(5..7), num(8..10))?;
        Timestamp {
            utc: date.and_time(NaiveTime::MIN).and_utc(),
            date_only: true,
        }
    } else {
        let dt = DateTime::parse_from_rfc3339(text).ok()?;
        Timestamp {
            utc: dt.with_timezone(&Utc),
            date_only: false,
        }
    };
    (0..=9999).contains(&ts.utc.year()).then_some(ts)
}

// ---------------------------------------------------------------------------
// Parser state

/// Maps each distinct string of one file to a small id, so that repeated
/// names cost a hash lookup instead of an allocation. Remembers the last
/// string looked up, since consecutive rows usually repeat it.
#[derive(Default)]
struct Interner {
    ids: FastMap<String, u32>,
    last: String,
    last_id: Option<u32>,
}

impl Interner {
    fn intern(&mut self, s: &str) -> u32 {
        if let Some(id) = self.last_id
            && self.last == s
        {
            return id;
        }
        let next = u32::try_from(self.ids.len()).unwrap_or(u32::MAX);
        let id = match self.ids.get(s) {
            Some(&id) => id,
            None => {
                self.ids.insert(s.to_owned(), next);
                next
            }
        };
        self.last.clear();
        self.last.push_str(s);
        self.last_id = Some(id);
        id
    }
}

/// A cheap multiplicative hasher for this parser's per-file maps (interned
/// names and ids). It is not collision-resistant: a file crafted to collide
/// can slow parsing down, never make it wrong or panic. Lot files come from
/// the inspection equipment, and SipHash was a visible share of parse time.
#[derive(Default, Clone, Copy)]
struct FastHasher(u64);

impl std::hash::Hasher for FastHasher {
    fn finish(&self) -> u64 {
        self.0
    }

    fn write(&mut self, bytes: &[u8]) {
        let mut chunks = bytes.chunks_exact(8);
        for chunk in chunks.by_ref() {
            let mut word = [0u8; 8];
            word.copy_from_slice(chunk);
            self.write_u64(u64::from_le_bytes(word));
        }
        let mut tail = [0u8; 8];
        let rest = chunks.remainder();
        tail[..rest.len()].copy_from_slice(rest);
        self.write_u64(u64::from_le_bytes(tail) ^ ((rest.len() as u64) << 59));
    }

    fn write_u8(&mut self, n: u8) {
        self.write_u64(u64::from(n));
    }

    fn write_u32(&mut self, n: u32) {
        self.write_u64(u64::from(n));
    }

    fn write_u64(&mut self, n: u64) {
        self.0 = (self.0.rotate_left(26) ^ n).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    }
}

type FastMap<K, V> = HashMap<K, V, std::hash::BuildHasherDefault<FastHasher>>;

/// Column positions (0-based) of a parsed header.
struct Header {
    layout: Layout,
    line: u64,
    /// Trimmed header cell text, for messages.
    names: Vec<String>,
    source: usize,
    lot: usize,
    sampled_at: Option<usize>,
    unit: Option<usize>,
    /// Long layout only.
    characteristic: usize,
    /// Long layout only.
    value: usize,
    /// Wide layout only: column and interned characteristic name.
    wide: Vec<(usize, u32)>,
}

const LONG_COLUMNS: &str = "source, characteristic, lot, value, sampled_at, unit";

struct Parser<'a, R> {
    file: &'a str,
    window: Window<R>,
    /// Stream offset up to which `line` has counted line ends.
    line_pos: u64,
    line: u64,
    names: Interner,
    serials: Serials,
    group_ids: FastMap<(u32, u32, u32), u32>,
    /// The groups, each with a placeholder track until [`Parser::finish`] hands out `tracks`.
    groups: Vec<Group>,
    /// Per group, its index into `tracks`.
    track_of: Vec<u32>,
    tracks: Vec<Track>,
    /// Per track, the first group using it (named in a repeated-unit error).
    track_group: Vec<u32>,
    /// Per track, the line of each value (for the repeated-unit check); kept only with a
    /// `unit` column.
    lines: Vec<Vec<u32>>,
    rows: usize,
    values: usize,
    /// Wide layout: (source, lot) of the previous row and its groups per characteristic column.
    wide_key: Option<(u32, u32)>,
    wide_groups: Vec<u32>,
    /// Wide layout: the values of the current row, reused between rows.
    wide_values: Vec<f64>,
    /// The empty track every group holds until the parse is finished.
    no_track: Arc<Track>,
}

/// Where an error sits: line and optional 0-based column.
#[derive(Clone, Copy)]
struct At {
    line: u64,
    col: Option<usize>,
}

impl<'a, R: Read> Parser<'a, R> {
    fn new(file: &'a str, window: Window<R>) -> Self {
        Parser {
            file,
            window,
            line_pos: 0,
            line: 1,
            names: Interner::default(),
            serials: Serials::default(),
            group_ids: FastMap::default(),
            groups: Vec::new(),
            track_of: Vec::new(),
            tracks: Vec::new(),
            track_group: Vec::new(),
            lines: Vec::new(),
            rows: 0,
            values: 0,
            wide_key: None,
            wide_groups: Vec::new(),
            wide_values: Vec::new(),
            no_track: Arc::default(),
        }
    }

    fn error(
        &self,
        at: At,
        header: Option<&Header>,
        kind: ErrorKind,
        message: String,
    ) -> LotFileError {
        LotFileError {
            file: self.file.to_owned(),
            line: at.line,
            column: at.col.map(|c| c as u64 + 1),
            column_name: at
                .col
                .and_then(|c| header.and_then(|h| h.names.get(c)).cloned()),
            kind,
            message,
        }
    }

    /// Physical line of stream offset `off`, which must still be in the window; offsets must
    /// not go backwards.
    fn line_at(&mut self, off: u64) -> u64 {
        if off > self.line_pos {
            self.line += count_newlines(self.window.bytes(self.line_pos, off));
            self.line_pos = off;
        }
        self.line
    }

    /// Checks the start of the stream (a UTF-16 byte-order mark is refused, a UTF-8 one skipped).
    fn start(&mut self) -> Result<(), ReadError> {
        let head = self.window.peek(3).map_err(ReadError::Io)?;
        if head.starts_with(b"\xFF\xFE") || head.starts_with(b"\xFE\xFF") {
            return Err(ReadError::Lot(
                self.error(
                    At { line: 1, col: None },
                    None,
                    ErrorKind::Encoding,
                    "expected UTF-8 text, found a UTF-16 byte-order mark (save the file as UTF-8)"
                        .to_owned(),
                ),
            ));
        }
        if head.starts_with(UTF8_BOM) {
            self.window.skip(UTF8_BOM.len());
            self.line_pos = self.window.offset();
        }
        Ok(())
    }

    fn run(mut self) -> Result<LotFile, ReadError> {
        self.start()?;
        let mut record = Record::default();
        let mut header: Option<Header> = None;
        loop {
            let before = self.window.offset();
            if !self
                .window
                .next_record(&mut record, before)
                .map_err(ReadError::Io)?
            {
                break;
            }
            let end = self.window.offset();
            let raw = self.window.bytes(before, end);
            let start = before + record_start(raw, 0) as u64;
            let line = self.line_at(start);
            self.check_record_quotes(start, end, line, header.as_ref())
                .map_err(ReadError::Lot)?;
            if !record.iter().all(|f| f.trim_ascii().is_empty()) {
                let step = match &header {
                    None => self.header(&record, line).map(|h| header = Some(h)),
                    Some(h) => self.row(h, &record, line),
                };
                if let Err(e) = step {
                    // A unit measured twice before this line is the first problem of the file.
                    let repeat = header.as_ref().and_then(|h| self.first_repeat(h, e.line));
                    return Err(ReadError::Lot(repeat.unwrap_or(e)));
                }
            }
            self.line_at(end);
        }
        self.finish(header).map_err(ReadError::Lot)
    }

    /// The strict RFC 4180 check of the raw record from `start` to `end`.
    fn check_record_quotes(
        &self,
        start: u64,
        end: u64,
        line: u64,
        header: Option<&Header>,
    ) -> Result<(), LotFileError> {
        let raw = self.window.bytes(start, end);
        let Err(p) = check_quotes(raw) else {
            return Ok(());
        };
        let col = usize::try_from(p.col - 1).ok();
        let field = raw.get(p.field_start..).unwrap_or_default();
        let field = field[..field.len().min(4 * FOUND_CHARS + 4)].trim_ascii_end();
        Err(self.error(
            At { line, col },
            header,
            ErrorKind::Csv,
            format!(
                "{}, found {}",
                p.expected,
                found(&String::from_utf8_lossy(field))
            ),
        ))
    }

    /// One data row after the header.
    fn row(&mut self, h: &Header, record: &Record, line: u64) -> Result<(), LotFileError> {
        if record.len() != h.names.len() {
            return Err(self.error(
                At { line, col: None },
                Some(h),
                ErrorKind::FieldCount,
                format!(
                    "expected {} fields as in the header on line {}, found {} fields on line {}",
                    h.names.len(),
                    h.line,
                    record.len(),
                    line
                ),
            ));
        }
        self.rows += 1;
        match h.layout {
            Layout::Long => self.long_row(h, record, line),
            Layout::Wide => self.wide_row(h, record, line),
        }
    }

    /// The parsed file, once every record was read.
    fn finish(mut self, header: Option<Header>) -> Result<LotFile, LotFileError> {
        let Some(h) = header else {
            return Err(self.error(
                At { line: 1, col: None },
                None,
                ErrorKind::Header,
                "expected a header row such as source,characteristic,lot,value, found no rows"
                    .to_owned(),
            ));
        };
        if let Some(e) = self.first_repeat(&h, u64::MAX) {
            return Err(e);
        }
        if self.rows == 0 {
            return Err(self.error(
                At {
                    line: h.line,
                    col: None,
                },
                Some(&h),
                ErrorKind::NoData,
                "expected at least one data row after the header, found none".to_owned(),
            ));
        }
        let tracks: Vec<Arc<Track>> = std::mem::take(&mut self.tracks)
            .into_iter()
            .map(|mut t| {
                t.shrink_to_fit();
                Arc::new(t)
            })
            .collect();
        for (g, &t) in self.groups.iter_mut().zip(&self.track_of) {
            g.values.shrink_to_fit();
            g.track = Arc::clone(&tracks[t as usize]);
        }
        Ok(LotFile {
            layout: h.layout,
            groups: self.groups,
            rows: self.rows,
            values: self.values,
            serials: Arc::new(self.serials),
        })
    }

    /// The field as UTF-8 text, untrimmed.
    fn text<'r>(
        &self,
        record: &'r Record,
        at: At,
        header: Option<&Header>,
    ) -> Result<&'r str, LotFileError> {
        let bytes = at.col.and_then(|c| record.get(c)).unwrap_or(b"");
        std::str::from_utf8(bytes).map_err(|e| {
            let bad = bytes.get(e.valid_up_to()).copied().unwrap_or(0);
            self.error(
                at,
                header,
                ErrorKind::Encoding,
                format!(
                    "expected UTF-8 text, found invalid byte 0x{bad:02X} in {}",
                    found(&String::from_utf8_lossy(bytes))
                ),
            )
        })
    }

    /// A name field: no control characters, trimmed, at most
    /// [`MAX_NAME_CHARS`]. `None` when empty and `what` is optional.
    fn name<'r>(
        &self,
        record: &'r Record,
        at: At,
        header: Option<&Header>,
        what: &str,
        required: bool,
    ) -> Result<Option<&'r str>, LotFileError> {
        let raw = self.text(record, at, header)?;
        // Cc is U+0000..U+001F, U+007F and U+0080..U+009F (UTF-8 C2 80..C2 9F),
        // so text without those bytes needs no per-character scan.
        let maybe_control = raw.bytes().any(|b| b < 0x20 || b == 0x7F || b == 0xC2);
        if let Some(c) = raw.chars().find(|c| maybe_control && c.is_control()) {
            return Err(self.error(
                at,
                header,
                ErrorKind::ControlCharacter,
                format!(
                    "expected a {what} without control characters, found U+{:04X} in {}",
                    u32::from(c),
                    found(raw)
                ),
            ));
        }
        let t = trim(raw);
        if t.is_empty() {
            if !required {
                return Ok(None);
            }
            return Err(self.error(
                at,
                header,
                ErrorKind::EmptyField,
                format!("expected a non-empty {what}, found an empty cell"),
            ));
        }
        if t.len() > MAX_NAME_CHARS {
            let n = t.chars().count();
            if n > MAX_NAME_CHARS {
                return Err(self.error(
                    at,
                    header,
                    ErrorKind::TooLong,
                    format!(
                        "expected a {what} of at most {MAX_NAME_CHARS} characters, found {n} characters: {}",
                        found(t)
                    ),
                ));
            }
        }
        Ok(Some(t))
    }

    fn number(&self, record: &Record, at: At, header: &Header) -> Result<f64, LotFileError> {
        let raw = self.text(record, at, Some(header))?;
        parse_number(raw).map_err(|e| {
            let (kind, message) = match e {
                NumberError::Empty => (
                    ErrorKind::EmptyField,
                    "expected a number, found an empty cell (a value is missing)".to_owned(),
                ),
                NumberError::Bad => (
                    ErrorKind::BadNumber,
                    format!(
                        "expected a number with '.' as decimal separator, found {}",
                        found(trim(raw))
                    ),
                ),
                NumberError::NonFinite => (
                    ErrorKind::NonFiniteNumber,
                    format!("expected a finite number, found {}", found(trim(raw))),
                ),
                NumberError::Overflow => (
                    ErrorKind::NonFiniteNumber,
                    format!(
                        "expected a finite number, found {} which overflows a 64-bit float",
                        found(trim(raw))
                    ),
                ),
            };
            self.error(at, Some(header), kind, message)
        })
    }

    fn sampled_at(
        &self,
        record: &Record,
        line: u64,
        header: &Header,
    ) -> Result<Option<Timestamp>, LotFileError> {
        let Some(col) = header.sampled_at else {
            return Ok(None);
        };
        let at = At {
            line,
            col: Some(col),
        };
        let t = trim(self.text(record, at, Some(header))?);
        if t.is_empty() {
            return Ok(None);
        }
        parse_timestamp(t).map(Some).ok_or_else(|| {
            self.error(
                at,
                Some(header),
                ErrorKind::BadTimestamp,
                format!(
                    "expected an RFC 3339 date (2026-03-01) or date-time with Z or an offset \
                     (2026-03-01T08:30:00Z, 2026-03-01 08:30:00+02:00) in years 0000-9999, found {}",
                    found(t)
                ),
            )
        })
    }

    fn header(&mut self, record: &Record, line: u64) -> Result<Header, LotFileError> {
        let mut names = Vec::with_capacity(record.len());
        for col in 0..record.len() {
            let at = At {
                line,
                col: Some(col),
            };
            let name = self
                .name(record, at, None, "column name", true)?
                .unwrap_or_default();
            names.push(name.to_owned());
        }
        let mut h = Header {
            layout: Layout::Wide,
            line,
            names,
            source: usize::MAX,
            lot: usize::MAX,
            sampled_at: None,
            unit: None,
            characteristic: usize::MAX,
            value: usize::MAX,
            wide: Vec::new(),
        };
        let mut lower: HashMap<String, usize> = HashMap::with_capacity(h.names.len());
        for (col, name) in h.names.iter().enumerate() {
            if let Some(&first) = lower.get(&name.to_lowercase()) {
                return Err(self.error(
                    At {
                        line,
                        col: Some(col),
                    },
                    Some(&h),
                    ErrorKind::DuplicateColumn,
                    format!(
                        "expected each column name once (names are case-insensitive), found {} again after {} in column {}",
                        found(name),
                        found(&h.names[first]),
                        first + 1
                    ),
                ));
            }
            lower.insert(name.to_lowercase(), col);
        }
        let find = |want: &str| h.names.iter().position(|n| n.eq_ignore_ascii_case(want));
        let characteristic = find("characteristic");
        let value = find("value");
        let (source, lot) = (find("source"), find("lot"));
        h.sampled_at = find("sampled_at");
        h.unit = find("unit");
        let header_text = found(&h.names.join(","));
        if characteristic.is_some() || value.is_some() {
            h.layout = Layout::Long;
            for (col, name) in h.names.iter().enumerate() {
                let known = [
                    "source",
                    "characteristic",
                    "lot",
                    "value",
                    "sampled_at",
                    "unit",
                ]
                .iter()
                .any(|k| name.eq_ignore_ascii_case(k));
                if !known {
                    return Err(self.error(
                        At {
                            line,
                            col: Some(col),
                        },
                        Some(&h),
                        ErrorKind::UnknownColumn,
                        format!(
                            "expected only the long-layout columns {LONG_COLUMNS}, found unknown column {}",
                            found(name)
                        ),
                    ));
                }
            }
            let missing: Vec<&str> = [
                ("source", source),
                ("characteristic", characteristic),
                ("lot", lot),
                ("value", value),
            ]
            .iter()
            .filter(|(_, c)| c.is_none())
            .map(|(n, _)| *n)
            .collect();
            match (source, characteristic, lot, value) {
                (Some(s), Some(c), Some(l), Some(v)) => {
                    h.source = s;
                    h.characteristic = c;
                    h.lot = l;
                    h.value = v;
                }
                _ => {
                    return Err(self.error(
                        At { line, col: None },
                        Some(&h),
                        ErrorKind::MissingColumn,
                        format!(
                            "expected the long-layout columns source, characteristic, lot, value; \
                             missing {}; found header {header_text}",
                            missing.join(", ")
                        ),
                    ));
                }
            }
        } else {
            let (Some(s), Some(l)) = (source, lot) else {
                let missing: Vec<&str> = [("source", source), ("lot", lot)]
                    .iter()
                    .filter(|(_, c)| c.is_none())
                    .map(|(n, _)| *n)
                    .collect();
                return Err(self.error(
                    At { line, col: None },
                    Some(&h),
                    ErrorKind::MissingColumn,
                    format!(
                        "expected a long header (source,characteristic,lot,value) or a wide header \
                         (source,lot,<characteristic>...); missing {}; found header {header_text}",
                        missing.join(", ")
                    ),
                ));
            };
            h.source = s;
            h.lot = l;
            let fixed = [Some(s), Some(l), h.sampled_at, h.unit];
            let mut wide = Vec::new();
            for (col, name) in h.names.iter().enumerate() {
                if !fixed.contains(&Some(col)) {
                    wide.push((col, self.names.intern(name)));
                }
            }
            if wide.is_empty() {
                return Err(self.error(
                    At { line, col: None },
                    Some(&h),
                    ErrorKind::Header,
                    format!(
                        "expected at least one characteristic column in the wide layout \
                         (source,lot[,sampled_at][,unit],<characteristic>...), found header {header_text}"
                    ),
                ));
            }
            h.wide = wide;
        }
        Ok(h)
    }

    /// Returns the group of (source, lot, characteristic), creating it at `line`.
    /// The group of `ids`, created at `line` when new: on track `track`, or on a new one.
    fn group(
        &mut self,
        ids: (u32, u32, u32),
        names: (&str, &str, &str),
        line: u64,
        track: Option<u32>,
    ) -> u32 {
        let next = u32::try_from(self.groups.len()).unwrap_or(u32::MAX);
        match self.group_ids.entry(ids) {
            Entry::Occupied(e) => *e.get(),
            Entry::Vacant(e) => {
                e.insert(next);
                self.groups.push(Group {
                    source: names.0.to_owned(),
                    lot: names.1.to_owned(),
                    characteristic: names.2.to_owned(),
                    values: Vec::new(),
                    track: Arc::clone(&self.no_track),
                    first_line: line,
                });
                let track = track.unwrap_or_else(|| {
                    self.tracks.push(Track::default());
                    self.track_group.push(next);
                    self.lines.push(Vec::new());
                    u32::try_from(self.tracks.len() - 1).unwrap_or(u32::MAX)
                });
                self.track_of.push(track);
                next
            }
        }
    }

    /// The track of group `g`.
    fn track_mut(&mut self, g: u32) -> &mut Track {
        &mut self.tracks[self.track_of[g as usize] as usize]
    }

    /// The repeated unit (same source, lot and characteristic) whose second measurement
    /// comes first in the file, when that is before line `limit`.
    fn first_repeat(&self, h: &Header, limit: u64) -> Option<LotFileError> {
        h.unit?;
        // (second line, first line, group, unit)
        let mut best: Option<(u64, u64, usize, u32)> = None;
        let mut pairs: Vec<(u32, u32)> = Vec::new();
        for (t, lines) in self.lines.iter().enumerate().filter(|(_, l)| !l.is_empty()) {
            pairs.clear();
            let units = &self.tracks[t].units;
            pairs.extend(
                units
                    .iter()
                    .zip(lines)
                    .filter(|(u, _)| **u != NO_UNIT)
                    .map(|(u, l)| (*u, *l)),
            );
            pairs.sort_unstable();
            for w in pairs.windows(2).filter(|w| w[0].0 == w[1].0) {
                let second = u64::from(w[1].1);
                if second < limit && best.is_none_or(|b| second < b.0) {
                    best = Some((second, u64::from(w[0].1), t, w[0].0));
                }
            }
        }
        let (line, first, t, unit) = best?;
        let g = &self.groups[self.track_group[t] as usize];
        let what = match h.layout {
            Layout::Long => format!("characteristic {}", found(&g.characteristic)),
            Layout::Wide => "its characteristics".to_owned(),
        };
        Some(self.error(
            At { line, col: h.unit },
            Some(h),
            ErrorKind::DuplicateMeasurement,
            format!(
                "expected each unit once per source, lot and characteristic, found unit {} \
                 of source {}, lot {} measured for {what} on line {first} and again on line {line}",
                found(self.serials.get(unit).unwrap_or_default()),
                found(&g.source),
                found(&g.lot)
            ),
        ))
    }

    /// Interns `unit` and adds it, with its time, to the track of group `g`; with a `unit`
    /// column, remembers the line of the value for the repeated-unit check.
    fn track_value(
        &mut self,
        h: &Header,
        g: u32,
        unit: Option<&str>,
        sampled_at: Option<Timestamp>,
        line: u64,
    ) {
        let t = self.track_of[g as usize] as usize;
        if h.unit.is_some() {
            // Lines past u32::MAX (a file of several GB) would only blur a repeat's message.
            self.lines[t].push(u32::try_from(line).unwrap_or(u32::MAX));
        }
        let uid = unit.map_or(NO_UNIT, |u| self.serials.intern(u));
        self.track_mut(g).push(uid, Stamp::from(sampled_at));
    }

    fn unit<'r>(
        &self,
        record: &'r Record,
        line: u64,
        header: &Header,
    ) -> Result<Option<&'r str>, LotFileError> {
        match header.unit {
            None => Ok(None),
            Some(col) => self.name(
                record,
                At {
                    line,
                    col: Some(col),
                },
                Some(header),
                "unit serial",
                false,
            ),
        }
    }

    fn required<'r>(
        &self,
        record: &'r Record,
        line: u64,
        header: &Header,
        col: usize,
        what: &str,
    ) -> Result<&'r str, LotFileError> {
        let at = At {
            line,
            col: Some(col),
        };
        Ok(self
            .name(record, at, Some(header), what, true)?
            .unwrap_or_default())
    }

    fn long_row(&mut self, h: &Header, record: &Record, line: u64) -> Result<(), LotFileError> {
        let source = self.required(record, line, h, h.source, "source")?;
        let lot = self.required(record, line, h, h.lot, "lot")?;
        let characteristic = self.required(record, line, h, h.characteristic, "characteristic")?;
        let at = At {
            line,
            col: Some(h.value),
        };
        let value = self.number(record, at, h)?;
        let sampled_at = self.sampled_at(record, line, h)?;
        let unit = self.unit(record, line, h)?;

        let ids = (
            self.names.intern(source),
            self.names.intern(lot),
            self.names.intern(characteristic),
        );
        let g = self.group(ids, (source, lot, characteristic), line, None);
        self.track_value(h, g, unit, sampled_at, line);
        self.groups[g as usize].values.push(value);
        self.values += 1;
        Ok(())
    }

    /// Makes the groups of a wide row's (source, lot) current, creating them together on one
    /// track when the lot is new. Lots of one file usually have one sample size, so a new lot's
    /// vectors start at the size of the lot before it: a large file then holds its values
    /// without the slack of doubling (a quarter of their size on average). A lot that grows
    /// past it grows as usual; one that stays smaller is shrunk when the file is read.
    fn enter_wide_lot(&mut self, h: &Header, key: (u32, u32), names: (&str, &str), line: u64) {
        let expect = self
            .wide_groups
            .first()
            .map_or(0, |&g| self.groups[g as usize].values.len());
        self.wide_groups.clear();
        let mut track = None;
        for &(col, cid) in &h.wide {
            let name = h.names.get(col).map_or("", String::as_str);
            let g = self.group((key.0, key.1, cid), (names.0, names.1, name), line, track);
            let t = self.track_of[g as usize];
            let values = &mut self.groups[g as usize].values;
            if values.is_empty() {
                values.reserve_exact(expect);
                if track.is_none() {
                    let t = t as usize;
                    self.tracks[t].units.reserve_exact(expect);
                    self.tracks[t].sampled_at.reserve_exact(expect);
                    if h.unit.is_some() {
                        self.lines[t].reserve_exact(expect);
                    }
                }
            }
            track = Some(t);
            self.wide_groups.push(g);
        }
        self.wide_key = Some(key);
    }

    fn wide_row(&mut self, h: &Header, record: &Record, line: u64) -> Result<(), LotFileError> {
        let source = self.required(record, line, h, h.source, "source")?;
        let lot = self.required(record, line, h, h.lot, "lot")?;
        let sampled_at = self.sampled_at(record, line, h)?;
        let unit = self.unit(record, line, h)?;
        // Parse every value before storing any, so a row is all or nothing.
        self.wide_values.clear();
        for &(col, _) in &h.wide {
            let at = At {
                line,
                col: Some(col),
            };
            let value = self.number(record, at, h)?;
            self.wide_values.push(value);
        }

        let key = (self.names.intern(source), self.names.intern(lot));
        if self.wide_key != Some(key) {
            self.enter_wide_lot(h, key, (source, lot), line);
        }
        if let Some(&first) = self.wide_groups.first() {
            self.track_value(h, first, unit, sampled_at, line);
        }
        for (&g, &value) in self.wide_groups.iter().zip(&self.wide_values) {
            self.groups[g as usize].values.push(value);
        }
        self.values += h.wide.len();
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    const LONG: &str = "source,characteristic,lot,value\n";

    /// The sampling times of group `g`.
    fn times(f: &LotFile, g: usize) -> Vec<Option<Timestamp>> {
        f.groups[g].sampled_at().iter().map(|t| t.get()).collect()
    }

    /// The unit serials of group `g`, as text.
    fn units(f: &LotFile, g: usize) -> Vec<Option<String>> {
        f.groups[g]
            .units()
            .iter()
            .map(|&u| f.serials.get(u).map(str::to_owned))
            .collect()
    }

    fn ok(text: &str) -> LotFile {
        match parse("t.csv", text.as_bytes()) {
            Ok(f) => f,
            Err(e) => panic!("expected success, got {e}"),
        }
    }

    fn fail_bytes(bytes: &[u8]) -> LotFileError {
        match parse("t.csv", bytes) {
            Ok(f) => panic!("expected an error, got {f:?}"),
            Err(e) => e,
        }
    }

    fn fail(text: &str) -> LotFileError {
        fail_bytes(text.as_bytes())
    }

    /// Asserts kind, line and 1-based column of an error.
    fn assert_err(e: &LotFileError, kind: ErrorKind, line: u64, column: Option<u64>) {
        assert_eq!(
            (e.kind, e.line, e.column),
            (kind, line, column),
            "unexpected error: {e}"
        );
    }

    fn ts(text: &str) -> Timestamp {
        parse_timestamp(text).unwrap_or_else(|| panic!("bad timestamp {text}"))
    }

    // --- one test per error kind -------------------------------------------

    #[test]
    fn error_encoding_names_line_and_column() {
        let e = fail_bytes(b"source,characteristic,lot,value\nS,C,L,1\nS,C\xff,L,2\n");
        assert_err(&e, ErrorKind::Encoding, 3, Some(2));
        assert_eq!(e.column_name.as_deref(), Some("characteristic"));
        assert!(e.message.contains("0xFF"), "{e}");
        // In the header, too.
        let e = fail_bytes(b"source,lot,\xc3(\nS,L,1\n");
        assert_err(&e, ErrorKind::Encoding, 1, Some(3));
    }

    #[test]
    fn error_encoding_utf16_bom() {
        let e = fail_bytes(b"\xFF\xFEs\0o\0");
        assert_err(&e, ErrorKind::Encoding, 1, None);
        assert!(e.message.contains("UTF-16"), "{e}");
    }

    #[test]
    fn error_csv_text_after_closing_quote() {
        let e = fail(&format!("{LONG}S,C,L,1\nS,C,L,\"2\"x\n"));
        assert_err(&e, ErrorKind::Csv, 3, Some(4));
        assert_eq!(e.column_name.as_deref(), Some("value"));
        assert!(e.message.ends_with(r#"found "\"2\"x""#), "{e}");
    }

    #[test]
    fn error_csv_quote_inside_unquoted_field() {
        let e = fail(&format!("{LONG}S,5\" bore,L,1\n"));
        assert_err(&e, ErrorKind::Csv, 2, Some(2));
        assert!(e.message.ends_with(r#"found "5\" bore,L,1""#), "{e}");
    }

    #[test]
    fn error_csv_unterminated_quote() {
        let e = fail(&format!("{LONG}S,C,L,1\n\n\"S,C,L,2\nS,C,L,3\n"));
        assert_err(&e, ErrorKind::Csv, 4, Some(1));
        assert!(e.message.contains("closing quote"), "{e}");
    }

    #[test]
    fn error_header_missing_in_empty_file() {
        for text in ["", "\n\n", "# only a comment\n", ",,,\n  \n", "\u{feff}"] {
            let e = fail(text);
            assert_err(&e, ErrorKind::Header, 1, None);
        }
    }

    #[test]
    fn error_header_wide_without_characteristics() {
        let e = fail("# c\nsource,lot,sampled_at,unit\nS,L,2026-03-01,U1\n");
        assert_err(&e, ErrorKind::Header, 2, None);
        assert!(e.message.contains("at least one characteristic"), "{e}");
    }

    #[test]
    fn error_missing_column_long() {
        let e = fail("source,characteristic,value\nS,C,1\n");
        assert_err(&e, ErrorKind::MissingColumn, 1, None);
        assert!(e.message.contains("missing lot"), "{e}");
        // Only one of characteristic/value still means long layout.
        let e = fail("source,lot,value\nS,L,1\n");
        assert_err(&e, ErrorKind::MissingColumn, 1, None);
        assert!(e.message.contains("missing characteristic"), "{e}");
    }

    #[test]
    fn error_missing_column_wide() {
        let e = fail("supplier,lot,bore\nS,L,1\n");
        assert_err(&e, ErrorKind::MissingColumn, 1, None);
        assert!(e.message.contains("missing source"), "{e}");
    }

    #[test]
    fn error_unknown_column_long() {
        let e = fail("source,characteristic,lot,value,operator\nS,C,L,1,Ann\n");
        assert_err(&e, ErrorKind::UnknownColumn, 1, Some(5));
        assert_eq!(e.column_name.as_deref(), Some("operator"));
        assert!(e.message.contains("\"operator\""), "{e}");
        assert!(e.message.contains(LONG_COLUMNS), "{e}");
    }

    #[test]
    fn error_duplicate_column_case_insensitive() {
        let e = fail("source,lot,Bore,bore\nS,L,1,2\n");
        assert_err(&e, ErrorKind::DuplicateColumn, 1, Some(4));
        let e = fail("Source,characteristic,lot,value, SOURCE \nS,C,L,1,S\n");
        assert_err(&e, ErrorKind::DuplicateColumn, 1, Some(5));
        assert!(e.message.contains("column 1"), "{e}");
    }

    #[test]
    fn error_field_count_names_both_counts() {
        let e = fail(&format!("{LONG}S,C,L,1\nS,C,L,1,extra\n"));
        assert_err(&e, ErrorKind::FieldCount, 3, None);
        assert!(e.message.contains("expected 4 fields"), "{e}");
        assert!(e.message.contains("found 5 fields on line 3"), "{e}");
        let e = fail(&format!("{LONG}S,C,L\n"));
        assert_err(&e, ErrorKind::FieldCount, 2, None);
    }

    #[test]
    fn error_empty_required_field() {
        let e = fail(&format!("{LONG}S,C,  ,1\n"));
        assert_err(&e, ErrorKind::EmptyField, 2, Some(3));
        assert_eq!(e.column_name.as_deref(), Some("lot"));
        let e = fail(&format!("{LONG}S,C,L,\n"));
        assert_err(&e, ErrorKind::EmptyField, 2, Some(4));
        assert!(e.message.contains("a value is missing"), "{e}");
        let e = fail("source,lot,\nS,L,1\n");
        assert_err(&e, ErrorKind::EmptyField, 1, Some(3));
    }

    #[test]
    fn error_empty_cell_in_wide_layout() {
        let e = fail("source,lot,bore,length\nS,L,1,2\nS,L,3,\n");
        assert_err(&e, ErrorKind::EmptyField, 3, Some(4));
        assert_eq!(e.column_name.as_deref(), Some("length"));
    }

    #[test]
    fn error_control_character_in_quoted_name() {
        let e = fail(&format!("{LONG}S,\"Bo\tre\",L,1\n"));
        assert_err(&e, ErrorKind::ControlCharacter, 2, Some(2));
        assert!(e.message.contains("U+0009"), "{e}");
        let e = fail(&format!("{LONG}S,C,\"L\n1\",1\n"));
        assert_err(&e, ErrorKind::ControlCharacter, 2, Some(3));
        let e = fail(&format!("{LONG}S\u{85},C,L,1\n"));
        assert_err(&e, ErrorKind::ControlCharacter, 2, Some(1));
    }

    #[test]
    fn error_name_too_long() {
        let ok_name = "é".repeat(MAX_NAME_CHARS);
        let f = ok(&format!("{LONG}{ok_name},C,L,1\n"));
        assert_eq!(f.groups[0].source, ok_name);
        let long = "x".repeat(MAX_NAME_CHARS + 1);
        let e = fail(&format!("{LONG}S,C,{long},1\n"));
        assert_err(&e, ErrorKind::TooLong, 2, Some(3));
        assert!(e.message.contains("201 characters"), "{e}");
        assert!(e.message.len() < 200, "found text is truncated: {e}");
    }

    #[test]
    fn error_bad_number_message_matches_contract() {
        let mut text = String::from(LONG);
        for i in 2..17 {
            text.push_str(&format!("S,C,L,{i}\n"));
        }
        text.push_str("S,C,L,\"2,05\"\n");
        let e = parse("lots/a.csv", text.as_bytes()).unwrap_err();
        assert_err(&e, ErrorKind::BadNumber, 17, Some(4));
        assert_eq!(
            e.to_string(),
            "lots/a.csv:17:4 (column value): expected a number with '.' as decimal separator, found \"2,05\""
        );
    }

    #[test]
    fn error_bad_number_variants() {
        for bad in [
            "0x1A", "abc", "1.2.3", ".", "-", "e5", "1e", "2 05", "1_000", "١",
        ] {
            let e = fail(&format!("{LONG}S,C,L,{bad}\n"));
            assert_err(&e, ErrorKind::BadNumber, 2, Some(4));
        }
    }

    #[test]
    fn error_non_finite_number() {
        for bad in ["NaN", "nan", "inf", "-inf", "+Infinity", "1e999", "-2e308"] {
            let e = fail(&format!("{LONG}S,C,L,{bad}\n"));
            assert_err(&e, ErrorKind::NonFiniteNumber, 2, Some(4));
        }
        let e = fail(&format!("{LONG}S,C,L,1e999\n"));
        assert!(e.message.contains("overflows"), "{e}");
    }

    #[test]
    fn error_bad_timestamp() {
        for bad in [
            "2026-03-01T08:30:00",
            "2026-02-30",
            "01.03.2026",
            "2026-3-1",
            "2026-03-01T25:00:00Z",
            "2026-03-01T08:30Z",
            "0000-01-01T00:00:00+01:00",
            "yesterday",
        ] {
            let e = fail(&format!(
                "source,characteristic,lot,value,sampled_at\nS,C,L,1,{bad}\n"
            ));
            assert_err(&e, ErrorKind::BadTimestamp, 2, Some(5));
            assert_eq!(e.column_name.as_deref(), Some("sampled_at"));
        }
    }

    #[test]
    fn error_duplicate_measurement_names_both_lines() {
        let e =
            fail("source,characteristic,lot,value,unit\nS,C,L,1,U1\nS,D,L,1,U1\n# c\nS,C,L,2,U1\n");
        assert_err(&e, ErrorKind::DuplicateMeasurement, 5, Some(5));
        assert!(e.message.contains("line 2"), "{e}");
        assert!(e.message.contains("line 5"), "{e}");
        let e = fail("source,lot,unit,bore\nS,L,U1,1\nS,L,U2,1\nS,L,U1,1\n");
        assert_err(&e, ErrorKind::DuplicateMeasurement, 4, Some(3));
        assert!(e.message.contains("line 2"), "{e}");
    }

    #[test]
    fn repeated_rows_without_unit_are_kept() {
        let f = ok("source,characteristic,lot,value,unit\nS,C,L,1,\nS,C,L,2,\n");
        assert_eq!(f.groups[0].values, vec![1.0, 2.0]);
        assert_eq!(units(&f, 0), vec![None, None]);
        // Same unit in another lot or source is fine.
        ok("source,characteristic,lot,value,unit\nS,C,L,1,U\nS,C,M,2,U\nT,C,L,3,U\n");
    }

    #[test]
    fn error_no_data() {
        let e = fail("# comment\nsource,characteristic,lot,value\n\n# more\n,,,\n");
        assert_err(&e, ErrorKind::NoData, 2, None);
    }

    #[test]
    fn display_without_column() {
        let e = fail("source,characteristic,value\nS,C,1\n");
        assert!(e.to_string().starts_with("t.csv:1: expected"), "{e}");
    }

    #[test]
    fn no_partial_lots_on_late_error() {
        let e = fail(&format!("{LONG}S,C,L,1\nS,C,L,2\nS,C,L,x\n"));
        assert_err(&e, ErrorKind::BadNumber, 4, Some(4));
    }

    // --- accepted files ------------------------------------------------------

    #[test]
    fn long_layout_basic() {
        let f = ok(&format!("{LONG}ACME,bore,L1,2.05\nACME,bore,L1,2.06\n"));
        assert_eq!(f.layout, Layout::Long);
        assert_eq!((f.rows, f.values), (2, 2));
        let g = &f.groups[0];
        assert_eq!((g.source.as_str(), g.lot.as_str()), ("ACME", "L1"));
        assert_eq!(g.characteristic, "bore");
        assert_eq!(g.values, vec![2.05, 2.06]);
        assert_eq!(units(&f, 0), vec![None, None]);
        assert_eq!(times(&f, 0), vec![None, None]);
        assert_eq!(g.first_line, 2);
    }

    #[test]
    fn long_layout_column_order_and_case_free() {
        let f =
            ok(" Value ,LOT,Unit,Characteristic,SOURCE,Sampled_At\n1.5,L,U1,bore,S,2026-03-01\n");
        let g = &f.groups[0];
        assert_eq!(
            (g.source.as_str(), g.lot.as_str(), g.characteristic.as_str()),
            ("S", "L", "bore")
        );
        assert_eq!(g.values, vec![1.5]);
        assert_eq!(units(&f, 0), vec![Some("U1".to_owned())]);
        assert_eq!(times(&f, 0), vec![Some(ts("2026-03-01"))]);
    }

    #[test]
    fn wide_layout() {
        let f = ok("source,lot,unit,sampled_at,Bore Ø,length\n\
                    S,L1,U1,2026-03-01T08:30:00Z,2.05,10\n\
                    S,L1,U2,2026-03-01T08:31:00Z,2.06,11\n\
                    S,L2,U1,,2.07,12\n");
        assert_eq!(f.layout, Layout::Wide);
        assert_eq!((f.rows, f.values), (3, 6));
        let names: Vec<_> = f
            .groups
            .iter()
            .map(|g| (g.lot.as_str(), g.characteristic.as_str(), g.first_line))
            .collect();
        assert_eq!(
            names,
            vec![
                ("L1", "Bore Ø", 2),
                ("L1", "length", 2),
                ("L2", "Bore Ø", 4),
                ("L2", "length", 4)
            ]
        );
        assert_eq!(f.groups[1].values, vec![10.0, 11.0]);
        assert_eq!(
            units(&f, 0),
            vec![Some("U1".to_owned()), Some("U2".to_owned())]
        );
        assert_eq!(times(&f, 2), vec![None]);
        assert_eq!(
            f.groups[0].sampled_at()[1].get().map(|t| t.to_rfc3339()),
            Some("2026-03-01T08:31:00.000Z".to_owned())
        );
    }

    #[test]
    fn wide_lot_characteristics_share_one_track_in_row_order() {
        // A lot's rows may come back after another lot's: its track keeps growing in step with
        // every characteristic's values.
        let f = ok("source,lot,unit,sampled_at,a,b\n\
                    S,L1,U1,2026-03-01T08:00:00Z,1,10\n\
                    S,L2,U1,2026-03-02T08:00:00Z,2,20\n\
                    S,L1,U2,,3,30\n");
        assert_eq!(f.groups.len(), 4);
        let (a1, b1, a2) = (&f.groups[0], &f.groups[1], &f.groups[2]);
        assert!(Arc::ptr_eq(&a1.track, &b1.track));
        assert!(!Arc::ptr_eq(&a1.track, &a2.track));
        assert_eq!(
            (a1.values.clone(), b1.values.clone()),
            (vec![1.0, 3.0], vec![10.0, 30.0])
        );
        assert_eq!(
            units(&f, 1),
            vec![Some("U1".to_owned()), Some("U2".to_owned())]
        );
        assert_eq!(times(&f, 1), vec![Some(ts("2026-03-01T08:00:00Z")), None]);
        assert_eq!(units(&f, 3), vec![Some("U1".to_owned())]);
    }

    #[test]
    fn long_groups_keep_their_own_tracks() {
        let f = ok("source,characteristic,lot,value,unit\nS,a,L,1,U1\nS,b,L,2,U1\nS,a,L,3,U2\n");
        assert!(!Arc::ptr_eq(&f.groups[0].track, &f.groups[1].track));
        assert_eq!(
            units(&f, 0),
            vec![Some("U1".to_owned()), Some("U2".to_owned())]
        );
        assert_eq!(units(&f, 1), vec![Some("U1".to_owned())]);
    }

    #[test]
    fn error_repeated_unit_in_wide_lot_split_over_the_file() {
        let e = fail("source,lot,unit,a,b\nS,L1,U1,1,2\nS,L2,U1,1,2\nS,L1,U1,3,4\n");
        assert_err(&e, ErrorKind::DuplicateMeasurement, 4, Some(3));
        assert!(e.message.contains("on line 2 and again on line 4"), "{e}");
    }

    #[test]
    fn wide_layout_minimal_and_reordered() {
        let f = ok("bore,LOT,Source\n1,L,S\n2,L,S\n");
        assert_eq!(f.layout, Layout::Wide);
        assert_eq!(f.groups.len(), 1);
        assert_eq!(f.groups[0].values, vec![1.0, 2.0]);
    }

    #[test]
    fn bom_crlf_comments_blank_lines_and_line_numbers() {
        let text = "\u{feff}# exported by CMM\r\nsource,characteristic,lot,value\r\n\r\n   \r\n,,,\r\n# note\r\nS,C,L,1\r\n\r\nS,D,L,2\r\n";
        let f = ok(text);
        assert_eq!(f.rows, 2);
        assert_eq!(f.groups[0].first_line, 7);
        assert_eq!(f.groups[1].first_line, 9);
        // Rows of only empty fields are blank whatever their field count.
        let more = text.replace("S,D,L,2", ",,\r\n\"\",\"\"\r\n ,\t,,,,\r\nS,D,L,2");
        assert_eq!(ok(&more).groups[1].first_line, 12);
        let bad = text.replace("S,D,L,2", "S,D,L,z");
        assert_err(&fail(&bad), ErrorKind::BadNumber, 9, Some(4));
        let header_bad = "\u{feff}# c\r\nsource,characteristic,lot,value,x\r\nS,C,L,1\r\n";
        assert_err(&fail(header_bad), ErrorKind::UnknownColumn, 2, Some(5));
    }

    #[test]
    fn bom_directly_before_header() {
        let f = ok("\u{feff}source,characteristic,lot,value\nS,C,L,1");
        assert_eq!(f.groups[0].source, "S");
    }

    #[test]
    fn hash_is_only_a_comment_at_line_start() {
        let f = ok(&format!("{LONG}\"#1\",C,L,1\n#S,C,L,2\n  #S,C,L,3\n"));
        let names: Vec<_> = f
            .groups
            .iter()
            .map(|g| (g.source.as_str(), g.first_line, g.values.clone()))
            .collect();
        assert_eq!(names, vec![("#1", 2, vec![1.0]), ("#S", 4, vec![3.0])]);
        // A '#' line inside a quoted field is field content, not a comment.
        let e = fail(&format!("{LONG}S,C,L,\"2\n# not a comment\"\nS,C,L,3\n"));
        assert_err(&e, ErrorKind::BadNumber, 2, Some(4));
        assert!(e.message.contains("# not a comment"), "{e}");
    }

    #[test]
    fn quoted_fields_with_commas_quotes_and_newlines() {
        let f = ok(&format!(
            "{LONG}\"ACME, Inc.\",\"Bore \"\"A\"\"\",\"L,1\",\" 2.5 \"\nS,C,L,\"\r\n3\r\n\"\nS,C,L,4\n"
        ));
        let g = &f.groups[0];
        assert_eq!(g.source, "ACME, Inc.");
        assert_eq!(g.characteristic, "Bore \"A\"");
        assert_eq!(g.lot, "L,1");
        assert_eq!(g.values, vec![2.5]);
        assert_eq!(f.groups[1].values, vec![3.0, 4.0]);
        assert_eq!(f.groups[1].first_line, 3);
        let e = fail(&format!("{LONG}S,C,L,\"\n5\n\"\nS,C,L,x\n"));
        assert_err(&e, ErrorKind::BadNumber, 5, Some(4));
    }

    #[test]
    fn newline_inside_a_quoted_name_is_a_control_character() {
        let e = fail(&format!("{LONG}S,C,L,1\n\"multi\nline\",C,L,3\nS,C,L,x\n"));
        assert_err(&e, ErrorKind::ControlCharacter, 3, Some(1));
        assert!(e.message.contains("U+000A"), "{e}");
    }

    #[test]
    fn quoted_multiline_record_line_numbers() {
        let e = fail(&format!("{LONG}S,\"C\",\"L\",1\nS,C,L,\"1\n\",2\n"));
        assert_err(&e, ErrorKind::FieldCount, 3, None);
        let f = ok("source,lot,unit,bore\nS,L,\"U\"\"1\",1\nS,L,U2,2\n");
        assert_eq!(units(&f, 0)[0].as_deref(), Some("U\"1"));
    }

    #[test]
    fn numbers_plain_and_scientific() {
        let cases = [
            ("2.05", 2.05),
            ("-1.5", -1.5),
            ("2.05e-3", 2.05e-3),
            ("+3", 3.0),
            (".5", 0.5),
            ("5.", 5.0),
            ("  7.25  ", 7.25),
            ("1E+3", 1000.0),
            ("-0", -0.0),
            ("1e-400", 0.0),
            ("1.7976931348623157e308", f64::MAX),
        ];
        for (text, want) in cases {
            let f = ok(&format!("{LONG}S,C,L,{text}\n"));
            assert_eq!(
                f.groups[0].values[0].to_bits(),
                want.to_bits(),
                "parsing {text:?}"
            );
        }
    }

    #[test]
    fn timestamps() {
        let z = ts("2026-03-01T08:30:00Z");
        assert!(!z.date_only);
        assert_eq!(z.to_rfc3339(), "2026-03-01T08:30:00.000Z");
        let off = ts("2026-03-01T08:30:00+02:00");
        assert_eq!(off.to_rfc3339(), "2026-03-01T06:30:00.000Z");
        let space = ts("2026-03-01 08:30:00.1234-01:30");
        assert_eq!(space.to_rfc3339(), "2026-03-01T10:00:00.123Z");
        let date = ts("2026-03-01");
        assert!(date.date_only);
        assert_eq!(date.to_rfc3339(), "2026-03-01T00:00:00.000Z");
        assert_eq!(ts("2026-03-01t08:30:00z"), z);
        assert!(ts("2026-03-01T00:30:00+01:00") < date);
        let f = ok(
            "source,characteristic,lot,value,sampled_at\nS,C,L,1, 2026-03-01 08:30:00Z \nS,C,L,2,\n",
        );
        assert_eq!(times(&f, 0), vec![Some(z), None]);
    }

    #[test]
    fn rfc3339_text_order_is_time_order() {
        let texts = [
            "0001-01-01",
            "2026-03-01T00:00:00.999Z",
            "2026-03-01T00:00:01Z",
            "2026-03-01T23:59:59+23:59",
            "9999-12-31T23:59:59.999Z",
        ];
        let stamps: Vec<_> = texts.iter().map(|t| ts(t)).collect();
        for w in stamps.windows(2) {
            assert!(w[0] <= w[1]);
            assert!(w[0].to_rfc3339() <= w[1].to_rfc3339());
            assert_eq!(w[1].to_rfc3339().len(), 24);
        }
    }

    #[test]
    fn rfc3339_text_matches_chrono_formatting() {
        // The hand-written digits against chrono's own formatter, over years, months, days,
        // times of day and milliseconds (a stepped sweep; 0001 and 9999 are the ends).
        let start = ts("0001-01-01T00:00:00Z").utc;
        let mut t = start;
        let step = chrono::Duration::seconds(7_919_999) + chrono::Duration::milliseconds(457);
        while t.year() <= 9999 {
            let stamp = Timestamp {
                utc: t,
                date_only: false,
            };
            assert_eq!(
                stamp.to_rfc3339(),
                t.format("%Y-%m-%dT%H:%M:%S%.3fZ").to_string()
            );
            t += step;
        }
    }

    #[test]
    fn groups_in_order_of_first_appearance() {
        let f = ok(&format!(
            "{LONG}S,b,L1,1\nS,a,L1,2\nT,b,L1,3\nS,b,L1,4\nS,b,L2,5\nS,a,L1,6\n"
        ));
        let got: Vec<_> = f
            .groups
            .iter()
            .map(|g| {
                (
                    g.source.as_str(),
                    g.characteristic.as_str(),
                    g.lot.as_str(),
                    g.values.clone(),
                )
            })
            .collect();
        assert_eq!(
            got,
            vec![
                ("S", "b", "L1", vec![1.0, 4.0]),
                ("S", "a", "L1", vec![2.0, 6.0]),
                ("T", "b", "L1", vec![3.0]),
                ("S", "b", "L2", vec![5.0]),
            ]
        );
        assert_eq!((f.rows, f.values), (6, 6));
    }

    #[test]
    fn names_are_case_sensitive_and_trimmed() {
        let f = ok(&format!("{LONG} S ,Bore,L,1\nS,bore,L,2\n"));
        assert_eq!(f.groups.len(), 2);
        assert_eq!(f.groups[0].source, "S");
    }

    #[test]
    fn error_kind_names_are_distinct() {
        let kinds = [
            ErrorKind::Encoding,
            ErrorKind::Csv,
            ErrorKind::Header,
            ErrorKind::MissingColumn,
            ErrorKind::UnknownColumn,
            ErrorKind::DuplicateColumn,
            ErrorKind::FieldCount,
            ErrorKind::EmptyField,
            ErrorKind::ControlCharacter,
            ErrorKind::TooLong,
            ErrorKind::BadNumber,
            ErrorKind::NonFiniteNumber,
            ErrorKind::BadTimestamp,
            ErrorKind::DuplicateMeasurement,
            ErrorKind::NoData,
        ];
        let names: std::collections::HashSet<_> = kinds.iter().map(|k| k.as_str()).collect();
        assert_eq!(names.len(), kinds.len());
    }

    // --- throughput ------------------------------------------------------------

    fn generated_long_file(rows: usize) -> String {
        let mut text = String::with_capacity(rows * 64);
        text.push_str("source,characteristic,lot,value,sampled_at,unit\n");
        let chars = ["bore", "length", "flatness", "hardness"];
        for i in 0..rows {
            let unit = i / chars.len();
            let ch = chars[i % chars.len()];
            let lot = unit / 500;
            let value = 2.0 + (i % 97) as f64 * 0.001;
            text.push_str(&format!(
                "ACME-{},{ch},LOT-{lot},{value:?},2026-03-01T08:{:02}:00Z,SN{unit:06}\n",
                lot % 3,
                unit % 60
            ));
        }
        text
    }

    #[test]
    fn throughput_40k_rows() {
        let text = generated_long_file(40_000);
        let start = std::time::Instant::now();
        let f = ok(&text);
        let secs = start.elapsed().as_secs_f64();
        assert_eq!((f.rows, f.values), (40_000, 40_000));
        println!(
            "parsed {} rows ({} bytes) in {:.3} s: {:.0} rows/s, {:.1} MB/s",
            f.rows,
            text.len(),
            secs,
            f.rows as f64 / secs,
            text.len() as f64 / secs / 1e6
        );
    }

    // --- properties ------------------------------------------------------------

    fn csvish() -> impl Strategy<Value = String> {
        let pieces = prop::sample::select(vec![
            "source",
            "lot",
            "characteristic",
            "value",
            "unit",
            "sampled_at",
            "S",
            "L",
            "C",
            ",",
            ",",
            "\"",
            "\"\"",
            "\n",
            "\r\n",
            "\r",
            "#",
            " ",
            "\t",
            "1",
            "2.5",
            "-",
            "e",
            ".",
            "1e999",
            "NaN",
            "2026-03-01",
            "T08:30:00Z",
            "+02:00",
            "\u{feff}",
            "\u{0}",
            "é",
            "U1",
        ]);
        prop::collection::vec(pieces, 0..80).prop_map(|v| v.concat())
    }

    fn headed_csvish() -> impl Strategy<Value = String> {
        let header = prop::sample::select(vec![
            "source,characteristic,lot,value\n",
            "source,characteristic,lot,value,sampled_at,unit\n",
            "source,lot,unit,bore,len\n",
            "source,lot,sampled_at,x\n",
        ]);
        (header, csvish()).prop_map(|(h, body)| format!("{h}{body}"))
    }

    #[derive(Debug, Clone)]
    struct Row {
        source: String,
        lot: String,
        characteristic: String,
        value: f64,
    }

    fn name() -> impl Strategy<Value = String> {
        let piece = prop::sample::select(vec![
            "a", "B", "7", "-", "_", "é", "Ø", " ", ",", "\"", "#", "x y",
        ]);
        prop::collection::vec(piece, 1..6).prop_map(|v| {
            let s = v.concat();
            let t = s.trim_matches([' ', '\t']);
            if t.is_empty() {
                "n".to_owned()
            } else {
                t.to_owned()
            }
        })
    }

    fn finite() -> impl Strategy<Value = f64> {
        prop::num::f64::NORMAL | prop::num::f64::SUBNORMAL | prop::num::f64::ZERO
    }

    fn rows() -> impl Strategy<Value = Vec<Row>> {
        let pool = || prop::collection::vec(name(), 1..4);
        (pool(), pool(), pool()).prop_flat_map(|(s, l, c)| {
            let row = (
                prop::sample::select(s),
                prop::sample::select(l),
                prop::sample::select(c),
                finite(),
            )
                .prop_map(|(source, lot, characteristic, value)| Row {
                    source,
                    lot,
                    characteristic,
                    value,
                });
            prop::collection::vec(row, 1..40)
        })
    }

    fn quoted(s: &str) -> String {
        format!("\"{}\"", s.replace('"', "\"\""))
    }

    proptest! {
        #[test]
        fn stamps_keep_what_is_shown_and_stored(secs in -62_000_000_000i64..253_000_000_000i64, nanos in 0u32..1_000_000_000u32, date_only in any::<bool>()) {
            let utc = DateTime::<Utc>::from_timestamp(secs, nanos).unwrap();
            let t = Timestamp { utc, date_only };
            let back = Stamp::from(Some(t)).get().unwrap();
            prop_assert_eq!(back.to_rfc3339(), t.to_rfc3339());
            prop_assert_eq!(back.date_only, date_only);
            prop_assert_eq!(Stamp::from(None).get(), None);
        }
    }

    proptest! {
        #[test]
        fn timestamps_print_like_the_chrono_format(secs in -62_000_000_000i64..260_000_000_000i64, nanos in 0u32..1_000_000_000u32) {
            let utc = DateTime::<Utc>::from_timestamp(secs, nanos).unwrap();
            let t = Timestamp { utc, date_only: false };
            prop_assert_eq!(t.to_rfc3339(), utc.format("%Y-%m-%dT%H:%M:%S%.3fZ").to_string());
        }
    }

    /// Hands out at most `step` bytes per read, so records straddle the window's refills.
    struct Trickle<'a> {
        data: &'a [u8],
        step: usize,
    }

    impl Read for Trickle<'_> {
        fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
            let n = self.step.min(buf.len()).min(self.data.len());
            buf[..n].copy_from_slice(&self.data[..n]);
            self.data = &self.data[n..];
            Ok(n)
        }
    }

    /// Parsing in reads of `step` bytes gives what parsing the whole slice gives.
    fn trickled_like_whole(bytes: &[u8], step: usize) -> Result<(), TestCaseError> {
        let whole = format!("{:?}", parse("t.csv", bytes));
        let trickled = match parse_reader("t.csv", Trickle { data: bytes, step }) {
            Ok(f) => format!("{:?}", Ok::<_, LotFileError>(f)),
            Err(ReadError::Lot(e)) => format!("{:?}", Err::<LotFile, _>(e)),
            Err(ReadError::Io(e)) => return Err(TestCaseError::fail(e.to_string())),
        };
        prop_assert_eq!(whole, trickled);
        Ok(())
    }

    #[test]
    fn records_longer_than_the_window_keep_their_lines() {
        let comment = format!("#{}\n", "x".repeat(200_000));
        let serial = "U".repeat(150_000);
        let text =
            format!("{comment}source,lot,unit,bore\nS,L,U1,1\n{comment}S,L,\"{serial}\",2\n");
        let e = fail(&text);
        assert_err(&e, ErrorKind::TooLong, 5, Some(3));
        let text =
            format!("{comment}source,lot,unit,bore\nS,L,U1,1\n{comment}S,L,U2,2\nS,L,U1,3\n");
        let e = fail(&text);
        assert_err(&e, ErrorKind::DuplicateMeasurement, 6, Some(3));
        assert!(e.message.contains("on line 3 and again on line 6"), "{e}");
    }

    #[test]
    fn a_read_error_is_not_a_lot_file_error() {
        struct Broken;
        impl Read for Broken {
            fn read(&mut self, _: &mut [u8]) -> std::io::Result<usize> {
                Err(std::io::Error::other("disk gone"))
            }
        }
        assert!(matches!(
            parse_reader("t.csv", Broken),
            Err(ReadError::Io(_))
        ));
    }

    #[test]
    fn a_repeat_before_a_later_error_is_reported_first() {
        let e = fail("source,characteristic,lot,value,unit\nS,C,L,1,U\nS,C,L,2,U\nS,C,L,x,V\n");
        assert_err(&e, ErrorKind::DuplicateMeasurement, 3, Some(5));
        let e = fail("source,characteristic,lot,value,unit\nS,C,L,x,U\nS,C,L,1,V\nS,C,L,2,V\n");
        assert_err(&e, ErrorKind::BadNumber, 2, Some(4));
    }

    proptest! {
        #[test]
        fn small_reads_change_nothing(text in headed_csvish(), step in 1usize..9) {
            trickled_like_whole(text.as_bytes(), step)?;
        }

        #[test]
        fn small_reads_change_nothing_on_bytes(bytes in prop::collection::vec(any::<u8>(), 0..400), step in 1usize..5) {
            trickled_like_whole(&bytes, step)?;
        }
    }

    /// (source, lot, characteristic) of a group, as text.
    type GroupKey = (String, String, String);

    proptest! {
        #[test]
        fn never_panics_on_bytes(bytes in prop::collection::vec(any::<u8>(), 0..600)) {
            let _ = parse("fuzz.csv", &bytes);
        }

        #[test]
        fn timestamp_parser_never_panics(text in any::<String>()) {
            let _ = parse_timestamp(&text);
            let _ = parse_number(&text);
        }

        #[test]
        fn never_panics_on_csvish_text(text in csvish()) {
            let _ = parse("fuzz.csv", text.as_bytes());
        }

        #[test]
        fn never_panics_on_headed_csvish_text(text in headed_csvish()) {
            if let Err(e) = parse("fuzz.csv", text.as_bytes()) {
                prop_assert!(e.line >= 1);
                prop_assert!(!e.message.is_empty());
            }
        }

        #[test]
        fn wide_round_trip_keeps_each_value_with_its_unit(
            rows in prop::collection::vec((0u8..2, 0u8..3, -1e6f64..1e6, -1e6f64..1e6), 1..60),
        ) {
            // Lots come and go in any order and with any number of rows: each characteristic's
            // values stay paired with their row's unit on the lot's shared track.
            let mut text = String::from("source,lot,unit,a,b\n");
            let mut want: Vec<(GroupKey, Vec<(String, String)>)> = Vec::new();
            for (i, (src, lot, a, b)) in rows.iter().enumerate() {
                let (src, lot, unit) = (format!("S{src}"), format!("L{lot}"), format!("U{i}"));
                text.push_str(&format!("{src},{lot},{unit},{a:?},{b:?}\n"));
                for (c, v) in [("a", a), ("b", b)] {
                    let key = (src.clone(), lot.clone(), c.to_owned());
                    let pair = (unit.clone(), format!("{v:?}"));
                    match want.iter_mut().find(|(k, _)| *k == key) {
                        Some((_, list)) => list.push(pair),
                        None => want.push((key, vec![pair])),
                    }
                }
            }
            let f = parse("wide.csv", text.as_bytes()).map_err(|e| TestCaseError::fail(e.to_string()))?;
            let got: Vec<(GroupKey, Vec<(String, String)>)> = f
                .groups
                .iter()
                .map(|g| {
                    prop_assert_eq!(g.units().len(), g.values.len());
                    prop_assert_eq!(g.sampled_at().len(), g.values.len());
                    let pairs = g
                        .units()
                        .iter()
                        .zip(&g.values)
                        .map(|(&u, v)| (f.serials.get(u).unwrap_or("-").to_owned(), format!("{v:?}")))
                        .collect();
                    Ok(((g.source.clone(), g.lot.clone(), g.characteristic.clone()), pairs))
                })
                .collect::<Result<_, TestCaseError>>()?;
            prop_assert_eq!(got, want);
        }

        #[test]
        fn long_round_trip(
            rows in rows(),
            order in Just(vec![0usize, 1, 2, 3, 4]).prop_shuffle(),
            crlf in any::<bool>(),
            bom in any::<bool>(),
        ) {
            let eol = if crlf { "\r\n" } else { "\n" };
            let headers = ["source", "Characteristic", "LOT", "value", "unit"];
            let mut text = String::from(if bom { "\u{feff}" } else { "" });
            text.push_str(&order.iter().map(|&i| headers[i]).collect::<Vec<_>>().join(","));
            text.push_str(eol);
            for (i, r) in rows.iter().enumerate() {
                if i % 7 == 3 {
                    text.push_str("# comment");
                    text.push_str(eol);
                    text.push_str(eol);
                }
                let cells = [
                    quoted(&r.source),
                    quoted(&r.characteristic),
                    quoted(&r.lot),
                    format!("{:?}", r.value),
                    format!("U{i}"),
                ];
                text.push_str(&order.iter().map(|&c| cells[c].as_str()).collect::<Vec<_>>().join(","));
                text.push_str(eol);
            }
            let f = parse("rt.csv", text.as_bytes()).map_err(|e| TestCaseError::fail(e.to_string()))?;

            let mut want: Vec<((String, String, String), Vec<String>)> = Vec::new();
            for r in &rows {
                let key = (r.source.clone(), r.lot.clone(), r.characteristic.clone());
                match want.iter_mut().find(|(k, _)| *k == key) {
                    Some((_, v)) => v.push(format!("{:?}", r.value)),
                    None => want.push((key, vec![format!("{:?}", r.value)])),
                }
            }
            let got: Vec<((String, String, String), Vec<String>)> = f
                .groups
                .iter()
                .map(|g| {
                    (
                        (g.source.clone(), g.lot.clone(), g.characteristic.clone()),
                        g.values.iter().map(|v| format!("{v:?}")).collect(),
                    )
                })
                .collect();
            prop_assert_eq!(got, want);
            prop_assert_eq!(f.rows, rows.len());
            prop_assert_eq!(f.values, rows.len());
        }
    }
}
