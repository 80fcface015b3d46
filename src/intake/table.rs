//! A table of positioned cells (from a text file or a sheet) into a [`LotFile`]: the profile's
//! column names and characteristic map, its fixed source, numbers with its decimal mark,
//! date-times in its zone, and the same grouping and checks as the built-in parser.

use std::collections::HashMap;
use std::sync::Arc;

use chrono::NaiveDateTime;

use super::{Kind, Place, Problem};
use crate::config::Profile;
use crate::lotfile::{
    self, ErrorKind, Group, Layout, LotFile, NO_UNIT, NumberError, Serials, Timestamp, Track, found,
};

/// One cell as the file gave it.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Cell {
    Empty,
    Text(String),
    Number(f64),
    /// A workbook date cell, in the file's local time.
    Date(NaiveDateTime),
    Bool(bool),
    /// A workbook error value (`#DIV/0!`).
    Error(String),
}

impl Cell {
    pub(crate) fn is_empty(&self) -> bool {
        matches!(self, Cell::Empty)
    }
}

/// A row and its 1-based line (text) or row number (sheet).
#[derive(Debug, Clone)]
pub(crate) struct Row {
    pub number: u64,
    pub cells: Vec<Cell>,
}

#[derive(Debug, Clone)]
pub(crate) enum Origin {
    Text,
    Sheet(String),
}

#[derive(Debug, Clone)]
pub(crate) struct Table {
    pub origin: Origin,
    pub header: Row,
    pub rows: Vec<Row>,
}

/// Where our columns are in the table (0-based).
struct Columns {
    layout: Layout,
    width: usize,
    source: Option<usize>,
    lot: usize,
    characteristic: Option<usize>,
    value: Option<usize>,
    unit: Option<usize>,
    sampled_at: Option<usize>,
    /// Wide layout: column and our characteristic name.
    wide: Vec<(usize, String)>,
}

struct Ctx<'a> {
    file: &'a str,
    table: &'a Table,
    profile: &'a Profile,
    names: Vec<String>,
}

impl Ctx<'_> {
    fn problem(&self, row: u64, col: Option<usize>, kind: Kind, message: String) -> Problem {
        let column = col.map(|c| c as u64 + 1);
        let place = match &self.table.origin {
            Origin::Text => Place::Line { line: row, column },
            Origin::Sheet(sheet) => Place::Cell {
                sheet: sheet.as_str().into(),
                row,
                column,
            },
        };
        Problem {
            file: self.file.into(),
            place,
            column_name: col.and_then(|c| self.names.get(c)).cloned(),
            kind,
            message,
        }
    }

    fn header_problem(&self, col: Option<usize>, kind: ErrorKind, message: String) -> Problem {
        self.problem(self.table.header.number, col, kind.into(), message)
    }

    /// "line 7" or "row 7".
    fn at(&self, n: u64) -> String {
        match self.table.origin {
            Origin::Text => format!("line {n}"),
            Origin::Sheet(_) => format!("row {n}"),
        }
    }

    fn key(&self, k: &str) -> String {
        format!("{k} of profile {:?}", self.profile.name)
    }

    fn is_sheet(&self) -> bool {
        matches!(self.table.origin, Origin::Sheet(_))
    }
}

