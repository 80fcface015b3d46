//! Operating characteristics of the default monitoring policy, by simulation with fixed seeds
//! and real between-lot variation (between-lot sd 0.5 of the unit sd, 30 units per lot).
//!
//! Checks: under no shift the false-alert rate stays within the budget (default: one false
//! alert per 500 lots per series = 2 per 1,000 lots; Monte Carlo tolerance: the observed count
//! may exceed the budget's expected count by 3 Poisson standard deviations); shifts of 1, 1.5
//! and 2 sd of a lot mean are caught, the larger sooner; a unit-level Welch comparison of the
//! same data (the first engine's rule) is shown to fail the budget, so the check can fail.

use lotdrift::engine::operating::{Scenario, default_monitor, run};

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
