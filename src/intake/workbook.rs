//! Workbooks (`.xlsx`, `.xlsm`, `.xlsb`, `.xls`, `.ods`) read by calamine: one sheet into a
//! [`Table`] with the cells' own types. Numbers stay numbers, date cells become local
//! date-times (calamine applies the 1900 or 1904 date system of the workbook), formulas give
//! their cached value, and every cell keeps the row and column the spreadsheet shows.

use std::io::Cursor;

use calamine::{Data, Reader};

use super::table::{Cell, Origin, Row, Table};
use super::{Kind, Place, Problem};
use crate::config::Profile;
use crate::lotfile::ErrorKind;

fn problem(file: &str, place: Place, kind: Kind, message: String) -> Problem {
    Problem {
        file: file.into(),
        place,
        column_name: None,
        kind,
        message,
    }
}

pub(super) fn read(file: &str, bytes: &[u8], profile: &Profile) -> Result<Table, Problem> {
    let mut book = calamine::open_workbook_auto_from_rs(Cursor::new(bytes)).map_err(|e| {
        problem(
            file,
            Place::File,
            Kind::Workbook,
            format!("expected a workbook (.xlsx, .xlsm, .xlsb, .xls or .ods), cannot open it: {e}"),
        )
    })?;
    let names = book.sheet_names();
    let sheet = match &profile.sheet {
        Some(want) => names
            .iter()
            .find(|n| *n == want)
            .or_else(|| names.iter().find(|n| n.eq_ignore_ascii_case(want)))
            .cloned()
            .ok_or_else(|| {
                problem(
                    file,
                    Place::File,
                    Kind::Sheet,
                    format!(
                        "expected a sheet named {want:?} (sheet of profile {:?}), found sheets {}",
                        profile.name,
                        quote_list(&names)
                    ),
                )
            })?,
        None => names.first().cloned().ok_or_else(|| {
            problem(
                file,
                Place::File,
                Kind::Sheet,
                "expected at least one sheet, found none".into(),
            )
        })?,
    };
    let range = book.worksheet_range(&sheet).map_err(|e| {
        problem(
            file,
            Place::File,
            Kind::Workbook,
            format!("cannot read sheet {sheet:?}: {e}"),
        )
    })?;
    to_table(file, &sheet, &range, profile)
}

fn quote_list(names: &[String]) -> String {
    let quoted: Vec<String> = names.iter().map(|n| format!("{n:?}")).collect();
    if quoted.is_empty() {
        "none".to_owned()
    } else {
        quoted.join(", ")
    }
}

/// The sheet's rows from `header_row` (or its first non-empty row) on, with absolute
/// 1-based row numbers; cells are padded so that column `j` is spreadsheet column `j + 1`.
fn to_table(
    file: &str,
    sheet: &str,
    range: &calamine::Range<Data>,
    profile: &Profile,
) -> Result<Table, Problem> {
    let (row0, col0) = range.start().unwrap_or((0, 0));
    let mut rows: Vec<Row> = Vec::new();
    for (i, cells) in range.rows().enumerate() {
        let number = u64::from(row0) + i as u64 + 1;
        if profile.header_row.is_some_and(|h| number < h as u64) {
            continue;
        }
        let mut out: Vec<Cell> = (0..col0).map(|_| Cell::Empty).collect();
        out.extend(cells.iter().map(cell));
        if rows.is_empty() && profile.header_row.is_none() && out.iter().all(Cell::is_empty) {
            continue;
        }
        rows.push(Row { number, cells: out });
    }
    let mut rows = rows.into_iter();
    let header = rows.next().filter(|h| !h.cells.iter().all(Cell::is_empty));
    let want = profile
        .header_row
        .map_or(String::new(), |h| format!(" on row {h}"));
    let Some(header) = header else {
        return Err(problem(
            file,
            Place::File,
            ErrorKind::Header.into(),
            format!("expected a header row{want} of sheet {sheet:?}, found none"),
        ));
    };
    if let Some(h) = profile.header_row
        && header.number != h as u64
    {
        return Err(problem(
            file,
            Place::Cell {
                sheet: sheet.into(),
                row: h as u64,
                column: None,
            },
            ErrorKind::Header.into(),
            format!("expected the header on row {h} (header_row), found an empty row"),
        ));
    }
    Ok(Table {
        origin: Origin::Sheet(sheet.to_owned()),
        header,
        rows: rows.collect(),
    })
}

fn cell(d: &Data) -> Cell {
    match d {
        Data::Empty => Cell::Empty,
        Data::Int(i) => Cell::Number(*i as f64),
        Data::Float(f) => Cell::Number(*f),
        Data::String(s) if s.trim().is_empty() => Cell::Empty,
        Data::String(s) | Data::DateTimeIso(s) | Data::DurationIso(s) => Cell::Text(s.clone()),
        Data::Bool(b) => Cell::Bool(*b),
        Data::DateTime(t) if t.is_datetime() => match t.as_datetime() {
            Some(dt) => Cell::Date(dt),
            None => Cell::Number(t.as_f64()),
        },
        Data::DateTime(t) => Cell::Number(t.as_f64()),
        Data::Error(e) => Cell::Error(e.to_string()),
    }
}
