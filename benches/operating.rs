//! Prints the operating table of the default monitoring policy (README, "Operating
//! characteristics"): false alerts per 1,000 in-control lots and lots to detection per shift
//! size, by simulation with fixed seeds (`lotdrift::engine::operating`).
//!
//! Run: `cargo bench --bench operating`

use lotdrift::engine::operating::{Scenario, default_monitor, run};

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
}
