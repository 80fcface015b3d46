//! Operating characteristics of the default monitoring policy, by simulation with fixed seeds
//! and real between-lot variation (between-lot sd 0.5 of the unit sd, 30 units per lot).
//!
//! Checks: under no shift the false-alert rate stays within the budget (default: one false
//! alert per 500 lots per series = 2 per 1,000 lots; Monte Carlo tolerance: the observed count
//! may exceed the budget's expected count by 3 Poisson standard deviations); shifts of 1, 1.5
//! and 2 sd of a lot mean are caught, the larger sooner; a unit-level Welch comparison of the
//! same data (the first engine's rule) is shown to fail the budget, so the check can fail.

use lotdrift::engine::operating::{Outcome, Scenario, Units, default_monitor, run};

fn scenario(shift: f64, series: usize, lots: usize, seed: u64) -> Scenario {
    Scenario::normal(series, lots, 30, 0.5, shift, seed)
}

#[test]
fn in_control_false_alerts_stay_within_the_budget() {
    let monitor = default_monitor();
    let out = run(&scenario(0.0, 120, 400, 11), &monitor);
    let budget_per_lot = 1.0 / monitor.false_alert_lots;
    let expected = budget_per_lot * out.lots_tested as f64;
    let limit = expected + 3.0 * expected.sqrt();
    println!(
        "in control: {} alerts in {} lots = {:.2} per 1000 (budget {:.2})",
        out.alerts,
        out.lots_tested,
        out.alerts_per_1000_lots(),
        1000.0 * budget_per_lot
    );
    assert!(
        (out.alerts as f64) <= limit,
        "{} alerts in {} lots exceed the budget's {expected:.1} (+3 sd = {limit:.1})",
        out.alerts,
        out.lots_tested
    );
}

#[test]
fn shifts_are_caught_and_larger_shifts_sooner() {
    let monitor = default_monitor();
    let mut previous = usize::MAX;
    for (shift, seed) in [(1.0, 21), (1.5, 22), (2.0, 23)] {
        let out = run(&scenario(shift, 100, 80, seed), &monitor);
        let median = out.median_delay().expect("most series alert");
        println!(
            "shift {shift} sd: median {median} lots to the first alert; {:.0} % within 10 lots",
            100.0 * out.detected_within(10)
        );
        assert!(
            median <= previous,
            "shift {shift}: median {median} > {previous}"
        );
        assert!(out.detected_within(80) >= 0.85, "shift {shift}");
        previous = median;
    }
    assert!(
        previous <= 10,
        "a 2 sd shift should be caught within about ten lots"
    );
}

#[test]
fn direction_and_minimum_shift_rules_hold() {
    let mut monitor = default_monitor();
    // Higher is better: an upward shift is an improvement, never an alert.
    monitor.per_characteristic.insert(
        "x".into(),
        lotdrift::config::CharacteristicPolicy {
            direction: lotdrift::config::Direction::HigherIsBetter,
            min_shift: 0.0,
            spread: false,
            outliers: true,
            lsl: None,
            usl: None,
        },
    );
    let up = run(&scenario(3.0, 40, 30, 31), &monitor);
    assert_eq!(up.delays.iter().filter(|d| d.is_some()).count(), 0);
    let down = run(&scenario(-3.0, 40, 30, 32), &monitor);
    assert!(down.detected_within(15) >= 0.9);

    // A minimum shift larger than the true shift: no alert; a true shift well beyond: alerts.
    // (sd of a lot mean here: sqrt(0.5^2 + 1/30) = 0.532.)
    monitor.per_characteristic.insert(
        "x".into(),
        lotdrift::config::CharacteristicPolicy {
            direction: lotdrift::config::Direction::TwoSided,
            min_shift: 2.0,
            spread: false,
            outliers: true,
            lsl: None,
            usl: None,
        },
    );
    let small = run(&scenario(2.0, 40, 30, 33), &monitor); // 1.06 units < 2.0
    assert_eq!(small.delays.iter().filter(|d| d.is_some()).count(), 0);
    let large = run(&scenario(10.0, 40, 30, 34), &monitor); // 5.3 units > 2.0
    assert!(large.detected_within(5) >= 0.9);
}

