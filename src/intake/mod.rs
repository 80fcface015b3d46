//! Intake: lot files as stations and spreadsheets really write them, read with an input
//! profile (`[[input.profile]]`) into the same [`LotFile`] the built-in parser returns.
//!
//! A file is first turned into a [`table::Table`] of positioned cells: text files are decoded
//! (`text`: byte-order mark or the profile's encoding, its delimiter) and workbooks are read
//! by calamine (`workbook`: numbers as numbers, dates as dates, formulas by cached value).
//! `table` then maps their columns to ours, parses numbers with the profile's decimal mark and
//! local times in its zone, and groups the values like [`lotfile::parse`].
//!
//! Files that no profile matches go to [`lotfile::parse`] unchanged (workbooks, which the
//! built-in parser cannot read, get [`Profile::builtin`]). A refusal names the file, the line
//! or cell, the column and what was expected, lists every problem found (up to
//! [`MAX_PROBLEMS`]) and says which profile was used.
//!
//! Pure like `lotfile`: bytes in, lots or positioned problems out; no I/O, no clock (the
//! machine's time zone rules are read by chrono when a profile leaves `timezone` unset).

pub mod check;
mod table;
mod text;
mod workbook;

use std::fmt;
use std::sync::Arc;

use crate::config::Profile;
use crate::lotfile::{self, ErrorKind, LotFile, LotFileError};

/// Problems reported for one file before the rest are only counted.
pub const MAX_PROBLEMS: usize = 20;

/// Extensions read as workbooks.
const WORKBOOK_EXTENSIONS: [&str; 5] = ["xlsx", "xlsm", "xlsb", "xls", "ods"];

/// True for a file name that is read as a workbook.
pub fn is_workbook(file_name: &str) -> bool {
    file_name.rsplit_once('.').is_some_and(|(_, ext)| {
        WORKBOOK_EXTENSIONS
            .iter()
            .any(|w| ext.eq_ignore_ascii_case(w))
    })
}

/// What kind of problem, for scripts (`check-file --json`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// One of the built-in parser's kinds (same meaning).
    Lot(ErrorKind),
    /// Not a workbook calamine can open.
    Workbook,
    /// The profile's sheet is not in the workbook.
    Sheet,
    /// No delimiter could be told from the header line.
    Delimiter,
    /// A workbook cell of the wrong type (text or a boolean where a number is expected).
    CellType,
    /// A local time that happened twice (the clock went back).
    AmbiguousTime,
    /// A local time that never happened (the clock went forward).
    SkippedTime,
}

impl Kind {
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Lot(k) => k.as_str(),
            Kind::Workbook => "workbook",
            Kind::Sheet => "sheet",
            Kind::Delimiter => "delimiter",
            Kind::CellType => "cell_type",
            Kind::AmbiguousTime => "ambiguous_time",
            Kind::SkippedTime => "skipped_time",
        }
    }
}

/// Where a problem sits.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Place {
    /// The whole file.
    File,
    /// A text file: 1-based physical line and field.
    Line { line: u64, column: Option<u64> },
    /// A workbook: sheet, 1-based row and column as the spreadsheet shows them.
    Cell {
        sheet: Arc<str>,
        row: u64,
        column: Option<u64>,
    },
}

/// One problem of a refused file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    pub file: Arc<str>,
    pub place: Place,
    /// The header text of the column, when known.
    pub column_name: Option<String>,
    pub kind: Kind,
    /// What was expected and what was found.
    pub message: String,
}

/// `A`, `B`, ..., `Z`, `AA`, ... for a 1-based column.
pub fn column_letters(mut n: u64) -> String {
    let mut out = Vec::new();
    while n > 0 {
        let r = ((n - 1) % 26) as u8;
        out.push(b'A' + r);
        n = (n - 1) / 26;
    }
    out.reverse();
    String::from_utf8(out).unwrap_or_default()
}