/// Maps, parses and groups the table; every problem found (the header's first one only).
pub(crate) fn to_lot_file(
    file: &str,
    table: &Table,
    profile: &Profile,
) -> Result<LotFile, Vec<Problem>> {
    let mut ctx = Ctx {
        file,
        table,
        profile,
        names: Vec::new(),
    };
    ctx.names = header_names(&ctx).map_err(|p| vec![p])?;
    let cols = columns(&ctx).map_err(|p| vec![p])?;
    let mut b = Builder::default();
    let mut problems = Vec::new();
    for row in &table.rows {
        if row.cells.iter().all(Cell::is_empty) {
            continue;
        }
        if let Err(mut p) = b.row(&ctx, &cols, row) {
            problems.append(&mut p);
        }
    }
    if problems.is_empty() && b.rows == 0 {
        problems.push(ctx.header_problem(
            None,
            ErrorKind::NoData,
            "expected at least one data row after the header, found none".to_owned(),
        ));
    }
    if !problems.is_empty() {
        return Err(problems);
    }
    for (g, t) in b.groups.iter_mut().zip(b.tracks) {
        g.track = Arc::new(t);
    }
    Ok(LotFile {
        layout: cols.layout,
        groups: b.groups,
        rows: b.rows,
        values: b.values,
        serials: Arc::new(b.serials),
    })
}

/// The header's cells as names; trailing empty cells are dropped (a trailing delimiter), an
/// empty name is allowed only over an empty column.
fn header_names(ctx: &Ctx) -> Result<Vec<String>, Problem> {
    let cells = &ctx.table.header.cells;
    let width = cells
        .iter()
        .rposition(|c| !c.is_empty())
        .map_or(0, |i| i + 1);
    let mut names = Vec::with_capacity(width);
    for (col, c) in cells[..width].iter().enumerate() {
        let name = name_of(ctx, ctx.table.header.number, col, c, "column name")?;
        names.push(name.unwrap_or_default());
    }
    for (col, name) in names.iter().enumerate() {
        if name.is_empty() && !column_is_empty(ctx.table, col) {
            return Err(ctx.header_problem(
                Some(col),
                ErrorKind::EmptyField,
                "expected a non-empty column name, found an empty cell".to_owned(),
            ));
        }
        let earlier = names[..col]
            .iter()
            .position(|n| !n.is_empty() && n.eq_ignore_ascii_case(name));
        if let Some(first) = earlier {
            return Err(ctx.header_problem(
                Some(col),
                ErrorKind::DuplicateColumn,
                format!(
                    "expected each column name once (names are case-insensitive), found {} \
                     again after column {}",
                    found(name),
                    first + 1
                ),
            ));
        }
    }
    Ok(names)
}

/// True for a spacer column: no header text and no cell below it (a sheet whose used
/// range starts right of column A has such columns on its left, too).
fn column_is_empty(table: &Table, col: usize) -> bool {
    table
        .rows
        .iter()
        .all(|r| r.cells.get(col).is_none_or(Cell::is_empty))
}

fn columns(ctx: &Ctx) -> Result<Columns, Problem> {
    let header_text = found(&ctx.names.join(","));
    let mut cols = locate(ctx, &header_text)?;
    let long = cols.layout == Layout::Long;
    let mut missing: Vec<&str> = Vec::new();
    if cols.source.is_none() && ctx.profile.source.is_none() {
        missing.push("source");
    }
    if cols.lot == usize::MAX {
        missing.push("lot");
    }
    if long && cols.characteristic.is_none() {
        missing.push("characteristic");
    }
    if long && cols.value.is_none() {
        missing.push("value");
    }
    if !missing.is_empty() {
        return Err(ctx.header_problem(
            None,
            ErrorKind::MissingColumn,
            format!(
                "expected the columns {} ({}, or the same names in the header); \
                 found header {header_text}",
                missing.join(", "),
                ctx.key("[input.profile.columns]")
            ),
        ));
    }
    let rest = unused_columns(ctx, &cols);
    if !long {
        cols.wide = wide_columns(ctx, &rest, &header_text)?;
    } else if let Some(&c) = rest.first() {
        return Err(ctx.header_problem(
            Some(c),
            ErrorKind::UnknownColumn,
            format!(
                "expected only the long-layout columns, found unknown column {} \
                 (map it in [input.profile.columns] or list it in {})",
                found(&ctx.names[c]),
                ctx.key("ignore")
            ),
        ));
    }
    Ok(cols)
}