#[test]
fn treating_units_as_independent_would_break_the_budget() {
    // The rule of the first engine: each lot's units against the pooled baseline units with
    // Welch's t at the same per-lot level. On the same in-control data it alerts far more
    // often, which is why the engine models the between-lot component.
    use lotdrift::stats::Summary;
    use lotdrift::stats::ttest::{TTestOptions, welch};
    use rand::SeedableRng;
    use rand_distr::{Distribution, Normal};
    let mut rng = rand::rngs::StdRng::seed_from_u64(41);
    let lot = Normal::new(0.0, 0.5).unwrap();
    let unit = Normal::new(0.0, 1.0).unwrap();
    let draw = |rng: &mut rand::rngs::StdRng| {
        let e = lot.sample(rng);
        let v: Vec<f64> = (0..30).map(|_| e + unit.sample(rng)).collect();
        Summary::from_slice(&v).unwrap()
    };
    let level = default_monitor().shares(true).0;
    let (mut signals, mut tests) = (0, 0);
    for _ in 0..50 {
        let mut base = draw(&mut rng);
        for _ in 1..20 {
            base = base.merge(&draw(&mut rng));
        }
        for _ in 0..100 {
            let r = welch(&draw(&mut rng), &base, &TTestOptions::default()).unwrap();
            tests += 1;
            if r.p_value <= level {
                signals += 1;
            }
        }
    }
    let rate = signals as f64 / tests as f64;
    println!("unit-level Welch: {rate:.3} of in-control lots signal (level {level})");
    assert!(rate > 20.0 * level, "rate {rate}");
}

#[test]
fn online_fdr_controls_the_stream_of_lot_tests() {
    // LOND (Javanmard & Montanari 2018) and LORD++ (Ramdas et al. 2017) as the over-time
    // control of the lot tests: in control, every lot test is a true null, so any rejection is
    // a false discovery; the FDR is then the probability of at least one rejection, which both
    // procedures bound by the level (their published guarantee; LOND under independence).
    for over_time in [
        lotdrift::config::OverTime::Lond,
        lotdrift::config::OverTime::Lord,
    ] {
        let mut monitor = default_monitor();
        monitor.over_time = over_time;
        monitor.fdr_level = 0.05;
        monitor.cusum = false;
        monitor.spread = false;
        let out = run(&scenario(0.0, 200, 100, 51), &monitor);
        let series_with_alert = out.delays.iter().filter(|d| d.is_some()).count();
        let share = series_with_alert as f64 / 200.0;
        // Monte Carlo tolerance: 3 binomial sd above 0.05 for 200 series.
        assert!(
            share <= 0.05 + 3.0 * (0.05f64 * 0.95 / 200.0).sqrt(),
            "{over_time:?}: {share}"
        );
        // Online FDR levels shrink along the stream: only strong shifts are found quickly.
        let shifted = run(&scenario(6.0, 50, 30, 52), &monitor);
        assert!(shifted.detected_within(10) >= 0.8, "{over_time:?}");
    }
}

/// Field-like unit distributions of incoming inspection (common practice in simulation
/// studies of control charts: heavy tails, skew, gauge resolution, contamination), each with
/// between-lot sd 0.5 of the unit sd and 20 units per lot.
fn field(name: &str) -> (Units, f64) {
    match name {
        "heavy tails (t, 5 df)" => (Units::StudentT(5.0), 0.0),
        "coarse gauge (sd / 6)" => (Units::Coarse(1.0 / 6.0), 0.0),
        "skewed (log-normal, sigma 1)" => (Units::LogNormal(1.0), 0.0),
        "log-normal values (sigma 0.5)" => (Units::LogNormalValues(0.5), 0.0),
        "gross outliers (0.2 %)" => (Units::Normal, 0.002),
        "all together" => (Units::StudentT(5.0), 0.002),
        _ => unreachable!(),
    }
}

const FIELD: [&str; 6] = [
    "heavy tails (t, 5 df)",
    "coarse gauge (sd / 6)",
    "skewed (log-normal, sigma 1)",
    "log-normal values (sigma 0.5)",
    "gross outliers (0.2 %)",
    "all together",
];

fn field_scenario(name: &str, shift_unit_sd: f64, lots: usize, seed: u64) -> Scenario {
    let (units, rate) = field(name);
    // A shift in unit sd, in sd of a lot mean: sqrt(0.5^2 + 1/20) = 0.548.
    let lot_sd = (0.25f64 + 1.0 / 20.0).sqrt();
    let mut s = Scenario::normal(100, lots, 20, 0.5, shift_unit_sd / lot_sd, seed);
    s.unit_dist = units;
    s.outlier_rate = rate;
    s
}

