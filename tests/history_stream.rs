//! `history` is written lot by lot as it is read (issue 10). Its output must be byte for byte
//! what the collecting implementation printed (rows and decisions read whole, then one table
//! per characteristic built by comfy-table, one CSV, one JSON value), plus each lot's
//! `decisions` in JSON. That implementation is kept below as the oracle, reading the same
//! database through `Store::history` and `Store::lot_decisions` (`decision_view`).

mod common;

use std::collections::{BTreeMap, HashMap};

use common::*;
use lotdrift::report::{decimals_for, fixed, p_value, table_in, with_unit};
use lotdrift::store::{HistoryRow, LotDecision, Store};
use serde_json::{Value, json};

const SOURCE: &str = "alder-cells";
const UNITS: &str = "[characteristic.capacity_mah]\nunit = \"mAh\"\n";

/// One source: capacity_mah (with a unit) shifts by 3 sd from lot 31 on, so alerts open and
/// lots signal; resistance has a mis-keyed unit (an outlier, a comma in the CSV); mass_g is
/// measured on the first 8 lots only (pending, no baseline); three late lots of one unit
/// without a sampling time (no sd, no date).
fn site() -> Site {
    let site = Site::new(UNITS);
    let scenario = Scenario {
        sources: vec![SOURCE.into()],
        chars: vec!["capacity_mah".into(), "resistance_mohm".into()],
        lots: 40,
        n: 10,
        shift: Some((0, 0, 30, 3.0)),
    };
    for (name, mut text, lot) in scenario.files() {
        if lot == 33 {
            text = text.replacen(",200.", ",230.", 1);
        }
        if lot < 8 {
            let code = format!("AL-{:03}", lot + 1);
            let mass = [("mass_g", lot_values(5, 46.5, 0.2, lot))];
            let extra = long_file(SOURCE, &code, &lot_date(lot), &mass);
            text.push_str(extra.split_once('\n').unwrap().1);
        }
        drop_file(&site.inbox(), &name, &text);
    }
    for i in 1..=3 {
        let text = format!("source,characteristic,lot,value\n{SOURCE},mass_g,LATE-{i},46.{i}\n");
        drop_file(&site.inbox(), &format!("late-{i}.csv"), &text);
    }
    site.once();
    site
}

fn output(site: &Site, args: &[&str], columns: &str) -> String {
    let out = cmd(site.path())
        .env("COLUMNS", columns)
        .args(args)
        .arg("--config")
        .arg(site.config())
        .output()
        .unwrap();
    assert!(out.status.success(), "{args:?}: {}", text(&out.stderr));
    String::from_utf8(out.stdout).unwrap()
}

/// What the collecting implementation read: every row, every decision.
fn read_whole(site: &Site, characteristic: Option<&str>) -> (Vec<HistoryRow>, Vec<LotDecision>) {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let store = Store::open(&site.path().join("lotdrift.db")).await.unwrap();
        let rows = store.history(SOURCE, characteristic).await.unwrap();
        let decisions = store.lot_decisions(SOURCE, characteristic).await.unwrap();
        store.close().await;
        (rows, decisions)
    })
}

#[test]
fn history_prints_what_the_collecting_implementation_printed() {
    let site = site();
    let units = BTreeMap::from([("capacity_mah".to_string(), "mAh".to_string())]);
    for ch in [None, Some("capacity_mah")] {
        let (rows, decisions) = read_whole(&site, ch);
        let mut args = vec!["history", SOURCE];
        args.extend(ch);
        assert!(rows.len() >= 40, "{}", rows.len());
        for width in [40, 64, 80, 100, 132, 250] {
            let expected = oracle::text(&rows, &decisions, &units, width);
            assert_eq!(
                output(&site, &args, &width.to_string()),
                expected,
                "{width}"
            );
        }
        args.push("--csv");
        assert_eq!(output(&site, &args, "100"), oracle::csv(&rows));
        args.pop();
        args.push("--json");
        assert_eq!(
            output(&site, &args, "100"),
            oracle::json(&rows, &decisions, &units)
        );
    }
}

