//! Unit values are stored packed, one row per sample (migration 0009): every value must come
//! back bit for bit, through `measurement_view` (read with plain rusqlite, as a user's own SQL
//! tool would) and through the store's own readers, and a replacement must keep the old
//! values, serials and times in the audit trail.

use lotdrift::ingest::build_file;
use lotdrift::store::{FileOutcome, Replacement, Store};
use rusqlite::Connection;

/// Doubles whose shortest text is long, tiny, huge or signed zero (one literal has more
/// digits than a double holds, on purpose: the value a person typed).
#[allow(clippy::excessive_precision)]
const AWKWARD: [f64; 7] = [
    0.1 + 0.2,
    1e-300,
    123456789.123456789,
    -0.0,
    5.0,
    1e16,
    -2.2250738585072014e-308,
];

fn long_file(lot: &str, values: &[f64], times: &[&str]) -> String {
    let mut text = String::from("source,characteristic,lot,unit,sampled_at,value\n");
    for (k, v) in values.iter().enumerate() {
        let unit = if k == 1 {
            String::new()
        } else {
            format!("\"S,{k}\"\"q\"")
        };
        let time = times[k % times.len()];
        text.push_str(&format!("acme,mass_g,{lot},{unit},{time},{v:?}\n"));
    }
    text
}

async fn store_file(store: &Store, name: &str, text: &str, replace: Option<&Replacement<'_>>) {
    let file = build_file(
        name,
        &format!("hash-{name}-{}", text.len()),
        text.as_bytes(),
    )
    .unwrap();
    let outcome = store
        .ingest_batch(&[file], "2026-01-02T00:00:00.000Z", replace)
        .await
        .unwrap();
    assert!(
        matches!(outcome[0], FileOutcome::Stored { .. }),
        "{outcome:?}"
    );
}

fn bits(values: &[f64]) -> Vec<u64> {
    values.iter().map(|v| v.to_bits()).collect()
}

/// (seq, unit, sampled_at, value) of one lot, from the view.
fn view_rows(db: &Connection, lot: &str) -> Vec<(i64, Option<String>, Option<String>, f64)> {
    let mut stmt = db
        .prepare(
            "SELECT seq, unit, sampled_at, value, typeof(value) FROM measurement_view \
             WHERE lot = ?1 ORDER BY seq",
        )
        .unwrap();
    stmt.query_map([lot], |r| {
        assert_eq!(r.get::<_, String>(4)?, "real");
        Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
    })
    .unwrap()
    .collect::<Result<_, _>>()
    .unwrap()
}

#[tokio::test]
async fn awkward_doubles_come_back_bit_for_bit_through_the_view_and_the_store() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("lotdrift.db");
    let store = Store::open(&path).await.unwrap();
    let times = ["2026-03-01T08:30:00Z", "2026-03-01T09:00:00Z", ""];
    store_file(&store, "a.csv", &long_file("L1", &AWKWARD, &times), None).await;
    // One time for every unit: the row keeps no times of its own, the view shows the lot's.
    store_file(
        &store,
        "b.csv",
        &long_file("L2", &[1.5, 2.5], &["2026-03-02"]),
        None,
    )
    .await;

    let db = Connection::open(&path).unwrap();
    let rows = view_rows(&db, "L1");
    let values: Vec<f64> = rows.iter().map(|r| r.3).collect();
    assert_eq!(bits(&values), bits(&AWKWARD));
    let seqs: Vec<i64> = rows.iter().map(|r| r.0).collect();
    assert_eq!(seqs, (0..AWKWARD.len() as i64).collect::<Vec<_>>());
    assert_eq!(rows[0].1.as_deref(), Some("S,0\"q"));
    assert_eq!(rows[1].1, None);
    assert_eq!(rows[0].2.as_deref(), Some("2026-03-01T08:30:00.000Z"));
    assert_eq!(rows[1].2.as_deref(), Some("2026-03-01T09:00:00.000Z"));
    // A unit without a time shows its sample's (earliest) time, as before the packing.
    assert_eq!(rows[2].2.as_deref(), Some("2026-03-01T08:30:00.000Z"));
    let l2 = view_rows(&db, "L2");
    assert_eq!(l2.len(), 2);
    assert!(
        l2.iter()
            .all(|r| r.2.as_deref() == Some("2026-03-02T00:00:00.000Z"))
    );
    let (times_json, count): (Option<String>, i64) = db
        .query_row(
            "SELECT sv.sampled_at_json, (SELECT COUNT(*) FROM measurement_view) \
             FROM sample_values sv JOIN lot_view lv ON lv.sample_id = sv.sample_id \
             WHERE lv.lot = 'L2'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!(times_json, None);
    assert_eq!(count, AWKWARD.len() as i64 + 2);

    let id: i64 = db
        .query_row("SELECT sample_id FROM lot_view WHERE lot = 'L1'", [], |r| {
            r.get(0)
        })
        .unwrap();
    let stored = store.values(&[id]).await.unwrap();
    assert_eq!(bits(&stored[&id]), bits(&AWKWARD));
    let units = store.unit_values(&[id]).await.unwrap();
    let seqs: Vec<i64> = units[&id].iter().map(|u| u.0).collect();
    assert_eq!(seqs, (0..AWKWARD.len() as i64).collect::<Vec<_>>());
    store.close().await;
}

