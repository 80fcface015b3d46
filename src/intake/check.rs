//! What a file would store, for `lotdrift check-file`: read with the profile it would get,
//! summarised per lot, or every problem; nothing is stored.

use serde::Serialize;

use super::{Place, Problem, Refusal};
use crate::config::Profile;
use crate::lotfile::{Group, Layout, LotFile, NO_UNIT};

/// Values listed in `first_values`.
const FIRST_VALUES: usize = 10;

#[derive(Debug, Serialize)]
pub struct FileCheck {
    pub file: String,
    /// The profile's name, or `built-in`.
    pub profile: String,
    /// True when the file would be stored.
    pub ok: bool,
    pub layout: Option<&'static str>,
    pub rows: usize,
    pub values: usize,
    pub lots: Vec<LotCheck>,
    pub characteristics: Vec<String>,
    /// The first values of the file (in the order of its groups), times in UTC.
    pub first_values: Vec<ValueCheck>,
    pub problems: Vec<ProblemCheck>,
    /// Problems beyond those listed.
    pub more_problems: usize,
    pub hint: Option<String>,
}

#[derive(Debug, Serialize)]
pub struct LotCheck {
    pub source: String,
    pub lot: String,
    pub characteristics: Vec<String>,
    /// Distinct unit serials (0 without a unit column).
    pub units: usize,
    pub values: usize,
    pub first_sampled_at: Option<String>,
    pub last_sampled_at: Option<String>,
}

#[derive(Debug, Serialize)]
pub struct ValueCheck {
    pub source: String,
    pub lot: String,
    pub characteristic: String,
    pub unit: Option<String>,
    pub value: f64,
    pub sampled_at: Option<String>,
}

#[derive(Debug, Serialize)]
pub struct ProblemCheck {
    /// `line:column`, `Sheet!C17`, or empty for the whole file.
    pub position: String,
    pub line: Option<u64>,
    pub sheet: Option<String>,
    pub row: Option<u64>,
    pub column: Option<u64>,
    pub column_name: Option<String>,
    pub kind: &'static str,
    pub message: String,
    /// The whole line as a reason file shows it.
    pub text: String,
}

/// Reads `bytes` like ingest would (`profile` as chosen for the file) and summarises.
pub fn check(file_name: &str, bytes: &[u8], profile: Option<&Profile>) -> FileCheck {
    let name = profile.map_or("built-in", |p| p.name.as_str()).to_owned();
    let mut out = FileCheck {
        file: file_name.to_owned(),
        profile: name,
        ok: false,
        layout: None,
        rows: 0,
        values: 0,
        lots: Vec::new(),
        characteristics: Vec::new(),
        first_values: Vec::new(),
        problems: Vec::new(),
        more_problems: 0,
        hint: None,
    };
    if bytes.is_empty() {
        out.problems.push(ProblemCheck::from(&Problem {
            file: file_name.into(),
            place: Place::File,
            column_name: None,
            kind: super::Kind::Lot(crate::lotfile::ErrorKind::NoData),
            message: "empty file: no header, no data".to_owned(),
        }));
        return out;
    }
    match super::read(file_name, bytes, profile) {
        Ok(f) => summarise(&mut out, &f),
        Err(Refusal {
            problems,
            more,
            hint,
            ..
        }) => {
            out.problems = problems.iter().map(ProblemCheck::from).collect();
            out.more_problems = more;
            out.hint = hint;
        }
    }
    out
}

fn summarise(out: &mut FileCheck, f: &LotFile) {
    out.ok = true;
    out.layout = Some(match f.layout {
        Layout::Long => "long",
        Layout::Wide => "wide",
    });
    out.rows = f.rows;
    out.values = f.values;
    for g in &f.groups {
        if !out.characteristics.contains(&g.characteristic) {
            out.characteristics.push(g.characteristic.clone());
        }
        let times: Vec<String> = g
            .sampled_at()
            .iter()
            .filter_map(|t| t.get())
            .map(|t| t.to_rfc3339())
            .collect();
        let lot = lot_entry(&mut out.lots, g);
        lot.characteristics.push(g.characteristic.clone());
        let mut units: Vec<u32> = g
            .units()
            .iter()
            .copied()
            .filter(|&u| u != NO_UNIT)
            .collect();
        units.sort();
        units.dedup();
        lot.units = lot.units.max(units.len());
        lot.values += g.values.len();
        let first = times.iter().min().cloned();
        let last = times.iter().max().cloned();
        lot.first_sampled_at = lot.first_sampled_at.take().into_iter().chain(first).min();
        lot.last_sampled_at = lot.last_sampled_at.take().into_iter().chain(last).max();
        for i in 0..g.values.len() {
            if out.first_values.len() >= FIRST_VALUES {
                break;
            }
            out.first_values.push(ValueCheck {
                source: g.source.clone(),
                lot: g.lot.clone(),
                characteristic: g.characteristic.clone(),
                unit: f.serials.get(g.units()[i]).map(str::to_owned),
                value: g.values[i],
                sampled_at: g.sampled_at()[i].get().map(|t| t.to_rfc3339()),
            });
        }
    }
}

/// The summary of the group's lot, added when new.
fn lot_entry<'a>(lots: &'a mut Vec<LotCheck>, g: &Group) -> &'a mut LotCheck {
    match lots
        .iter()
        .position(|l| l.source == g.source && l.lot == g.lot)
    {
        Some(i) => &mut lots[i],
        None => {
            lots.push(LotCheck {
                source: g.source.clone(),
                lot: g.lot.clone(),
                characteristics: Vec::new(),
                units: 0,
                values: 0,
                first_sampled_at: None,
                last_sampled_at: None,
            });
            let last = lots.len() - 1;
            &mut lots[last]
        }
    }
}

impl From<&Problem> for ProblemCheck {
    fn from(p: &Problem) -> ProblemCheck {
        let (line, sheet, row, column) = match &p.place {
            Place::File => (None, None, None, None),
            Place::Line { line, column } => (Some(*line), None, None, *column),
            Place::Cell { sheet, row, column } => {
                (None, Some(sheet.to_string()), Some(*row), *column)
            }
        };
        ProblemCheck {
            position: p.position(),
            line,
            sheet,
            row,
            column,
            column_name: p.column_name.clone(),
            kind: p.kind.as_str(),
            message: p.message.clone(),
            text: p.to_string(),
        }
    }
}