/// Our columns in the header (their names where the profile maps them); `lot` is
/// `usize::MAX` when absent. A mapped column that is missing is an error.
fn locate(ctx: &Ctx, header_text: &str) -> Result<Columns, Problem> {
    let find = |want: &str| ctx.names.iter().position(|n| n.eq_ignore_ascii_case(want));
    let col_of = |ours: &str| -> Result<Option<usize>, Problem> {
        let Some(theirs) = ctx.profile.columns.get(ours) else {
            return Ok(find(ours));
        };
        find(theirs).map(Some).ok_or_else(|| {
            ctx.header_problem(
                None,
                ErrorKind::MissingColumn,
                format!(
                    "expected a column {} ({}), found header {header_text}",
                    found(theirs),
                    ctx.key(&format!("columns.{ours}"))
                ),
            )
        })
    };
    let source = match ctx.profile.source {
        Some(_) => None,
        None => col_of("source")?,
    };
    let (characteristic, value) = (col_of("characteristic")?, col_of("value")?);
    Ok(Columns {
        layout: if characteristic.is_some() || value.is_some() {
            Layout::Long
        } else {
            Layout::Wide
        },
        width: ctx.names.len(),
        source,
        lot: col_of("lot")?.unwrap_or(usize::MAX),
        characteristic,
        value,
        unit: col_of("unit")?,
        sampled_at: col_of("sampled_at")?,
        wide: Vec::new(),
    })
}

/// Columns that are neither ours nor skipped (`ignore`, and a `source` column under a fixed
/// source), in header order.
fn unused_columns(ctx: &Ctx, cols: &Columns) -> Vec<usize> {
    let used = [
        cols.source,
        Some(cols.lot),
        cols.characteristic,
        cols.value,
        cols.unit,
        cols.sampled_at,
    ];
    let skipped = |c: usize| {
        let name = &ctx.names[c];
        let fixed_source = ctx.profile.source.is_some() && name.eq_ignore_ascii_case("source");
        name.is_empty()
            || fixed_source
            || ctx
                .profile
                .ignore
                .iter()
                .any(|i| i.eq_ignore_ascii_case(name))
    };
    (0..ctx.names.len())
        .filter(|&c| !used.contains(&Some(c)) && !skipped(c))
        .collect()
}

/// The characteristic columns of a wide header, named by the profile's map or their header.
fn wide_columns(
    ctx: &Ctx,
    rest: &[usize],
    header_text: &str,
) -> Result<Vec<(usize, String)>, Problem> {
    let names = &ctx.names;
    for theirs in ctx.profile.characteristics.keys() {
        if !names.iter().any(|n| n.eq_ignore_ascii_case(theirs)) {
            return Err(ctx.header_problem(
                None,
                ErrorKind::MissingColumn,
                format!(
                    "expected a column {} ({}), found header {header_text}",
                    found(theirs),
                    ctx.key("characteristics")
                ),
            ));
        }
    }
    let mut wide: Vec<(usize, String)> = Vec::new();
    for &c in rest {
        let ours = characteristic_name(ctx.profile, &names[c]);
        if let Some((first, _)) = wide.iter().find(|(_, n)| *n == ours) {
            return Err(ctx.header_problem(
                Some(c),
                ErrorKind::DuplicateColumn,
                format!(
                    "expected each characteristic once, found {} for column {} and column {}",
                    found(&ours),
                    first + 1,
                    c + 1
                ),
            ));
        }
        wide.push((c, ours));
    }
    if wide.is_empty() {
        return Err(ctx.header_problem(
            None,
            ErrorKind::Header,
            format!(
                "expected at least one characteristic column in the wide layout, found header \
                 {header_text}"
            ),
        ));
    }
    Ok(wide)
}

/// Our characteristic name for their column header or characteristic cell.
fn characteristic_name(profile: &Profile, theirs: &str) -> String {
    profile
        .characteristics
        .iter()
        .find(|(k, _)| k.eq_ignore_ascii_case(theirs))
        .map_or_else(|| theirs.to_owned(), |(_, ours)| ours.clone())
}

