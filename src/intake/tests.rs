use std::collections::BTreeMap;

use proptest::prelude::*;

use super::*;
use crate::config::{Delimiter, Encoding, Zone};
use crate::lotfile::Layout;

fn profile() -> Profile {
    Profile {
        name: "p".to_owned(),
        pattern: glob::Pattern::new("*.csv").ok(),
        zone: Zone::Named(chrono_tz::Europe::Berlin),
        ..Profile::builtin()
    }
}

fn map(pairs: &[(&str, &str)]) -> BTreeMap<String, String> {
    pairs
        .iter()
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .collect()
}

fn ok(p: &Profile, bytes: &[u8]) -> LotFile {
    read("t.csv", bytes, Some(p)).unwrap_or_else(|e| panic!("{e}"))
}

fn fail(p: &Profile, bytes: &[u8]) -> Refusal {
    match read("t.csv", bytes, Some(p)) {
        Ok(f) => panic!("accepted: {f:?}"),
        Err(e) => e,
    }
}

fn utf16(text: &str, big_endian: bool) -> Vec<u8> {
    let mut out = Vec::new();
    for unit in std::iter::once(0xFEFF).chain(text.encode_utf16()) {
        let bytes = if big_endian {
            unit.to_be_bytes()
        } else {
            unit.to_le_bytes()
        };
        out.extend_from_slice(&bytes);
    }
    out
}

#[test]
fn semicolons_decimal_commas_and_renamed_columns() {
    let p = Profile {
        delimiter: Delimiter::Byte(b';'),
        decimal: b',',
        columns: map(&[("source", "Supplier"), ("lot", "Batch No.")]),
        characteristics: map(&[("Capacity [mAh]", "capacity_mah")]),
        ..profile()
    };
    let f = ok(
        &p,
        "Supplier;Batch No.;capacity [MAH];mass\nbw;7;3010,5;-1,5e1\n".as_bytes(),
    );
    assert_eq!(f.layout, Layout::Wide);
    assert_eq!(f.groups[0].characteristic, "capacity_mah");
    assert_eq!(f.groups[0].values, vec![3010.5]);
    assert_eq!(f.groups[1].characteristic, "mass");
    assert_eq!(f.groups[1].values, vec![-15.0]);
}

#[test]
fn auto_delimiter_and_utf16_in_both_byte_orders() {
    let p = Profile {
        delimiter: Delimiter::Auto,
        ..profile()
    };
    let text = "source\tlot\tbore\nS\tL\t1.5\n";
    for be in [false, true] {
        let f = ok(&p, &utf16(text, be));
        assert_eq!(f.groups[0].values, vec![1.5]);
    }
    // Without a byte-order mark, "auto" tells UTF-16 by the zero bytes of ASCII text.
    for be in [false, true] {
        let f = ok(&p, &utf16(text, be)[2..]);
        assert_eq!(f.groups[0].values, vec![1.5]);
    }
    let e = fail(&p, b"just one column\nx\n");
    assert_eq!(e.problems[0].kind, Kind::Delimiter);
}

#[test]
fn windows_1252_and_utf8_errors_name_the_line() {
    let text = "source,lot,Kapazit\u{e4}t\nS,L,1\n";
    let (bytes, _, _) = encoding_rs::WINDOWS_1252.encode(text);
    let p = Profile {
        encoding: Encoding::Fixed(encoding_rs::WINDOWS_1252),
        ..profile()
    };
    assert_eq!(ok(&p, &bytes).groups[0].characteristic, "Kapazität");
    let e = fail(
        &profile(),
        format!("source,lot,x\nS,L,1\nS,L,{}\n", "\u{e4}").as_bytes(),
    );
    // Valid UTF-8 'ä' is a bad number, not an encoding error.
    assert_eq!(e.problems[0].kind, Kind::Lot(ErrorKind::BadNumber));
    let e = fail(&profile(), b"source,lot,x\nS,L,1\nS,L,\xE4\n");
    assert_eq!(
        e.problems[0].place,
        Place::Line {
            line: 3,
            column: None
        }
    );
    assert!(e.to_string().contains("windows-1252"), "{e}");
}

#[test]
fn header_row_skips_title_lines_and_must_hold_the_header() {
    let p = Profile {
        header_row: Some(3),
        ..profile()
    };
    let f = ok(&p, b"Report, station 3\n\"a,b\"\nsource,lot,x\nS,L,1\n");
    assert_eq!(f.groups[0].first_line, 4);
    let e = fail(&p, b"title\nsource,lot,x\n\nS,L,1\n");
    assert_eq!(e.problems[0].kind, Kind::Lot(ErrorKind::Header));
    assert!(e.to_string().contains("line 3"), "{e}");
    let e = fail(&p, b"title\n");
    assert!(e.to_string().contains("found only"), "{e}");
}