impl Problem {
    /// `Messwerte!C17`, `line 5`, or `` for the whole file.
    pub fn position(&self) -> String {
        match &self.place {
            Place::File => String::new(),
            Place::Line { line, column } => match column {
                Some(c) => format!("{line}:{c}"),
                None => line.to_string(),
            },
            Place::Cell { sheet, row, column } => match column {
                Some(c) => format!("{sheet}!{}{row}", column_letters(*c)),
                None => format!("{sheet}!{row}:{row}"),
            },
        }
    }
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        // Text files read exactly like the built-in parser's errors: file:line:column.
        match &self.place {
            Place::File => write!(f, "{}", self.file)?,
            Place::Line { .. } => write!(f, "{}:{}", self.file, self.position())?,
            Place::Cell { .. } => write!(f, "{}: {}", self.file, self.position())?,
        }
        if let Some(name) = &self.column_name {
            write!(f, " (column {name})")?;
        }
        write!(f, ": {}", self.message)
    }
}

impl From<LotFileError> for Problem {
    fn from(e: LotFileError) -> Problem {
        Problem {
            file: e.file.into(),
            place: Place::Line {
                line: e.line,
                column: e.column,
            },
            column_name: e.column.and(e.column_name),
            kind: Kind::Lot(e.kind),
            message: e.message,
        }
    }
}

/// Why a file was refused: its problems (the first [`MAX_PROBLEMS`]), how many more there
/// were, the profile it was read with, and for the built-in dialect a hint at the profile
/// keys that would read it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Refusal {
    pub profile: Option<String>,
    pub problems: Vec<Problem>,
    /// Problems found beyond those listed.
    pub more: usize,
    pub hint: Option<String>,
}

impl fmt::Display for Refusal {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, p) in self.problems.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{p}")?;
        }
        if self.more > 0 {
            write!(f, "\n… and {} more problem(s) of the same file", self.more)?;
        }
        if let Some(name) = &self.profile {
            write!(f, "\n(read with input profile {name:?})")?;
        }
        if let Some(hint) = &self.hint {
            write!(f, "\n{hint}")?;
        }
        Ok(())
    }
}

impl std::error::Error for Refusal {}

/// Reads one file: with `profile`, or with the built-in dialect when `None` (a workbook then
/// gets [`Profile::builtin`]). `file_name` is used in messages and to tell workbooks.
pub fn read(file_name: &str, bytes: &[u8], profile: Option<&Profile>) -> Result<LotFile, Refusal> {
    let builtin;
    let profile = match profile {
        Some(p) => p,
        None if is_workbook(file_name) => {
            builtin = Profile::builtin();
            &builtin
        }
        None => {
            return lotfile::parse(file_name, bytes).map_err(|e| builtin_refusal(e, bytes));
        }
    };
    let refuse = |problems: Vec<Problem>| {
        let more = problems.len().saturating_sub(MAX_PROBLEMS);
        Refusal {
            profile: Some(profile.name.clone()),
            problems: problems.into_iter().take(MAX_PROBLEMS).collect(),
            more,
            hint: None,
        }
    };
    let table = if is_workbook(file_name) {
        workbook::read(file_name, bytes, profile)
    } else {
        text::read(file_name, bytes, profile)
    }
    .map_err(|p| refuse(vec![p]))?;
    table::to_lot_file(file_name, &table, profile).map_err(refuse)
}

/// A refusal by the built-in dialect, with a hint from the file's first bytes.
fn builtin_refusal(e: LotFileError, head: &[u8]) -> Refusal {
    let hint = hint_for(&e, head);
    Refusal {
        profile: None,
        problems: vec![e.into()],
        more: 0,
        hint,
    }
}

/// Why [`read_stream`] gave no lot file.
#[derive(Debug)]
pub enum StreamFailure {
    Refused(Refusal),
    /// The stream failed; nothing is known about the file's content.
    Io(std::io::Error),
}

/// How much of a stream's start is kept for a refusal's hint (which reads the first lines).
const HINT_HEAD: usize = 64 * 1024;

/// A reader that keeps the first [`HINT_HEAD`] bytes it passes on.
struct Head<R> {
    inner: R,
    kept: Vec<u8>,
}

impl<R: std::io::Read> std::io::Read for Head<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        let room = HINT_HEAD.saturating_sub(self.kept.len()).min(n);
        self.kept.extend_from_slice(&buf[..room]);
        Ok(n)
    }
}