// ---------------------------------------------------------------------------
// Cells

/// A name cell: text without control characters, trimmed, at most
/// [`lotfile::MAX_NAME_CHARS`]; numbers as their shortest text. `None` when empty.
fn name_of(
    ctx: &Ctx,
    row: u64,
    col: usize,
    cell: &Cell,
    what: &str,
) -> Result<Option<String>, Problem> {
    let text = match cell {
        Cell::Empty => return Ok(None),
        Cell::Text(t) => t.clone(),
        Cell::Number(n) => format!("{n}"),
        Cell::Date(d) => d.format("%Y-%m-%d %H:%M:%S").to_string(),
        Cell::Bool(_) | Cell::Error(_) => {
            return Err(ctx.problem(
                row,
                Some(col),
                Kind::CellType,
                format!("expected a {what}, found {}", describe(cell)),
            ));
        }
    };
    if let Some(c) = text.chars().find(|c| c.is_control()) {
        return Err(ctx.problem(
            row,
            Some(col),
            ErrorKind::ControlCharacter.into(),
            format!(
                "expected a {what} without control characters, found U+{:04X} in {}",
                u32::from(c),
                found(&text)
            ),
        ));
    }
    let t = text.trim();
    let n = t.chars().count();
    if n > lotfile::MAX_NAME_CHARS {
        return Err(ctx.problem(
            row,
            Some(col),
            ErrorKind::TooLong.into(),
            format!(
                "expected a {what} of at most {} characters, found {n} characters: {}",
                lotfile::MAX_NAME_CHARS,
                found(t)
            ),
        ));
    }
    Ok((!t.is_empty()).then(|| t.to_owned()))
}

fn describe(cell: &Cell) -> String {
    match cell {
        Cell::Empty => "an empty cell".to_owned(),
        Cell::Text(t) => format!("text {}", found(t.trim())),
        Cell::Number(n) => format!("the number {n}"),
        Cell::Date(d) => format!("a date cell {}", d.format("%Y-%m-%d %H:%M:%S")),
        Cell::Bool(b) => format!("the boolean {}", if *b { "TRUE" } else { "FALSE" }),
        Cell::Error(e) => format!("the error value {e}"),
    }
}

fn number(ctx: &Ctx, row: u64, col: usize, cell: &Cell) -> Result<f64, Problem> {
    let fail = |kind: Kind, message: String| ctx.problem(row, Some(col), kind, message);
    match cell {
        Cell::Number(v) if v.is_finite() => Ok(*v),
        Cell::Text(t) if !ctx.is_sheet() => parse_decimal(t, ctx.profile.decimal)
            .map_err(|(kind, message)| fail(kind.into(), message)),
        Cell::Empty => Err(fail(
            ErrorKind::EmptyField.into(),
            "expected a number, found an empty cell (a value is missing)".to_owned(),
        )),
        other => Err(fail(
            Kind::CellType,
            format!("expected a numeric cell, found {}", describe(other)),
        )),
    }
}

/// A number written with the profile's decimal mark.
fn parse_decimal(text: &str, decimal: u8) -> Result<f64, (ErrorKind, String)> {
    let t = text.trim();
    let mark = char::from(decimal);
    let converted;
    let plain = if decimal == b',' {
        if t.contains('.') {
            return Err((
                ErrorKind::BadNumber,
                format!(
                    "expected a number with ',' as decimal separator (and no thousands \
                     separator), found {}",
                    found(t)
                ),
            ));
        }
        converted = t.replace(',', ".");
        converted.as_str()
    } else {
        t
    };
    lotfile::parse_number(plain).map_err(|e| match e {
        NumberError::Empty => (
            ErrorKind::EmptyField,
            "expected a number, found an empty cell (a value is missing)".to_owned(),
        ),
        NumberError::Bad => (
            ErrorKind::BadNumber,
            format!(
                "expected a number with '{mark}' as decimal separator, found {}",
                found(t)
            ),
        ),
        NumberError::NonFinite | NumberError::Overflow => (
            ErrorKind::NonFiniteNumber,
            format!("expected a finite number, found {}", found(t)),
        ),
    })
}

