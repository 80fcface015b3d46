//! Sampling times under a profile: RFC 3339 (with an offset) as the built-in dialect, local
//! `YYYY-MM-DD HH:MM[:SS]` and the profile's `date_format` in its zone, and workbook date
//! cells. A local time the zone's clock change made ambiguous or skipped is an error.

use chrono::{DateTime, Datelike, LocalResult, NaiveDate, NaiveDateTime, NaiveTime, Utc};

use super::{Cell, Ctx, describe};
use crate::intake::{Kind, Problem};
use crate::lotfile::{self, ErrorKind, Timestamp, found};

/// Local date-time forms always accepted (besides RFC 3339 and a bare date).
const LOCAL_FORMATS: [&str; 4] = [
    "%Y-%m-%d %H:%M:%S%.f",
    "%Y-%m-%dT%H:%M:%S%.f",
    "%Y-%m-%d %H:%M",
    "%Y-%m-%dT%H:%M",
];

/// Date-times with an offset but without seconds (RFC 3339 needs them).
const OFFSET_FORMATS: [&str; 2] = ["%Y-%m-%d %H:%M%#z", "%Y-%m-%dT%H:%M%#z"];

/// A `sampled_at` cell; `None` when empty.
pub(super) fn timestamp(
    ctx: &Ctx,
    row: u64,
    col: usize,
    cell: &Cell,
) -> Result<Option<Timestamp>, Problem> {
    let fail = |kind: Kind, message: String| ctx.problem(row, Some(col), kind, message);
    let (local, shown) = match cell {
        Cell::Empty => return Ok(None),
        Cell::Date(d) if d.time() == NaiveTime::MIN => {
            return in_range(d.and_utc(), true)
                .map(Some)
                .ok_or_else(|| fail(ErrorKind::BadTimestamp.into(), out_of_range(cell)));
        }
        Cell::Date(d) => (*d, d.format("%Y-%m-%d %H:%M:%S").to_string()),
        Cell::Text(t) => match parse_text(t.trim(), ctx.profile.date_format.as_deref()) {
            Parsed::Done(ts) => return Ok(Some(ts)),
            Parsed::Local(d) => (d, t.trim().to_owned()),
            Parsed::Bad => return Err(fail(ErrorKind::BadTimestamp.into(), expected(ctx, t))),
        },
        other => {
            return Err(fail(
                Kind::CellType,
                format!(
                    "expected a date cell or a date as text, found {}",
                    describe(other)
                ),
            ));
        }
    };
    let zone = ctx.profile.zone;
    match zone.to_utc(&local) {
        LocalResult::Single(utc) => in_range(utc, false)
            .map(Some)
            .ok_or_else(|| fail(ErrorKind::BadTimestamp.into(), out_of_range(cell))),
        LocalResult::Ambiguous(early, late) => Err(fail(
            Kind::AmbiguousTime,
            format!(
                "expected an unambiguous local time, found {} which happened twice in {zone} \
                 (the clock went back: {} or {}); write it with an offset or in UTC",
                found(&shown),
                early.format("%Y-%m-%dT%H:%M:%SZ"),
                late.format("%Y-%m-%dT%H:%M:%SZ")
            ),
        )),
        LocalResult::None => Err(fail(
            Kind::SkippedTime,
            format!(
                "expected an existing local time, found {} which never happened in {zone} \
                 (the clock went forward over it)",
                found(&shown)
            ),
        )),
    }
}

enum Parsed {
    /// Fully determined (an offset was given, or only a date).
    Done(Timestamp),
    /// A local date-time, still to be placed in the zone.
    Local(NaiveDateTime),
    Bad,
}