#[tokio::test]
async fn a_replacement_keeps_the_old_values_serials_and_times() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("lotdrift.db");
    let store = Store::open(&path).await.unwrap();
    let times = ["2026-03-01T08:30:00Z", "2026-03-01T09:00:00Z", ""];
    store_file(&store, "a.csv", &long_file("L1", &AWKWARD, &times), None).await;
    let replace = Replacement {
        reason: "typing error",
        by: "tester",
    };
    let new = [10.25, 11.5];
    store_file(
        &store,
        "a2.csv",
        &long_file("L1", &new, &["2026-03-05"]),
        Some(&replace),
    )
    .await;

    let db = Connection::open(&path).unwrap();
    let now: Vec<f64> = view_rows(&db, "L1").iter().map(|r| r.3).collect();
    assert_eq!(now, new);
    let mut stmt = db
        .prepare("SELECT seq, unit, value, sampled_at FROM replaced_measurement ORDER BY seq")
        .unwrap();
    let kept: Vec<(i64, Option<String>, f64, Option<String>)> = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    // replaced_measurement is a table of REAL values: -0.0 is kept as 0.0 there, as it was
    // before the packing; every other value keeps its bits.
    let mut expected = AWKWARD;
    expected[3] = 0.0;
    let values: Vec<f64> = kept.iter().map(|k| k.2).collect();
    assert_eq!(bits(&values), bits(&expected));
    assert_eq!(kept[0].1.as_deref(), Some("S,0\"q"));
    assert_eq!(kept[1].1, None);
    assert_eq!(kept[1].3.as_deref(), Some("2026-03-01T09:00:00.000Z"));
    // The unit without a time had none of its own.
    assert_eq!(kept[2].3, None);
    store.close().await;
}

/// A wide file's characteristics share one row of units: their serials and times are packed
/// once and must still reach every characteristic's rows, and a second file of the same size
/// in the same batch must keep its own.
#[tokio::test]
async fn wide_files_keep_each_units_serial_and_time_for_every_characteristic() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("lotdrift.db");
    let store = Store::open(&path).await.unwrap();
    let wide = |lot: &str, hour: u32| {
        let mut text = String::from("source,lot,sampled_at,unit,mass_g,height_mm\n");
        for k in 0..3 {
            text.push_str(&format!(
                "acme,{lot},2026-03-01T{hour:02}:0{k}:00Z,{lot}-u{k},{}.5,{}.25\n",
                10 + k,
                20 + k
            ));
        }
        text
    };
    let files: Vec<_> = [("W1", 8), ("W2", 9)]
        .iter()
        .map(|(lot, hour)| {
            let text = wide(lot, *hour);
            build_file(
                &format!("{lot}.csv"),
                &format!("hash-{lot}"),
                text.as_bytes(),
            )
            .unwrap()
        })
        .collect();
    let outcomes = store
        .ingest_batch(&files, "2026-03-02T00:00:00.000Z", None)
        .await
        .unwrap();
    assert!(
        outcomes
            .iter()
            .all(|o| matches!(o, FileOutcome::Stored { .. }))
    );

    let db = Connection::open(&path).unwrap();
    for (lot, hour) in [("W1", 8), ("W2", 9)] {
        for (characteristic, base) in [("mass_g", 10.5), ("height_mm", 20.25)] {
            let mut stmt = db
                .prepare(
                    "SELECT seq, unit, sampled_at, value FROM measurement_view \
                     WHERE lot = ?1 AND characteristic = ?2 ORDER BY seq",
                )
                .unwrap();
            let rows: Vec<(i64, String, String, f64)> = stmt
                .query_map([lot, characteristic], |r| {
                    Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
                })
                .unwrap()
                .collect::<Result<_, _>>()
                .unwrap();
            let expected: Vec<(i64, String, String, f64)> = (0..3)
                .map(|k| {
                    (
                        k,
                        format!("{lot}-u{k}"),
                        format!("2026-03-01T{hour:02}:0{k}:00.000Z"),
                        base + k as f64,
                    )
                })
                .collect();
            assert_eq!(rows, expected, "{lot} {characteristic}");
        }
    }
    store.close().await;
}
