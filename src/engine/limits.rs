//! Decision limits for charts: where the engine's own tests change their decision.
//!
//! **No second formula.** A limit is found by searching for the value at which the very
//! function the decision calls (`lot_vs_baseline` with the engine's `mean_p`, the spread
//! baseline's `test`, or the F test of old baselines) gives a p-value equal to the level. So a
//! chart can never disagree with the decision beside it, whatever the model (between-lot
//! component or not), the direction, the minimum shift or the level (budget or online FDR).
//!
//! The decision compares the *adjusted* p-value (Holm or BH over a lot's characteristics)
//! with the level; an adjusted p-value is never below the raw one, so a lot inside the limit
//! at `level` is never flagged by the lot test, and a lot beyond the limit at `level / k`
//! (k characteristics tested together) always is.

use crate::config::{CharacteristicPolicy, Direction};
use crate::stats::Summary;
use crate::stats::monitoring;
use crate::store::Design;

/// Lower and upper limit of one quantity (None: that side is not tested).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Limits {
    pub lower: Option<f64>,
    pub upper: Option<f64>,
}

/// A lot of `n` units whose mean is `x` (the tests read only n and the mean).
fn lot_at(n: u64, x: f64) -> Option<Summary> {
    Summary::from_parts(n.max(1), x, 0.0, x, x).ok()
}

/// The engine's p-value of the mean test for a lot of `n` units with mean `x` (test scale).
fn mean_p_at(design: &Design, policy: &CharacteristicPolicy, n: u64, x: f64) -> Option<f64> {
    let lot = lot_at(n, x)?;
    let (alternative, delta) = super::mean_hypothesis(policy.direction, policy.min_shift);
    let test = monitoring::lot_vs_baseline(&design.re, &lot, alternative, delta, 0.95)
        .map_err(|e| e.to_string());
    super::mean_p(design, policy, &lot, &test)
}

/// The point where `p` (decreasing as the value moves away from `start` by `dir`) falls to
/// `level`: bracketed by doubling steps of `step`, then bisected.
fn crossing(
    p: impl Fn(f64) -> Option<f64>,
    start: f64,
    dir: f64,
    step: f64,
    level: f64,
) -> Option<f64> {
    if !(level > 0.0 && level < 1.0 && step > 0.0 && step.is_finite()) {
        return None;
    }
    let (mut near, mut far) = (start, start + dir * step);
    let mut width = step;
    while p(far)? > level {
        near = far;
        width *= 2.0;
        far = start + dir * width;
        if width > step * 1e12 {
            return None;
        }
    }
    for _ in 0..200 {
        let mid = 0.5 * (near + far);
        if mid == near || mid == far {
            break;
        }
        if p(mid)? > level {
            near = mid;
        } else {
            far = mid;
        }
    }
    Some(0.5 * (near + far))
}

/// The limits of the lot-mean test for a lot of `n` units at `level`, on the scale the series
/// is tested on (ln(value) for a log-scale series: see [`to_values`]).
pub fn mean_limits(design: &Design, policy: &CharacteristicPolicy, n: u64, level: f64) -> Limits {
    let re = &design.re;
    let centre = re.mean_of_means;
    let step = (re.var_between + re.var_within / n.max(1) as f64).sqrt() + policy.min_shift;
    let p = |x: f64| mean_p_at(design, policy, n, x);
    let upper = (policy.direction != Direction::HigherIsBetter)
        .then(|| crossing(p, centre, 1.0, step, level))
        .flatten();
    let lower = (policy.direction != Direction::LowerIsBetter)
        .then(|| crossing(p, centre, -1.0, step, level))
        .flatten();
    Limits { lower, upper }
}

/// Limits on the test scale turned into values (exp for a log-scale series).
pub fn to_values(design: &Design, l: Limits) -> Limits {
    if design.log_scale {
        Limits {
            lower: l.lower.map(f64::exp),
            upper: l.upper.map(f64::exp),
        }
    } else {
        l
    }
}

/// The spread ratio (the lot's spread over the baseline's, as the spread evaluation's
/// `estimate` records it) at which the spread test of a lot of `n` units reaches `level`.
pub fn spread_limit(design: &Design, n: u64, level: f64) -> Option<f64> {
    if n < 2 {
        return None;
    }
    match &design.spread_base {
        Some(b) => {
            let p = |ln_r: f64| b.test(b.mean + ln_r, n as usize).ok().map(|t| t.p_value);
            crossing(p, 0.0, 1.0, 0.1, level).map(f64::exp)
        }
        None => {
            let re = &design.re;
            let p = |r: f64| {
                let m2 = r * re.var_within * (n - 1) as f64;
                let lot = Summary::from_parts(n, 0.0, m2, -1.0, 1.0).ok()?;
                super::spread_test(re, &lot).map(|s| s.p)
            };
            crossing(p, 1.0, 1.0, 0.5, level)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::monitoring::random_effects;

    fn design(log_scale: bool) -> Design {
        let lots: Vec<Summary> = (0..20)
            .map(|i| {
                let xs: Vec<f64> = (0..10)
                    .map(|j| 100.0 + (i % 4) as f64 * 0.3 + (j as f64 - 4.5) * 0.2)
                    .collect();
                Summary::from_slice(&xs).unwrap()
            })
            .collect();
        Design {
            re: random_effects(&lots).unwrap(),
            level_mean: 0.001,
            level_spread: 0.0003,
            cusum: None,
            normality_p: None,
            outliers: None,
            spread_base: None,
            log_scale,
            natural: None,
        }
    }

    fn policy(direction: Direction, min_shift: f64) -> CharacteristicPolicy {
        CharacteristicPolicy {
            direction,
            min_shift,
            spread: true,
            outliers: false,
            lsl: None,
            usl: None,
        }
    }

    #[test]
    fn the_engines_own_test_gives_the_level_at_the_limits() {
        let d = design(false);
        for (dir, shift) in [
            (Direction::TwoSided, 0.0),
            (Direction::TwoSided, 0.4),
            (Direction::HigherIsBetter, 0.0),
            (Direction::LowerIsBetter, 0.2),
        ] {
            let pol = policy(dir, shift);
            let l = mean_limits(&d, &pol, 10, 0.001);
            assert_eq!(l.upper.is_some(), dir != Direction::HigherIsBetter);
            assert_eq!(l.lower.is_some(), dir != Direction::LowerIsBetter);
            for x in [l.lower, l.upper].into_iter().flatten() {
                let p = mean_p_at(&d, &pol, 10, x).unwrap();
                assert!((p - 0.001).abs() < 1e-9, "{dir:?} {shift}: p {p} at {x}");
            }
        }
    }

    #[test]
    fn a_smaller_level_widens_the_limits_and_logs_are_undone() {
        let d = design(false);
        let pol = policy(Direction::TwoSided, 0.0);
        let wide = mean_limits(&d, &pol, 10, 0.0001);
        let narrow = mean_limits(&d, &pol, 10, 0.01);
        assert!(wide.upper.unwrap() > narrow.upper.unwrap());
        assert!(wide.lower.unwrap() < narrow.lower.unwrap());
        let l = to_values(&design(true), narrow);
        assert!((l.upper.unwrap() - narrow.upper.unwrap().exp()).abs() < 1e-9);
    }

    #[test]
    fn the_f_test_limit_is_its_critical_ratio() {
        let d = design(false);
        let r = spread_limit(&d, 10, 0.001).unwrap();
        let p = crate::stats::dist::f_sf(r, 9.0, d.re.df_within).unwrap();
        assert!((p - 0.001).abs() < 1e-9, "p {p} at ratio {r}");
    }
}
