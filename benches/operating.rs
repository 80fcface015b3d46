//! Prints the operating table of the default monitoring policy (README, "Operating
//! characteristics"): false alerts per 1,000 in-control lots and lots to detection per shift
//! size, by simulation with fixed seeds (`lotdrift::engine::operating`).
//!
//! Run: `cargo bench --bench operating`

use lotdrift::engine::operating::{Scenario, Units, default_monitor, run};

fn main() {
    let monitor = default_monitor();
    let series = std::env::var("OPERATING_SERIES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(400);
    println!(
        "default policy: baseline {} lots, budget 1 false alert per {} lots, CUSUM shift {}, \
         {} series per row, 30 units per lot",
        monitor.baseline_lots, monitor.false_alert_lots, monitor.cusum_shift, series
    );
    println!(
        "{:>8} {:>12} {:>22} {:>16} {:>16} {:>16}",
        "between",
        "shift (sd)",
        "false alerts/1000 lots",
        "median lots",
        "within 5 lots",
        "within 20 lots"
    );
    for between in [0.0, 0.5, 1.0] {
        for (i, shift) in [0.0, 0.5, 1.0, 1.5, 2.0, 3.0].into_iter().enumerate() {
            let lots = if shift == 0.0 { 500 } else { 100 };
            let seed = 1000 + i as u64 + (between * 100.0) as u64;
            let s = Scenario::normal(series, lots, 30, between, shift, seed);
            let out = run(&s, &monitor);
            let median = out
                .median_delay()
                .map_or_else(|| format!("> {lots}"), |m| m.to_string());
            if shift == 0.0 {
                println!(
                    "{between:>8} {shift:>12} {:>22.2} {:>16} {:>16} {:>16}",
                    out.alerts_per_1000_lots(),
                    "-",
                    "-",
                    "-"
                );
            } else {
                println!(
                    "{between:>8} {shift:>12} {:>22} {:>16} {:>15.0}% {:>15.0}%",
                    "-",
                    median,
                    100.0 * out.detected_within(5),
                    100.0 * out.detected_within(20)
                );
            }
        }
    }
    field_table(series);
    spread_table(series);
}

/// Lots to the first spread alert when the unit sd grows by half or doubles (20 units per lot,
/// between-lot sd 0.5).
fn spread_table(series: usize) {
    let monitor = default_monitor();
    println!("\nspread increases: 20 units per lot, between-lot sd 0.5, {series} series per row");
    println!(
        "{:>30} {:>7} {:>8} {:>14}",
        "units", "factor", "median", "within 10 lots"
    );
    let cases = [
        ("normal", Units::Normal),
        ("t, 5 df", Units::StudentT(5.0)),
        ("log-normal values (sigma 0.5)", Units::LogNormalValues(0.5)),
    ];
    for (i, (name, units)) in cases.into_iter().enumerate() {
        for (j, factor) in [1.5, 2.0].into_iter().enumerate() {
            let mut s = Scenario::normal(series, 40, 20, 0.5, 0.0, 7000 + 10 * i as u64 + j as u64);
            s.unit_dist = units;
            s.spread_factor = factor;
            let out = run(&s, &monitor);
            let mut d: Vec<usize> = out
                .spread_delays
                .iter()
                .map(|d| d.unwrap_or(usize::MAX))
                .collect();
            d.sort_unstable();
            let median = d[d.len() / 2];
            let median = if median == usize::MAX {
                "> 40".to_string()
            } else {
                median.to_string()
            };
            let within = d.iter().filter(|&&x| x <= 10).count() as f64 / d.len() as f64;
            println!(
                "{name:>30} {factor:>7} {median:>8} {:>13.0}%",
                100.0 * within
            );
        }
    }
}

/// The rows for field-like units: 20 units per lot, between-lot sd 0.5 of the unit sd; shifts
/// in unit sd lasting 40 lots, then back.
fn field_table(series: usize) {
    let monitor = default_monitor();
    let lot_sd = (0.25f64 + 1.0 / 20.0).sqrt();
    println!(
        "\nfield-like units: 20 units per lot, between-lot sd 0.5, {series} series per row; \
         shifts in unit sd for 40 lots"
    );
    println!(
        "{:>30} {:>6} {:>14} {:>8} {:>9} {:>8} {:>10} {:>10}",
        "units", "shift", "false/1000", "spread", "outliers", "median", "alerts/ser", "resolved"
    );
    let cases = [
        ("normal", Units::Normal, 0.0),
        ("t, 5 df", Units::StudentT(5.0), 0.0),
        ("coarse gauge (sd/6)", Units::Coarse(1.0 / 6.0), 0.0),
        ("log-normal (sigma 0.5)", Units::LogNormal(0.5), 0.0),
        ("log-normal (sigma 1)", Units::LogNormal(1.0), 0.0),
        (
            "log-normal values (sigma 0.5)",
            Units::LogNormalValues(0.5),
            0.0,
        ),
        (
            "log-normal values (sigma 1)",
            Units::LogNormalValues(1.0),
            0.0,
        ),
        ("normal + 0.2 % gross outliers", Units::Normal, 0.002),
        ("t 5 df + 0.2 % gross outliers", Units::StudentT(5.0), 0.002),
    ];
    for (i, (name, units, rate)) in cases.into_iter().enumerate() {
        for (j, shift) in [0.0, 1.0, 1.5, 2.0].into_iter().enumerate() {
            let lots = if shift == 0.0 { 300 } else { 60 };
            let seed = 5000 + 10 * i as u64 + j as u64;
            let mut s = Scenario::normal(series, lots, 20, 0.5, shift / lot_sd, seed);
            s.unit_dist = units;
            s.outlier_rate = rate;
            if shift > 0.0 {
                s.shift_lots = Some(40);
            }
            let out = run(&s, &monitor);
            if shift == 0.0 {
                println!(
                    "{name:>30} {:>6} {:>14.2} {:>8} {:>9} {:>8} {:>10} {:>10}",
                    "none",
                    out.alerts_per_1000_lots(),
                    out.spread_alerts,
                    format!("{}/{}", out.outliers, out.gross),
                    "-",
                    "-",
                    "-"
                );
            } else {
                let median = out
                    .median_delay()
                    .map_or_else(|| "> 40".to_string(), |m| m.to_string());
                println!(
                    "{name:>30} {shift:>6} {:>14} {:>8} {:>9} {:>8} {:>10.2} {:>9.0}%",
                    "-",
                    "-",
                    "-",
                    median,
                    out.openings_per_alerted_series(),
                    100.0 * out.resolved_within(10)
                );
            }
        }
    }
}