mod time;
use time::timestamp;

// ---------------------------------------------------------------------------
// Grouping

#[derive(Default)]
struct Builder {
    /// The groups, each with an empty track until the file is read.
    groups: Vec<Group>,
    /// Per group, the unit and time of each value (a group of its own: a profile's wide row
    /// may leave cells empty, so a lot's characteristics need not share rows).
    tracks: Vec<Track>,
    /// source → lot → characteristic → group (looked up without allocating).
    ids: HashMap<String, HashMap<String, HashMap<String, usize>>>,
    /// Per group: unit → row of its first measurement.
    seen: Vec<HashMap<String, u64>>,
    serials: Serials,
    rows: usize,
    values: usize,
}

/// One row's fields, parsed.
struct Parsed {
    source: String,
    lot: String,
    unit: Option<String>,
    sampled_at: Option<Timestamp>,
    /// (characteristic, value) per measured characteristic.
    values: Vec<(String, f64)>,
}

impl Builder {
    fn row(&mut self, ctx: &Ctx, cols: &Columns, row: &Row) -> Result<(), Vec<Problem>> {
        let parsed = parse_row(ctx, cols, row)?;
        self.rows += 1;
        let mut first = None;
        let unit = parsed
            .unit
            .as_deref()
            .map_or(NO_UNIT, |u| self.serials.intern(u));
        for (characteristic, value) in parsed.values {
            let g = self.group(&parsed.source, &parsed.lot, characteristic, row.number);
            // Wide rows measure one unit for all characteristics: checked on the first.
            if first.is_none() || cols.layout == Layout::Long {
                first = Some(g);
                self.check_repeat(ctx, cols, g, parsed.unit.as_deref(), row.number)
                    .map_err(|p| vec![p])?;
            }
            self.groups[g].values.push(value);
            self.tracks[g].push(unit, lotfile::Stamp::from(parsed.sampled_at));
            self.values += 1;
        }
        Ok(())
    }

    /// The group of (source, lot, characteristic), created at `line` when new.
    fn group(&mut self, source: &str, lot: &str, characteristic: String, line: u64) -> usize {
        let known = self
            .ids
            .get(source)
            .and_then(|lots| lots.get(lot))
            .and_then(|chars| chars.get(&characteristic));
        if let Some(&g) = known {
            return g;
        }
        let g = self.groups.len();
        self.ids
            .entry(source.to_owned())
            .or_default()
            .entry(lot.to_owned())
            .or_default()
            .insert(characteristic.clone(), g);
        self.groups.push(Group {
            source: source.to_owned(),
            lot: lot.to_owned(),
            characteristic,
            values: Vec::new(),
            track: Arc::default(),
            first_line: line,
        });
        self.tracks.push(Track::default());
        self.seen.push(HashMap::new());
        g
    }

    fn check_repeat(
        &mut self,
        ctx: &Ctx,
        cols: &Columns,
        g: usize,
        unit: Option<&str>,
        at: u64,
    ) -> Result<(), Problem> {
        let Some(unit) = unit else { return Ok(()) };
        let Some(&before) = self.seen[g].get(unit) else {
            self.seen[g].insert(unit.to_owned(), at);
            return Ok(());
        };
        let group = &self.groups[g];
        let what = match cols.layout {
            Layout::Long => format!("characteristic {}", found(&group.characteristic)),
            Layout::Wide => "its characteristics".to_owned(),
        };
        Err(ctx.problem(
            at,
            cols.unit,
            ErrorKind::DuplicateMeasurement.into(),
            format!(
                "expected each unit once per source, lot and characteristic, found unit {} of \
                 source {}, lot {} measured for {what} on {} and again on {}",
                found(unit),
                found(&group.source),
                found(&group.lot),
                ctx.at(before),
                ctx.at(at)
            ),
        ))
    }
}

