use lotdrift::engine::operating::{Scenario, Units, default_monitor, run};
fn main() {
    let monitor = default_monitor();
    let series: usize = std::env::var("S")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(100);
    let cases = [
        ("normal", Units::Normal, 0.0),
        ("t5", Units::StudentT(5.0), 0.0),
        ("coarse", Units::Coarse(1.0 / 6.0), 0.0),
        ("lognormal0.5", Units::LogNormal(0.5), 0.0),
        ("lognormal1", Units::LogNormal(1.0), 0.0),
        ("lnvalues0.5", Units::LogNormalValues(0.5), 0.0),
        ("lnvalues1", Units::LogNormalValues(1.0), 0.0),
        ("outliers", Units::Normal, 0.002),
        ("all", Units::StudentT(5.0), 0.002),
    ];
    if std::env::var("SPREAD").is_ok() {
        for (name, u, rate) in cases {
            for f in [1.5, 2.0] {
                let mut s = Scenario::normal(series, 40, 20, 0.5, 0.0, 11);
                s.unit_dist = u;
                s.outlier_rate = rate;
                s.spread_factor = f;
                let o = run(&s, &monitor);
                let mut d: Vec<usize> = o.spread_delays.iter().map(|d| d.unwrap_or(999)).collect();
                d.sort();
                println!(
                    "{name:>14} spread x{f}: median lots to spread alert {}, within 10: {:.2}",
                    d[d.len() / 2],
                    o.spread_delays
                        .iter()
                        .filter(|d| d.is_some_and(|d| d <= 10))
                        .count() as f64
                        / series as f64
                );
            }
        }
        return;
    }
    if std::env::var("SHIFT").is_ok() {
        for (name, u, rate) in cases {
            for shift in [1.0, 1.5, 2.0] {
                let mut s = Scenario::normal(series, 60, 20, 0.5, shift, 9);
                s.unit_dist = u;
                s.outlier_rate = rate;
                s.shift_lots = Some(40);
                let o = run(&s, &monitor);
                println!(
                    "{name:>14} shift {shift}: median delay {:?}, within 10 {:.2}, openings/alerted series {:.2}, open at end {}, resolved within 10 {:.2}",
                    o.median_delay(),
                    o.detected_within(10),
                    o.openings_per_alerted_series(),
                    o.open_at_end.iter().filter(|x| **x).count(),
                    o.resolved_within(10)
                );
            }
        }
        return;
    }
    for (name, u, rate) in cases {
        for units in [20usize, 32] {
            let mut s = Scenario::normal(series, 150, units, 0.5, 0.0, 7);
            s.unit_dist = u;
            s.outlier_rate = rate;
            let t = std::time::Instant::now();
            let o = run(&s, &monitor);
            println!(
                "{name:>14} n={units}: alerts {} (spread {}) in {} lots = {:.2}/1000; outliers {} (gross {}) {:.1}s",
                o.alerts,
                o.spread_alerts,
                o.lots_tested,
                o.alerts_per_1000_lots(),
                o.outliers,
                o.gross,
                t.elapsed().as_secs_f64()
            );
        }
    }
}
#[allow(dead_code)]
fn unused() {}
