//! Outliers through the real binary: a mis-keyed unit value is reported as an outlier (status,
//! history, the `outlier` table via history) and set aside, instead of opening a spread alert;
//! with `outliers = false` for the characteristic, the same file opens a spread alert and a
//! mean alert (one unit 30 sd off moves the mean of 20 units by 1.5 sd).

mod common;

use common::{Site, drop_file, long_file, lot_date, lot_values};

/// 30 lots of 20 units of one series; lot 25 (index 24) has unit 7 keyed as 130.0 instead of
/// about 100 (a slip of one digit: 30 unit sd off).
fn drop_lots(site: &Site) {
    for lot in 0..30 {
        let code = format!("AC-{:03}", lot + 1);
        let mut values = lot_values(20, 100.0, 1.0, lot);
        if lot == 24 {
            values[6] = 130.0;
        }
        let text = long_file(
            "alder-cells",
            &code,
            &lot_date(lot),
            &[("capacity", values)],
        );
        drop_file(&site.inbox(), &format!("alder-cells_{code}.csv"), &text);
    }
}

#[test]
fn a_mis_keyed_unit_is_an_outlier_not_an_alert() {
    let site = Site::new("");
    drop_lots(&site);
    site.once();
    let status = site.status();
    assert_eq!(status["outliers"], 1, "{status}");
    assert_eq!(status["open_alerts"], 0, "{status}");
    assert!(site.alerts().is_empty());
    // Regression: `series` was written twice (a count, then the list); the count is
    // `series_count` now.
    assert_eq!(status["series_count"], 1, "{status}");
    assert_eq!(status["series"].as_array().unwrap().len(), 1, "{status}");
    let history = site.json(&["history", "alder-cells", "capacity"]);
    let rows = history.as_array().unwrap();
    let row = rows.iter().find(|r| r["lot"] == "AC-025").unwrap();
    let outliers = row["outliers"].as_str().unwrap();
    assert!(outliers.starts_with("AC-025-U007 = 130"), "{outliers}");
    assert!(outliers.contains("set aside"), "{outliers}");
    let others = rows.iter().filter(|r| r["outliers"] != "").count();
    assert_eq!(others, 1);
}

#[test]
fn with_outliers_off_the_same_unit_opens_spread_and_mean_alerts() {
    let site = Site::new("[characteristic.capacity]\noutliers = false\n");
    drop_lots(&site);
    site.once();
    let status = site.status();
    assert_eq!(status["outliers"], 0, "{status}");
    let alerts = site.alerts();
    let mut kinds: Vec<&str> = alerts.iter().map(|a| a["kind"].as_str().unwrap()).collect();
    kinds.sort_unstable();
    assert_eq!(kinds, ["mean", "spread"], "{alerts:?}");
    assert!(alerts.iter().all(|a| a["lot"] == "AC-025"), "{alerts:?}");
}