/// Reads a file in the built-in dialect from a stream, holding only a window of it (see
/// [`lotfile::parse_reader`]). Workbooks and files with a profile go through [`read`].
pub fn read_stream<R: std::io::Read>(file_name: &str, reader: R) -> Result<LotFile, StreamFailure> {
    let mut head = Head {
        inner: reader,
        kept: Vec::new(),
    };
    lotfile::parse_reader(file_name, &mut head).map_err(|e| match e {
        lotfile::ReadError::Io(e) => StreamFailure::Io(e),
        lotfile::ReadError::Lot(e) => StreamFailure::Refused(builtin_refusal(e, &head.kept)),
    })
}

/// For a file refused by the built-in dialect: the profile keys that would likely read it.
fn hint_for(e: &LotFileError, bytes: &[u8]) -> Option<String> {
    let mut keys: Vec<String> = Vec::new();
    if bytes.starts_with(b"\xFF\xFE") || bytes.starts_with(b"\xFE\xFF") {
        keys.push("encoding = \"auto\"  # UTF-16 with a byte-order mark".into());
        keys.push("delimiter = \"auto\"".into());
    } else {
        keys.extend(layout_hint(bytes));
    }
    match e.kind {
        ErrorKind::BadNumber
            if e.message
                .rsplit_once("found ")
                .is_some_and(|(_, f)| f.contains(','))
                && !keys.iter().any(|k| k.starts_with("decimal")) =>
        {
            keys.push("decimal = \",\"".into())
        }
        ErrorKind::BadTimestamp => {
            keys.push("timezone = \"Europe/Berlin\"  # the zone of times without an offset".into());
            keys.push("date_format = \"%d.%m.%Y %H:%M\"  # if dates are not YYYY-MM-DD".into());
        }
        ErrorKind::Encoding if !keys.iter().any(|k| k.starts_with("encoding")) => {
            keys.push("encoding = \"windows-1252\"  # or the encoding the station writes".into());
        }
        ErrorKind::MissingColumn | ErrorKind::UnknownColumn if keys.is_empty() => {
            keys.push(
                "[input.profile.columns]  # our name = their header, e.g. lot = \"Batch No.\""
                    .into(),
            );
        }
        _ => {}
    }
    if keys.is_empty() {
        return None;
    }
    Some(format!(
        "hint: no input profile matched this file, so it was read as the built-in dialect \
         (UTF-8, ',' separated, '.' decimals, RFC 3339 times). To read files like this \
         one, describe how the station writes them in the config:\n  [[input.profile]]\n  name = \"...\"\n  \
         match = \"<glob on the file name>\"   # or folder = \"<inbox subfolder>\"\n  {}",
        keys.join("\n  ")
    ))
}

/// Delimiter and header line suggested by the first lines of a text file: the most frequent
/// of ';' and tab (when more frequent than ','), and the first line that has the most of it.
fn layout_hint(bytes: &[u8]) -> Vec<String> {
    let data = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    let lines: Vec<&[u8]> = data.split(|&b| b == b'\n').take(20).collect();
    let count = |l: &[u8], d: u8| l.iter().filter(|&&c| c == d).count();
    let total = |d: u8| lines.iter().map(|l| count(l, d)).sum::<usize>();
    let (comma, semicolon, tab) = (total(b','), total(b';'), total(b'\t'));
    let (delimiter, keys): (u8, &[&'static str]) = if semicolon > comma && semicolon >= tab {
        (
            b';',
            &[
                "delimiter = \";\"",
                "decimal = \",\"   # if numbers are written 2,05",
            ],
        )
    } else if tab > comma {
        (b'\t', &["delimiter = \"\\t\""])
    } else {
        (b',', &[])
    };
    let mut out: Vec<String> = keys.iter().map(|k| k.to_string()).collect();
    let most = lines.iter().map(|l| count(l, delimiter)).max().unwrap_or(0);
    let header = lines
        .iter()
        .position(|l| most > 0 && count(l, delimiter) == most);
    if let Some(i) = header.filter(|&i| i > 0) {
        out.push(format!(
            "header_row = {}   # the lines above the header are skipped",
            i + 1
        ));
    }
    out
}

#[cfg(test)]
mod tests;
