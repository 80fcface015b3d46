//! Text files under a profile: bytes decoded (byte-order mark or the profile's encoding),
//! title lines above `header_row` skipped, the delimiter told from the header line when
//! "auto", and records split into positioned cells.

use std::borrow::Cow;

use encoding_rs::UTF_8;

use super::table::{Cell, Origin, Row, Table};
use super::{Kind, Place, Problem};
use crate::config::{Delimiter, Encoding, Profile};
use crate::lotfile::{self, ErrorKind};

/// Candidates of `delimiter = "auto"`, in order of preference on a tie.
const AUTO_DELIMITERS: [u8; 4] = [b';', b'\t', b',', b'|'];

fn problem(file: &str, line: u64, kind: Kind, message: String) -> Problem {
    Problem {
        file: file.into(),
        place: Place::Line { line, column: None },
        column_name: None,
        kind,
        message,
    }
}

pub(super) fn read(file: &str, bytes: &[u8], profile: &Profile) -> Result<Table, Problem> {
    let text = decode(file, bytes, profile)?;
    let data = text.as_bytes();
    let first_line = profile.header_row.unwrap_or(1) as u64;
    let start = offset_of_line(data, first_line).ok_or_else(|| {
        problem(
            file,
            1,
            ErrorKind::Header.into(),
            format!(
                "expected a header on line {first_line} (header_row of profile {:?}), \
                 found only {} line(s)",
                profile.name,
                lotfile::count_newlines(data) + 1
            ),
        )
    })?;
    let body = &data[start..];
    let delimiter = match profile.delimiter {
        Delimiter::Byte(b) => b,
        Delimiter::Auto => detect_delimiter(body).ok_or_else(|| {
            problem(
                file,
                first_line,
                Kind::Delimiter,
                "expected a header line separated by ';', tab, ',' or '|' (delimiter = \"auto\"), \
                 found none of them"
                    .to_owned(),
            )
        })?,
    };
    let table = split(file, body, first_line, delimiter)?;
    if profile.header_row.is_some() && table.header.number != first_line {
        return Err(problem(
            file,
            first_line,
            ErrorKind::Header.into(),
            format!(
                "expected the header on line {first_line} (header_row of profile {:?}), \
                 found a blank or comment line there; the first row is on line {}",
                profile.name, table.header.number
            ),
        ));
    }
    Ok(table)
}

impl From<ErrorKind> for Kind {
    fn from(k: ErrorKind) -> Kind {
        Kind::Lot(k)
    }
}

/// The text of `bytes` in the profile's encoding, without a byte-order mark.
fn decode<'a>(file: &str, bytes: &'a [u8], profile: &Profile) -> Result<Cow<'a, str>, Problem> {
    let bom = encoding_rs::Encoding::for_bom(bytes);
    let (encoding, body) = match (profile.encoding, bom) {
        (Encoding::Auto, Some((enc, n))) => (enc, &bytes[n..]),
        (Encoding::Auto, None) => (sniff_utf16(bytes).unwrap_or(UTF_8), bytes),
        (Encoding::Fixed(enc), Some((b, n))) if b == enc => (enc, &bytes[n..]),
        (Encoding::Fixed(enc), _) => (enc, bytes),
    };
    if encoding == UTF_8 {
        return std::str::from_utf8(body).map(Cow::Borrowed).map_err(|e| {
            let at = e.valid_up_to();
            let bad = body.get(at).copied().unwrap_or(0);
            problem(
                file,
                lotfile::count_newlines(&body[..at]) + 1,
                ErrorKind::Encoding.into(),
                format!(
                    "expected UTF-8 text, found invalid byte 0x{bad:02X} (set encoding in \
                     profile {:?}, e.g. \"windows-1252\")",
                    profile.name
                ),
            )
        });
    }
    let (text, had_errors) = encoding.decode_without_bom_handling(body);
    if had_errors {
        let at = text.find('\u{FFFD}').unwrap_or(0);
        return Err(problem(
            file,
            lotfile::count_newlines(&text.as_bytes()[..at]) + 1,
            ErrorKind::Encoding.into(),
            format!(
                "expected {} text (encoding of profile {:?}), found a malformed sequence",
                encoding.name(),
                profile.name
            ),
        ));
    }
    Ok(Cow::Owned(text.into_owned()))
}