/// Every field of a row, or every problem in it.
fn parse_row(ctx: &Ctx, cols: &Columns, row: &Row) -> Result<Parsed, Vec<Problem>> {
    check_width(ctx, cols, row).map_err(|p| vec![p])?;
    let mut r = Fields {
        ctx,
        row,
        problems: Vec::new(),
    };
    let source = match &ctx.profile.source {
        Some(fixed) => fixed.clone(),
        None => r.required(cols.source, "source"),
    };
    let lot = r.required(Some(cols.lot), "lot");
    let characteristic = cols
        .characteristic
        .map(|c| r.required(Some(c), "characteristic"));
    let unit = cols
        .unit
        .and_then(|c| r.kept(name_of(ctx, row.number, c, r.cell(c), "unit serial")));
    let sampled_at = cols
        .sampled_at
        .and_then(|c| r.kept(timestamp(ctx, row.number, c, r.cell(c))));
    let measured: Vec<(usize, String)> = match (cols.value, characteristic) {
        (Some(v), Some(ch)) => vec![(v, characteristic_name(ctx.profile, &ch))],
        _ => cols.wide.clone(),
    };
    let mut values = Vec::with_capacity(measured.len());
    for (c, name) in measured {
        if let Some(v) = r.kept(number(ctx, row.number, c, r.cell(c)).map(Some)) {
            values.push((name, v));
        }
    }
    if !r.problems.is_empty() {
        return Err(r.problems);
    }
    Ok(Parsed {
        source,
        lot,
        unit,
        sampled_at,
        values,
    })
}

/// A text row must have the header's fields (extra empty ones, from a trailing delimiter,
/// are fine); sheet rows are as wide as the sheet's used range.
fn check_width(ctx: &Ctx, cols: &Columns, row: &Row) -> Result<(), Problem> {
    let extra = row.cells.iter().skip(cols.width).any(|c| !c.is_empty());
    if ctx.is_sheet() || (row.cells.len() >= cols.width && !extra) {
        return Ok(());
    }
    let n = row.number;
    Err(ctx.problem(
        n,
        None,
        ErrorKind::FieldCount.into(),
        format!(
            "expected {} fields as in the header on line {}, found {} fields on line {n}",
            cols.width,
            ctx.table.header.number,
            row.cells.len()
        ),
    ))
}

/// Reads the cells of one row, collecting every problem.
struct Fields<'a> {
    ctx: &'a Ctx<'a>,
    row: &'a Row,
    problems: Vec<Problem>,
}

impl<'a> Fields<'a> {
    fn cell(&self, c: usize) -> &'a Cell {
        const EMPTY: &Cell = &Cell::Empty;
        self.row.cells.get(c).unwrap_or(EMPTY)
    }

    /// The value, or `None` with the problem kept.
    fn kept<T>(&mut self, r: Result<Option<T>, Problem>) -> Option<T> {
        r.unwrap_or_else(|p| {
            self.problems.push(p);
            None
        })
    }

    /// A non-empty name; an empty string (and a kept problem) otherwise.
    fn required(&mut self, col: Option<usize>, what: &str) -> String {
        let (ctx, n) = (self.ctx, self.row.number);
        let c = col.unwrap_or_default();
        match name_of(ctx, n, c, self.cell(c), what) {
            Ok(Some(t)) => t,
            Ok(None) => {
                self.problems.push(ctx.problem(
                    n,
                    Some(c),
                    ErrorKind::EmptyField.into(),
                    format!("expected a non-empty {what}, found an empty cell"),
                ));
                String::new()
            }
            Err(p) => {
                self.problems.push(p);
                String::new()
            }
        }
    }
}