fn parse_text(t: &str, date_format: Option<&str>) -> Parsed {
    if let Some(ts) = lotfile::parse_timestamp(t) {
        return Parsed::Done(ts);
    }
    if let Some(d) = fast_local(t) {
        return Parsed::Local(d);
    }
    if let Some(d) = OFFSET_FORMATS
        .iter()
        .find_map(|f| DateTime::parse_from_str(t, f).ok())
    {
        return in_range(d.with_timezone(&Utc), false).map_or(Parsed::Bad, Parsed::Done);
    }
    if let Some(d) = LOCAL_FORMATS
        .iter()
        .find_map(|f| NaiveDateTime::parse_from_str(t, f).ok())
    {
        return Parsed::Local(d);
    }
    let Some(f) = date_format else {
        return Parsed::Bad;
    };
    if let Ok(d) = DateTime::parse_from_str(t, f) {
        return in_range(d.with_timezone(&Utc), false).map_or(Parsed::Bad, Parsed::Done);
    }
    if let Ok(d) = NaiveDateTime::parse_from_str(t, f) {
        return Parsed::Local(d);
    }
    match NaiveDate::parse_from_str(t, f) {
        Ok(d) => {
            in_range(d.and_time(NaiveTime::MIN).and_utc(), true).map_or(Parsed::Bad, Parsed::Done)
        }
        Err(_) => Parsed::Bad,
    }
}

/// `YYYY-MM-DD HH:MM[:SS]` (space or `T`), the common local form, read without a format
/// string; other forms fall through to chrono's parser.
fn fast_local(t: &str) -> Option<NaiveDateTime> {
    let b = t.as_bytes();
    let seconds = match b.len() {
        16 => false,
        19 if b[16] == b':' => true,
        _ => return None,
    };
    let digits: &[usize] = if seconds {
        &[0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15, 17, 18]
    } else {
        &[0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15]
    };
    let shape = b[4] == b'-' && b[7] == b'-' && matches!(b[10], b' ' | b'T') && b[13] == b':';
    if !shape || !digits.iter().all(|&i| b[i].is_ascii_digit()) {
        return None;
    }
    let num = |i: usize, n: usize| {
        b[i..i + n]
            .iter()
            .fold(0u32, |acc, &d| acc * 10 + u32::from(d - b'0'))
    };
    let date = NaiveDate::from_ymd_opt(i32::try_from(num(0, 4)).ok()?, num(5, 2), num(8, 2))?;
    let second = if seconds { num(17, 2) } else { 0 };
    date.and_hms_opt(num(11, 2), num(14, 2), second)
}

fn in_range(utc: DateTime<Utc>, date_only: bool) -> Option<Timestamp> {
    (0..=9999)
        .contains(&utc.year())
        .then_some(Timestamp { utc, date_only })
}

fn out_of_range(cell: &Cell) -> String {
    format!(
        "expected a date in the years 0000-9999, found {}",
        describe(cell)
    )
}

fn expected(ctx: &Ctx, t: &str) -> String {
    let custom = match &ctx.profile.date_format {
        Some(f) => format!(", or {f:?} (date_format of profile {:?})", ctx.profile.name),
        None => String::new(),
    };
    format!(
        "expected a date-time such as 2026-03-01 08:30[:00] (local, in {}), RFC 3339 with an \
         offset, or a date 2026-03-01{custom}; found {}",
        ctx.profile.zone,
        found(t.trim())
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_fast_local_form_agrees_with_chrono() {
        for t in [
            "2026-03-01 08:30",
            "2026-03-01T08:30:59",
            "2024-02-29 23:59:00",
        ] {
            assert!(fast_local(t).is_some(), "{t}");
        }
        for t in [
            "2026-03-01 08:30",
            "2026-03-01T08:30:59",
            "2024-02-29 23:59:00",
            "2026-02-29 08:30",
            "2026-13-01 08:30",
            "2026-03-01 24:00",
            "2026-03-01 08:30:60",
            "2026-03-01 08:30:5",
            "2026-03-01x08:30",
            "+026-03-01 08:30",
        ] {
            let slow = LOCAL_FORMATS
                .iter()
                .find_map(|f| NaiveDateTime::parse_from_str(t, f).ok());
            // Where the fast form declines (a leap second), chrono's parser still runs.
            let fast = fast_local(t);
            assert!(fast.is_none() || fast == slow, "{t}: {fast:?} vs {slow:?}");
        }
    }
}