/// The database has what the comparison above is about.
#[test]
fn the_generated_history_has_every_kind_of_row() {
    let site = site();
    let shown = output(&site, &["history", SOURCE], "100");
    for word in [
        "signal",
        "opened",
        "CUSUM",
        "set aside",
        "pending",
        "baseline",
        "LATE-1",
        "(mAh)",
    ] {
        assert!(shown.contains(word), "{word} missing:\n{shown}");
    }
    let json: Value =
        serde_json::from_str(&output(&site, &["history", SOURCE, "--json"], "100")).unwrap();
    let lots = json.as_array().unwrap();
    let tested = lots.iter().find(|l| l["role"] == "tested").unwrap();
    let kinds: Vec<&str> = tested["decisions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| d["kind"].as_str().unwrap())
        .collect();
    assert_eq!(kinds, ["mean", "spread"], "{tested}");
    assert!(tested["decisions"][0]["threshold"].as_f64().unwrap() > 0.0);
    let pending = lots.iter().find(|l| l["role"] == "pending").unwrap();
    assert_eq!(pending["decisions"], json!([]), "{pending}");
}

/// The implementation `history` had before it streamed (report.rs at 8e0c625), with the
/// width passed in instead of read from the terminal, and `decisions` added to the JSON.
mod oracle {
    use super::*;

    pub fn json(rows: &[HistoryRow], decisions: &[LotDecision], units: &Units) -> String {
        let mut value = json!(
            rows.iter()
                .map(|r| HistoryJson {
                    row: r,
                    unit_of_measure: units.get(&r.characteristic).map(String::as_str),
                })
                .collect::<Vec<_>>()
        );
        for lot in value.as_array_mut().unwrap() {
            let of_lot: Vec<Value> = decisions
                .iter()
                .filter(|d| d.characteristic == lot["characteristic"] && d.lot == lot["lot"])
                .map(|d| {
                    let mut d = json!(d);
                    let o = d.as_object_mut().unwrap();
                    o.remove("characteristic");
                    o.remove("lot");
                    d
                })
                .collect();
            lot["decisions"] = Value::Array(of_lot);
        }
        serde_json::to_string_pretty(&value).unwrap() + "\n"
    }

    type Units = BTreeMap<String, String>;

    #[derive(serde::Serialize)]
    struct HistoryJson<'a> {
        #[serde(flatten)]
        row: &'a HistoryRow,
        #[serde(skip_serializing_if = "Option::is_none")]
        unit_of_measure: Option<&'a str>,
    }

    const HISTORY_HEADER: [&str; 15] = [
        "source",
        "characteristic",
        "lot",
        "sampled_at",
        "n",
        "mean",
        "sd",
        "min",
        "max",
        "role",
        "p_value",
        "p_adjusted",
        "alert",
        "events",
        "outliers",
    ];

    pub fn csv(rows: &[HistoryRow]) -> String {
        let mut w = csv::Writer::from_writer(Vec::new());
        w.write_record(HISTORY_HEADER).unwrap();
        for r in rows {
            w.write_record([
                r.source.clone(),
                r.characteristic.clone(),
                r.lot.clone(),
                r.sampled_at.clone().unwrap_or_default(),
                r.n.to_string(),
                r.mean.to_string(),
                r.sd.map(|v| v.to_string()).unwrap_or_default(),
                r.min.to_string(),
                r.max.to_string(),
                r.role.clone(),
                r.p_value.map(|v| v.to_string()).unwrap_or_default(),
                r.p_adjusted.map(|v| v.to_string()).unwrap_or_default(),
                r.alert_id.map(|v| v.to_string()).unwrap_or_default(),
                r.events.clone(),
                r.outliers.clone(),
            ])
            .unwrap();
        }
        String::from_utf8(w.into_inner().unwrap()).unwrap()
    }

    type ByLot<'a> = HashMap<(&'a str, &'a str), Vec<&'a LotDecision>>;

    pub fn text(
        rows: &[HistoryRow],
        decisions: &[LotDecision],
        units: &Units,
        width: u16,
    ) -> String {
        let mut by_lot: ByLot = HashMap::new();
        for d in decisions {
            by_lot
                .entry((d.characteristic.as_str(), d.lot.as_str()))
                .or_default()
                .push(d);
        }
        let mut out = String::new();
        let mut start = 0;
        while start < rows.len() {
            let ch = &rows[start].characteristic;
            let end = start
                + rows[start..]
                    .iter()
                    .take_while(|r| &r.characteristic == ch)
                    .count();
            let series = &rows[start..end];
            let unit = units.get(ch).map(String::as_str);
            if !out.is_empty() {
                out.push('\n');
            }
            out.push_str(&format!("{} / {}\n", series[0].source, with_unit(ch, unit)));
            out.push_str(&table(series, &by_lot, width));
            start = end;
        }
        out
    }

    fn table(rows: &[HistoryRow], by_lot: &ByLot, width: u16) -> String {
        let d = decimals_for(median_sd(rows));
        let body: Vec<Vec<String>> = rows
            .iter()
            .map(|r| {
                let found = by_lot
                    .get(&(r.characteristic.as_str(), r.lot.as_str()))
                    .map(Vec::as_slice)
                    .unwrap_or_default();
                let notes = [r.events.as_str(), r.outliers.as_str()]
                    .iter()
                    .filter(|t| !t.is_empty())
                    .copied()
                    .collect::<Vec<_>>()
                    .join("; ");
                vec![
                    format!("{}\n{}", r.lot, date(r.sampled_at.as_deref())),
                    r.n.to_string(),
                    fixed(Some(r.mean), d),
                    fixed(r.sd, d),
                    format!("{} – {}", fixed(Some(r.min), d), fixed(Some(r.max), d)),
                    r.role.clone(),
                    decision_text(found, "mean"),
                    decision_text(found, "spread"),
                    notes,
                ]
            })
            .collect();
        let header = [
            "lot",
            "n",
            "mean",
            "sd",
            "min – max",
            "role",
            "mean test",
            "spread test",
            "alerts, outliers",
        ];
        table_in(width, &header, &body, &[6, 7, 8])
    }

    fn date(t: Option<&str>) -> String {
        t.map_or_else(|| "-".into(), |t| t.chars().take(10).collect())
    }

    fn median_sd(rows: &[HistoryRow]) -> f64 {
        let mut sds: Vec<f64> = rows
            .iter()
            .filter_map(|r| r.sd)
            .filter(|v| *v > 0.0)
            .collect();
        if sds.is_empty() {
            return f64::NAN;
        }
        sds.sort_by(f64::total_cmp);
        sds[sds.len() / 2]
    }

    fn decision_text(found: &[&LotDecision], kind: &str) -> String {
        let Some(d) = found.iter().find(|d| d.kind == kind) else {
            return String::new();
        };
        let mut s = format!("p {}", p_value(d.p_adjusted.or(d.p_value)));
        if d.cusum_signal {
            s.push_str(&format!(
                ", {}",
                cusum_text(d.cusum_upper, d.cusum_lower, d.cusum_h)
            ));
        }
        if d.significant {
            s.push_str(" signal");
        }
        s
    }

    fn cusum_text(upper: Option<f64>, lower: Option<f64>, h: Option<f64>) -> String {
        let value = upper.unwrap_or(0.0).max(lower.unwrap_or(0.0));
        let rel = if h.is_some_and(|h| value > h) {
            ">"
        } else {
            "≤"
        };
        format!("CUSUM {value:.1}\n{rel} h {}", fixed(h, 1))
    }
}