#[test]
fn local_times_in_the_zone_and_clock_changes_are_errors() {
    let p = profile();
    let f = ok(
        &p,
        b"source,lot,sampled_at,x\nS,L,2026-01-15 10:00,1\nS,L,2026-07-15T10:00:30,2\nS,L,2026-07-15,3\n",
    );
    let t: Vec<String> = f.groups[0]
        .sampled_at()
        .iter()
        .map(|t| t.get().unwrap().to_rfc3339())
        .collect();
    assert_eq!(
        t,
        [
            "2026-01-15T09:00:00.000Z",
            "2026-07-15T08:00:30.000Z",
            "2026-07-15T00:00:00.000Z"
        ]
    );
    let e = fail(
        &p,
        b"source,lot,sampled_at,x\nS,L,2026-03-29 02:15,1\nS,L,2026-10-25 02:15,2\nS,L,2026-10-25 02:15+01:00,3\n",
    );
    let kinds: Vec<Kind> = e.problems.iter().map(|p| p.kind).collect();
    assert_eq!(kinds, [Kind::SkippedTime, Kind::AmbiguousTime]);
    assert_eq!(e.problems[1].position(), "3:3");
    assert_eq!(e.problems[1].column_name.as_deref(), Some("sampled_at"));
}

#[test]
fn date_format_with_and_without_time() {
    let mut p = Profile {
        date_format: Some("%d.%m.%Y %H:%M".to_owned()),
        ..profile()
    };
    let f = ok(&p, b"source,lot,sampled_at,x\nS,L,01.02.2026 07:05,1\n");
    assert_eq!(
        f.groups[0].sampled_at()[0].get().unwrap().to_rfc3339(),
        "2026-02-01T06:05:00.000Z"
    );
    p.date_format = Some("%d/%m/%Y".to_owned());
    let t = ok(&p, b"source,lot,sampled_at,x\nS,L,01/02/2026,1\n").groups[0].sampled_at()[0]
        .get()
        .unwrap();
    assert!(t.date_only);
    let e = fail(&p, b"source,lot,sampled_at,x\nS,L,2026/02/01,1\n");
    assert!(e.to_string().contains("\"%d/%m/%Y\" (date_format"), "{e}");
}

#[test]
fn fixed_source_ignore_and_long_layout_with_characteristic_map() {
    let p = Profile {
        source: Some("cedar-energy".to_owned()),
        ignore: vec!["Operator".to_owned()],
        characteristics: map(&[("Dicke", "thickness_mm")]),
        ..profile()
    };
    let f = ok(
        &p,
        b"source,characteristic,lot,value,operator\nignored,Dicke,L,1,jk\nx,Dicke,L,2,jk\n",
    );
    assert_eq!(f.layout, Layout::Long);
    assert_eq!(f.groups.len(), 1);
    assert_eq!(f.groups[0].source, "cedar-energy");
    assert_eq!(f.groups[0].characteristic, "thickness_mm");
    let e = fail(&p, b"characteristic,lot,value,comment\nDicke,L,1,x\n");
    assert_eq!(e.problems[0].kind, Kind::Lot(ErrorKind::UnknownColumn));
    assert!(e.to_string().contains("ignore of profile"), "{e}");
}

#[test]
fn mapped_columns_must_exist_and_every_row_problem_is_listed() {
    let p = Profile {
        columns: map(&[("lot", "Batch No.")]),
        ..profile()
    };
    let e = fail(&p, b"source,lot,x\nS,L,1\n");
    assert_eq!(e.problems[0].kind, Kind::Lot(ErrorKind::MissingColumn));
    assert!(
        e.to_string().contains("columns.lot of profile \"p\""),
        "{e}"
    );
    let mut text = String::from("source,Batch No.,unit,x\n");
    for i in 0..30 {
        text.push_str(&format!("S,L,U{i},bad{i}\n"));
    }
    let e = fail(&p, text.as_bytes());
    assert_eq!(e.problems.len(), MAX_PROBLEMS);
    assert_eq!(e.more, 10);
    assert!(e.to_string().contains("and 10 more"), "{e}");
    let e = fail(&p, b"source,Batch No.,unit,x\nS,L,U1,1\nS,L,U1,2\n");
    assert_eq!(
        e.problems[0].kind,
        Kind::Lot(ErrorKind::DuplicateMeasurement)
    );
    assert!(
        e.to_string().contains("on line 2 and again on line 3"),
        "{e}"
    );
}