/// UTF-16 without a byte-order mark, told by the zero bytes of ASCII text in the first
/// characters: `x\0y\0` is little-endian, `\0x\0y` big-endian.
fn sniff_utf16(bytes: &[u8]) -> Option<&'static encoding_rs::Encoding> {
    let head = &bytes[..bytes.len().min(64) & !1];
    if head.len() < 4 {
        return None;
    }
    let zeros = |offset: usize| head.iter().skip(offset).step_by(2).all(|&b| b == 0);
    let text = |offset: usize| head.iter().skip(offset).step_by(2).all(|&b| b != 0);
    if zeros(1) && text(0) {
        Some(encoding_rs::UTF_16LE)
    } else if zeros(0) && text(1) {
        Some(encoding_rs::UTF_16BE)
    } else {
        None
    }
}

/// Byte offset where 1-based line `n` starts.
fn offset_of_line(data: &[u8], n: u64) -> Option<usize> {
    if n <= 1 {
        return Some(0);
    }
    let mut seen = 1;
    for (i, &b) in data.iter().enumerate() {
        if b == b'\n' {
            seen += 1;
            if seen == n {
                return Some(i + 1);
            }
        }
    }
    None
}

/// The most frequent candidate outside quotes in the first non-blank, non-comment line.
fn detect_delimiter(body: &[u8]) -> Option<u8> {
    let line = body
        .split(|&b| b == b'\n')
        .find(|l| !l.starts_with(b"#") && !l.trim_ascii().is_empty())?;
    let mut counts = [0usize; AUTO_DELIMITERS.len()];
    let mut quoted = false;
    for &b in line {
        if b == b'"' {
            quoted = !quoted;
        } else if !quoted && let Some(i) = AUTO_DELIMITERS.iter().position(|&d| d == b) {
            counts[i] += 1;
        }
    }
    let best = (0..counts.len()).max_by_key(|&i| (counts[i], usize::MAX - i))?;
    (counts[best] > 0).then_some(AUTO_DELIMITERS[best])
}

/// Splits the records of `body` (which starts on line `first_line`) into rows; blank records
/// are skipped, the first row is the header.
fn split(file: &str, body: &[u8], first_line: u64, delimiter: u8) -> Result<Table, Problem> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .comment(Some(b'#'))
        .delimiter(delimiter)
        .from_reader(body);
    let mut record = csv::ByteRecord::new();
    let (mut line, mut line_pos) = (first_line, 0usize);
    let mut rows: Vec<Row> = Vec::new();
    loop {
        let before = usize::try_from(reader.position().byte()).unwrap_or(usize::MAX);
        let more = reader.read_byte_record(&mut record);
        let read_at = record
            .position()
            .map_or(before, |p| usize::try_from(p.byte()).unwrap_or(usize::MAX));
        let start = lotfile::record_start(body, read_at.min(body.len()));
        if start > line_pos {
            line += lotfile::count_newlines(&body[line_pos..start]);
            line_pos = start;
        }
        match more {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => {
                return Err(problem(
                    file,
                    line,
                    ErrorKind::Csv.into(),
                    format!("expected a readable record, found an error: {e}"),
                ));
            }
        }
        if record.iter().all(|f| f.trim_ascii().is_empty()) {
            continue;
        }
        rows.push(Row {
            number: line,
            cells: cells_of(&record),
        });
    }
    into_table(file, first_line, rows)
}

fn cells_of(record: &csv::ByteRecord) -> Vec<Cell> {
    record
        .iter()
        .map(|f| {
            // The whole text was decoded, and delimiters are ASCII: fields are UTF-8.
            let f = String::from_utf8_lossy(f);
            if f.trim().is_empty() {
                Cell::Empty
            } else {
                Cell::Text(f.into_owned())
            }
        })
        .collect()
}

/// The first row is the header.
fn into_table(file: &str, first_line: u64, rows: Vec<Row>) -> Result<Table, Problem> {
    let mut rows = rows.into_iter();
    let Some(header) = rows.next() else {
        return Err(problem(
            file,
            first_line,
            ErrorKind::Header.into(),
            "expected a header row, found no rows".to_owned(),
        ));
    };
    Ok(Table {
        origin: Origin::Text,
        header,
        rows: rows.collect(),
    })
}
