//! The SQL views of migration 0008, read with plain rusqlite (as a user's own SQL tool would)
//! from a database the real binary wrote, and the README's example queries run against it.

mod common;

use common::*;
use rusqlite::Connection;

const UNITS: &str = "[characteristic.capacity_mah]\nunit = \"mAh\"\n\
                     [characteristic.mass_g]\nunit = \"g\"\n";

/// Two sources, two characteristics, 26 lots of 12 units; birchworks mass_g shifts by 3 sd
/// from lot 23 on (one mean alert).
fn site() -> Site {
    let site = Site::new(UNITS);
    let scenario = Scenario {
        sources: vec!["alder-cells".into(), "birchworks".into()],
        chars: vec!["capacity_mah".into(), "mass_g".into()],
        lots: 26,
        n: 12,
        shift: Some((1, 1, 22, 3.0)),
    };
    for (name, text, _) in scenario.files() {
        drop_file(&site.inbox(), &name, &text);
    }
    site.once();
    site
}

fn open(site: &Site) -> Connection {
    Connection::open(site.path().join("lotdrift.db")).unwrap()
}

fn count(db: &Connection, sql: &str) -> i64 {
    db.query_row(sql, [], |r| r.get(0)).unwrap()
}

#[test]
fn views_answer_practitioners_questions_with_one_row_per_thing() {
    let site = site();
    let db = open(&site);

    // measurement_view: every unit value once, with names, time and unit of measure.
    assert_eq!(
        count(&db, "SELECT COUNT(*) FROM measurement_view"),
        52 * 2 * 12
    );
    let (n, uom, undated): (i64, String, i64) = db
        .query_row(
            "SELECT COUNT(*), MIN(unit_of_measure), SUM(sampled_at IS NULL) FROM measurement_view \
             WHERE source = 'birchworks' AND characteristic = 'mass_g' AND lot = 'BI-001'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .unwrap();
    assert_eq!((n, uom.as_str(), undated), (12, "g", 0));

    // lot_view: one row per lot and characteristic; sd agrees with the unit values.
    assert_eq!(count(&db, "SELECT COUNT(*) FROM lot_view"), 52 * 2);
    assert_eq!(
        count(
            &db,
            "SELECT COUNT(*) FROM (SELECT DISTINCT source, characteristic, lot FROM lot_view)"
        ),
        52 * 2
    );
    let roles: Vec<(String, i64)> = db
        .prepare(
            "SELECT role, COUNT(*) FROM lot_view WHERE source = 'alder-cells' \
             AND characteristic = 'capacity_mah' GROUP BY role ORDER BY role",
        )
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .map(Result::unwrap)
        .collect();
    assert_eq!(roles, vec![("baseline".into(), 20), ("tested".into(), 6)]);
    let worst: f64 = db
        .query_row(
            "SELECT MAX(ABS(lv.sd * lv.sd - (SELECT (SUM(m.value * m.value) - \
                 COUNT(*) * AVG(m.value) * AVG(m.value)) / (COUNT(*) - 1) \
                 FROM measurement_view m WHERE m.sample_id = lv.sample_id))) FROM lot_view lv",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert!(
        worst < 1e-6,
        "sd of lot_view against the unit values: {worst}"
    );

    // decision_view: one row per lot and kind; the shifted lot opened the alert.
    assert_eq!(
        count(
            &db,
            "SELECT COUNT(*) FROM (SELECT lot, characteristic, kind, COUNT(*) AS c \
             FROM decision_view GROUP BY source, characteristic, lot, kind) WHERE c > 1"
        ),
        0
    );
    assert_eq!(
        count(
            &db,
            "SELECT COUNT(*) FROM decision_view WHERE kind = 'mean'"
        ),
        4 * 6
    );
    let (significant, alert, threshold): (i64, Option<i64>, f64) = db
        .query_row(
            "SELECT significant, alert_id, threshold FROM decision_view \
             WHERE source = 'birchworks' AND lot = 'BI-023' AND characteristic = 'mass_g' \
             AND kind = 'mean'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .unwrap();
    assert_eq!(significant, 1);
    assert!(alert.is_some());
    assert!(threshold > 0.0 && threshold < 0.01, "{threshold}");

    // alert_view: the one alert, its opening lot and unit.
    let (source, lot, kind, uom, lots): (String, String, String, String, i64) = db
        .query_row(
            "SELECT source, lot, kind, unit_of_measure, significant_lots FROM alert_view",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?)),
        )
        .unwrap();
    assert_eq!(
        (source.as_str(), lot.as_str(), kind.as_str(), uom.as_str()),
        ("birchworks", "BI-023", "mean", "g")
    );
    assert_eq!(lots, 4);
}

/// Every ```sql block of the README runs on a real database and returns rows; none returns
/// two rows for one lot where it lists lots.
#[test]
fn readme_queries_run() {
    let site = site();
    let db = open(&site);
    let readme =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md")).unwrap();
    let blocks: Vec<&str> = readme
        .split("```sql\n")
        .skip(1)
        .map(|b| b.split("```").next().unwrap())
        .collect();
    assert!(blocks.len() >= 4, "README has {} sql blocks", blocks.len());
    for sql in blocks {
        let sql = sql.replace("'cedar-energy'", "'birchworks'");
        let mut stmt = db.prepare(&sql).unwrap_or_else(|e| panic!("{e}: {sql}"));
        let columns = stmt.column_count();
        let rows: Vec<Vec<String>> = stmt
            .query_map([], |r| {
                Ok((0..columns)
                    .map(|i| format!("{:?}", r.get_ref(i).unwrap()))
                    .collect())
            })
            .unwrap()
            .map(Result::unwrap)
            .collect();
        assert!(!rows.is_empty(), "no rows: {sql}");
        let names = stmt.column_names();
        if let Some(i) = names.iter().position(|c| *c == "lot")
            && sql.contains("per lot")
        {
            let mut lots: Vec<&String> = rows.iter().map(|r| &r[i]).collect();
            lots.sort();
            lots.dedup();
            assert_eq!(lots.len(), rows.len(), "two rows for one lot: {sql}");
        }
    }
}