#[test]
fn trailing_delimiters_and_short_rows() {
    let p = Profile {
        delimiter: Delimiter::Byte(b';'),
        ..profile()
    };
    assert_eq!(ok(&p, b"source;lot;x;\nS;L;1;\n").values, 1);
    // A spacer column without a header is skipped when it is empty throughout.
    assert_eq!(ok(&p, b";source;;lot;x\n;S;;L;1\n").values, 1);
    let e = fail(&p, b"source;;lot;x\nS;z;L;1\n");
    assert_eq!(e.problems[0].kind, Kind::Lot(ErrorKind::EmptyField));
    assert_eq!(e.problems[0].position(), "1:2");
    let e = fail(&p, b"source;lot;x;y\nS;L;1\n");
    assert_eq!(e.problems[0].kind, Kind::Lot(ErrorKind::FieldCount));
}

#[test]
fn built_in_files_keep_the_built_in_errors() {
    let bytes = b"source,characteristic,lot,value\nS,C,L,x\n";
    let e = read("t.csv", bytes, None).unwrap_err();
    let old = crate::lotfile::parse("t.csv", bytes).unwrap_err();
    assert_eq!(e.to_string(), old.to_string());
    assert!(e.profile.is_none());
    let e = read("t.csv", b"Lieferant;Charge;x\nS;L;1,5\n", None).unwrap_err();
    let hint = e.hint.unwrap();
    assert!(hint.contains("delimiter = \";\""), "{hint}");
}

#[test]
fn a_non_workbook_with_a_workbook_name_is_refused() {
    let e = read("t.xlsx", b"source,lot,x\nS,L,1\n", None).unwrap_err();
    assert_eq!(e.problems[0].kind, Kind::Workbook);
    assert_eq!(e.profile.as_deref(), Some("built-in"));
    assert_eq!(column_letters(1), "A");
    assert_eq!(column_letters(28), "AB");
    assert_eq!(column_letters(703), "AAA");
}

fn profiles() -> impl Strategy<Value = Profile> {
    (
        prop::sample::select(vec![
            Delimiter::Auto,
            Delimiter::Byte(b';'),
            Delimiter::Byte(b'\t'),
        ]),
        any::<bool>(),
        prop::option::of(1usize..4),
        any::<bool>(),
    )
        .prop_map(|(delimiter, comma, header_row, utf16le)| Profile {
            delimiter,
            decimal: if comma { b',' } else { b'.' },
            header_row,
            encoding: if utf16le {
                Encoding::Fixed(encoding_rs::UTF_16LE)
            } else {
                Encoding::Auto
            },
            date_format: Some("%d.%m.%Y %H:%M".to_owned()),
            columns: map(&[("lot", "Charge")]),
            ..profile()
        })
}

proptest! {
    #[test]
    fn never_panics_on_bytes_with_any_profile(p in profiles(), bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        let _ = read("fuzz.csv", &bytes, Some(&p));
        let _ = read("fuzz.xlsx", &bytes, Some(&p));
    }

    #[test]
    fn refusals_always_name_a_problem(p in profiles(), body in "[a-zA-Z0-9;,\t\" .:\n-]{0,200}") {
        let text = format!("source;Charge;sampled_at;x\n{body}");
        if let Err(e) = read("fuzz.csv", text.as_bytes(), Some(&p)) {
            prop_assert!(!e.problems.is_empty());
            prop_assert!(e.problems.iter().all(|p| !p.message.is_empty()));
        }
    }
}

/// Prints the profile reader's speed beside the built-in parser's on the same 40,000 rows
/// (`cargo test --lib intake::tests::throughput -- --nocapture`); asserts only the counts.
#[test]
fn throughput_40k_rows_against_the_built_in_parser() {
    let mut builtin = String::from("source,lot,unit,sampled_at,capacity_mah,mass_g\n");
    for i in 0..40_000 {
        builtin.push_str(&format!(
            "birchworks,BW-{},S{i:06},2026-03-02T08:{:02}:00Z,{}.{},{}.{}\n",
            i / 500,
            i % 60,
            3000 + i % 17,
            i % 10,
            45 + i % 3,
            i % 7
        ));
    }
    let profiled = builtin
        .replace(',', ";")
        .replace('.', ",")
        .replace("Z;", ";");
    let p = Profile {
        delimiter: Delimiter::Byte(b';'),
        decimal: b',',
        ..profile()
    };
    let timed = |f: &dyn Fn() -> LotFile| {
        let start = std::time::Instant::now();
        let lots = f();
        (lots, start.elapsed().as_secs_f64())
    };
    let (a, a_secs) = timed(&|| crate::lotfile::parse("b.csv", builtin.as_bytes()).unwrap());
    let (b, b_secs) = timed(&|| ok(&p, profiled.as_bytes()));
    assert_eq!((a.rows, a.values), (40_000, 80_000));
    assert_eq!((b.rows, b.values), (a.rows, a.values));
    println!(
        "40,000 rows: built-in {:.0} rows/s, profile (';', decimal ',', local times) {:.0} rows/s",
        40_000.0 / a_secs,
        40_000.0 / b_secs
    );
}