/// The budget with the Monte Carlo tolerance of the other in-control checks: the observed
/// count may exceed the expected count by 3 Poisson sd.
fn within_budget(out: &Outcome, false_alert_lots: f64) -> (bool, f64) {
    let expected = out.lots_tested as f64 / false_alert_lots;
    let limit = expected + 3.0 * expected.sqrt();
    ((out.alerts as f64) <= limit, limit)
}

#[test]
fn the_budget_holds_for_field_like_units() {
    let monitor = default_monitor();
    for (i, name) in FIELD.iter().enumerate() {
        let out = run(&field_scenario(name, 0.0, 150, 60 + i as u64), &monitor);
        let (ok, limit) = within_budget(&out, monitor.false_alert_lots);
        println!(
            "{name}: {} alerts ({} spread) in {} lots = {:.2} per 1000; {} outliers reported \
             ({} gross simulated)",
            out.alerts,
            out.spread_alerts,
            out.lots_tested,
            out.alerts_per_1000_lots(),
            out.outliers,
            out.gross
        );
        assert!(ok, "{name}: {} alerts > {limit:.1}", out.alerts);
    }
}

#[test]
fn a_doubled_spread_is_caught() {
    // Unit sd doubled from the first lot after the baseline (normal units, between-lot sd 0.5,
    // 20 units per lot): the spread test catches most series within 10 lots (measured 87 % with
    // 100 series; Monte Carlo tolerance: at least 75 %).
    let mut s = Scenario::normal(100, 20, 20, 0.5, 0.0, 90);
    s.spread_factor = 2.0;
    let out = run(&s, &default_monitor());
    let within = out
        .spread_delays
        .iter()
        .filter(|d| d.is_some_and(|d| d <= 10))
        .count();
    println!("doubled spread: {within} of 100 series alerted within 10 lots");
    assert!(within >= 75, "{within}");
}

#[test]
fn gross_outliers_are_reported_not_alerted() {
    let monitor = default_monitor();
    let out = run(
        &field_scenario("gross outliers (0.2 %)", 0.0, 150, 70),
        &monitor,
    );
    // Every gross outlier is 5 to 10 unit sd off; the normal fence is about 4.6 robust sd from
    // the lot median, so most are found (those within a lot whose median sits on their side
    // may not be); and reported outliers are mostly the gross ones (normal units cross the
    // fence at about 2e-4 per lot).
    let found = out.outliers as f64 / out.gross as f64;
    println!("{} of {} gross outliers reported", out.outliers, out.gross);
    assert!(found > 0.6 && found < 1.05, "{found}");
    // Without screening the same data break the budget by far (the spread test sees them).
    let mut off = default_monitor();
    off.outliers = false;
    let raw = run(
        &field_scenario("gross outliers (0.2 %)", 0.0, 150, 70),
        &off,
    );
    println!(
        "screening off: {} alerts ({} spread)",
        raw.alerts, raw.spread_alerts
    );
    assert!(raw.alerts > out.alerts, "{} <= {}", raw.alerts, out.alerts);
}

#[test]
fn shifts_in_field_like_units_are_caught_as_one_alert_that_resolves() {
    let monitor = default_monitor();
    for (i, name) in FIELD.iter().enumerate() {
        let mut previous = usize::MAX;
        for (j, shift) in [1.0, 1.5, 2.0].into_iter().enumerate() {
            let mut s = field_scenario(name, shift, 60, 80 + 10 * i as u64 + j as u64);
            s.shift_lots = Some(40);
            let out = run(&s, &monitor);
            let median = out.median_delay().expect("most series alert");
            let openings = out.openings_per_alerted_series();
            let resolved = out.resolved_within(10);
            println!(
                "{name}, shift {shift} unit sd: median {median} lots to the alert, {:.0} % \
                 within 10; {openings:.2} alerts per alerted series; {:.0} % resolved within \
                 10 lots of the end",
                100.0 * out.detected_within(10),
                100.0 * resolved
            );
            assert!(median <= previous, "{name} {shift}: {median} > {previous}");
            assert!(out.detected_within(40) >= 0.9, "{name} {shift}");
            assert!(openings <= 1.2, "{name} {shift}: {openings}");
            // Monte Carlo tolerance: 100 series; at least 85 % resolve within 10 lots.
            assert!(resolved >= 0.85, "{name} {shift}: {resolved}");
            previous = median;
        }
        assert!(
            previous <= 5,
            "{name}: a 2 unit-sd shift within about five lots"
        );
    }
}
