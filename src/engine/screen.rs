//! Outlier screening of a lot's units against the fence learned from the baseline.
//!
//! A unit is an outlier when it lies farther from its lot's median than the baseline's fence
//! (`stats::robust::outlier_fence`, in robust within-lot sds). Outliers are reported and set
//! aside from the lot's mean and spread tests, unless more than a tenth of the lot crosses
//! the fence: then the lot's shape has changed, nothing is set aside, and the spread test sees
//! every unit. The same rule screens the baseline lots when a baseline is frozen, so a lot and
//! its baseline are always compared on the same footing. Stored values are never altered.
//!
//! **Scale.** A characteristic whose baseline values are all positive and whose within-lot
//! residuals are clearly right-skewed (quartile skewness above [`SKEWED`]) and less skewed
//! after taking logarithms is tested on the log scale: every lot's units are screened and
//! summarised as ln(value) (a leakage current, a particle count). On such a series a unit ≤ 0
//! has no logarithm; it is reported as an outlier and set aside.

use crate::stats::Summary;
use crate::stats::robust::{OutlierFence, median, outlier_fence, quartile_skewness};
use crate::store::NewOutlier;

/// Lots with fewer units are not screened (their median says little).
pub const MIN_UNITS: usize = 5;

/// A lot's units after screening.
#[derive(Debug, Clone)]
pub struct Screened {
    /// Summary of the units kept.
    pub summary: Summary,
    pub kept: Vec<f64>,
    pub outliers: Vec<NewOutlier>,
    /// What screening did, for the evaluation's note (None: nothing crossed the fence).
    pub note: Option<String>,
}

/// The most units of a lot of `n` that are set aside: a tenth, at least one.
pub fn max_set_aside(n: usize) -> usize {
    (n / 10).max(1)
}

/// Quartile skewness of the baseline's residuals above which, with all values positive and
/// logarithms reducing it, the series is tested on the log scale (our choice: a normal sample
/// of 400 residuals exceeds it with probability about 0.1; for a positive characteristic with
/// a small coefficient of variation the logarithm is nearly linear, so a needless choice of
/// the log scale changes little).
pub const SKEWED: f64 = 0.1;

/// The residuals about their lot medians of lots of at least [`MIN_UNITS`] units, on the
/// natural or the log scale.
fn residuals(lots: &[&[(i64, f64)]], log: bool) -> Vec<f64> {
    let mut out = Vec::new();
    for lot in lots.iter().filter(|l| l.len() >= MIN_UNITS) {
        let values: Vec<f64> = lot
            .iter()
            .map(|u| if log { u.1.ln() } else { u.1 })
            .collect();
        if let Ok(med) = median(&values) {
            out.extend(values.iter().map(|v| v - med));
        }
    }
    out
}

/// Whether a series is tested on the log scale (see the module doc), from its baseline lots.
pub fn choose_log_scale(lots: &[&[(i64, f64)]]) -> bool {
    if lots.iter().any(|l| l.iter().any(|u| u.1 <= 0.0)) {
        return false;
    }
    let (Ok(raw), Ok(log)) = (
        quartile_skewness(&residuals(lots, false)),
        quartile_skewness(&residuals(lots, true)),
    ) else {
        return false;
    };
    raw > SKEWED && log.abs() < raw
}

/// Learns the fence from baseline lots' units (on the series' scale), for a per-lot rate
/// `per_lot` of outlier findings in in-control lots. None when the lots are too small or too
/// few, or more than half of the residuals are zero (a gauge too coarse for a robust scale).
pub fn learn_fence(lots: &[&[(i64, f64)]], per_lot: f64, log: bool) -> Option<OutlierFence> {
    let sizes: Vec<f64> = lots
        .iter()
        .filter(|l| l.len() >= MIN_UNITS)
        .map(|l| l.len() as f64)
        .collect();
    let typical = median(&sizes).ok()?;
    outlier_fence(&residuals(lots, log), per_lot / typical).ok()
}

/// Screens one lot (on the log scale when `log`). Without a fence (or with too few units)
/// every unit is kept. None when no unit is left to test.
pub fn screen(
    sample_id: i64,
    units: &[(i64, f64)],
    fence: Option<&OutlierFence>,
    log: bool,
) -> Option<Screened> {
    if !log {
        return Some(screen_on_scale(sample_id, units, fence, None));
    }
    let (positive, other): (Vec<_>, Vec<_>) = units.iter().copied().partition(|u| u.1 > 0.0);
    let logged: Vec<(i64, f64)> = positive.iter().map(|u| (u.0, u.1.ln())).collect();
    if logged.is_empty() {
        return None;
    }
    let mut s = screen_on_scale(sample_id, &logged, fence, Some(&positive));
    if !other.is_empty() {
        let med = median(&logged.iter().map(|u| u.1).collect::<Vec<_>>())
            .ok()?
            .exp();
        for u in &other {
            s.outliers.push(NewOutlier {
                sample_id,
                seq: u.0,
                value: u.1,
                lot_median: med,
                distance: 0.0,
                fence: fence.map_or(0.0, |f| f.fence),
                rule: "non-positive-on-log-scale",
                set_aside: true,
            });
        }
        let note = format!(
            "{} unit(s) ≤ 0 on a log-scale series set aside as outliers",
            other.len()
        );
        s.note = Some(match s.note.take() {
            Some(n) => format!("{n}; {note}"),
            None => note,
        });
    }
    Some(s)
}

/// Screens units already on the series' scale; `raw` holds the units' stored values when the
/// scale is logarithmic (outliers are reported with their stored values).
fn screen_on_scale(
    sample_id: i64,
    units: &[(i64, f64)],
    fence: Option<&OutlierFence>,
    raw: Option<&[(i64, f64)]>,
) -> Screened {
    let values: Vec<f64> = units.iter().map(|u| u.1).collect();
    let stored = |i: usize| raw.map_or(values[i], |r| r[i].1);
    let back = |v: f64| if raw.is_some() { v.exp() } else { v };
    let all = |note| Screened {
        summary: Summary::from_slice(&values).expect("stored values are finite"),
        kept: values.clone(),
        outliers: Vec::new(),
        note,
    };
    let Some(fence) = fence.filter(|_| units.len() >= MIN_UNITS) else {
        return all(None);
    };
    let med = median(&values).expect("stored values are finite");
    let far: Vec<usize> = (0..units.len())
        .filter(|&i| (values[i] - med).abs() > fence.fence * fence.scale)
        .collect();
    if far.is_empty() {
        return all(None);
    }
    if far.len() > max_set_aside(units.len()) {
        return all(Some(format!(
            "{} of {} units lie beyond the outlier fence ({:.2} robust sd from the lot \
             median): more than a tenth of the lot, so none was set aside",
            far.len(),
            units.len(),
            fence.fence
        )));
    }
    let rule = if fence.heavy_tailed {
        "fence-heavy-tail"
    } else {
        "fence-normal"
    };
    let outliers: Vec<NewOutlier> = far
        .iter()
        .map(|&i| NewOutlier {
            sample_id,
            seq: units[i].0,
            value: stored(i),
            lot_median: back(med),
            distance: (values[i] - med).abs() / fence.scale,
            fence: fence.fence,
            rule,
            set_aside: true,
        })
        .collect();
    let kept: Vec<f64> = (0..units.len())
        .filter(|i| !far.contains(i))
        .map(|i| values[i])
        .collect();
    let scale = if raw.is_some() { " (log scale)" } else { "" };
    let listed: Vec<String> = outliers
        .iter()
        .map(|o| format!("seq {} = {} ({:.1} robust sd)", o.seq, o.value, o.distance))
        .collect();
    Screened {
        summary: Summary::from_slice(&kept).expect("at least MIN_UNITS - 1 units kept"),
        kept,
        note: Some(format!(
            "{} unit(s) set aside as outliers, beyond {:.2} robust sd from the lot median{}: {}",
            outliers.len(),
            fence.fence,
            scale,
            listed.join(", ")
        )),
        outliers,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn units(v: &[f64]) -> Vec<(i64, f64)> {
        v.iter()
            .enumerate()
            .map(|(i, x)| (i as i64 + 1, *x))
            .collect()
    }

    const FENCE: OutlierFence = OutlierFence {
        scale: 1.0,
        fence: 4.5,
        heavy_tailed: false,
    };

    #[test]
    fn one_far_unit_is_set_aside_and_reported() {
        let mut v: Vec<f64> = (0..20).map(|i| (i as f64 - 9.5) / 5.0).collect();
        v[7] = 30.0;
        let s = screen(9, &units(&v), Some(&FENCE), false).unwrap();
        assert_eq!(s.outliers.len(), 1);
        assert_eq!(s.outliers[0].seq, 8);
        assert_eq!(s.outliers[0].value, 30.0);
        assert_eq!(s.summary.n(), 19);
        assert!(s.note.unwrap().contains("seq 8 = 30"));
    }

    #[test]
    fn many_far_units_are_a_changed_lot_not_outliers() {
        let mut v: Vec<f64> = (0..20).map(|i| (i as f64 - 9.5) / 5.0).collect();
        for x in v.iter_mut().take(4) {
            *x += 40.0;
        }
        let s = screen(9, &units(&v), Some(&FENCE), false).unwrap();
        assert!(s.outliers.is_empty());
        assert_eq!(s.summary.n(), 20);
        assert!(s.note.unwrap().contains("none was set aside"));
    }

    #[test]
    fn small_lots_and_no_fence_keep_everything() {
        let v = [1.0, 2.0, 100.0];
        assert_eq!(
            screen(1, &units(&v), Some(&FENCE), false)
                .unwrap()
                .summary
                .n(),
            3
        );
        assert_eq!(
            screen(1, &units(&[1.0; 8]), None, false)
                .unwrap()
                .outliers
                .len(),
            0
        );
    }

    fn refs(v: &[Vec<(i64, f64)>]) -> Vec<&[(i64, f64)]> {
        v.iter().map(Vec::as_slice).collect()
    }

    #[test]
    fn log_scale_for_positive_right_skewed_baselines_only() {
        // Residual patterns: exp of normal scores (log-normal, skewed) and normal scores.
        let scores: Vec<f64> = (1..=20)
            .map(|i| crate::stats::dist::normal_quantile((i as f64 - 0.5) / 20.0).unwrap())
            .collect();
        let skewed: Vec<Vec<(i64, f64)>> = (0..10)
            .map(|l| {
                units(
                    &scores
                        .iter()
                        .map(|z| (1.0 + 0.1 * l as f64) * z.exp())
                        .collect::<Vec<_>>(),
                )
            })
            .collect();
        let normal: Vec<Vec<(i64, f64)>> = (0..10)
            .map(|l| {
                units(
                    &scores
                        .iter()
                        .map(|z| 10.0 + l as f64 + z)
                        .collect::<Vec<_>>(),
                )
            })
            .collect();
        assert!(choose_log_scale(&refs(&skewed)));
        assert!(!choose_log_scale(&refs(&normal)));
        // A value <= 0 rules the log scale out.
        let mut with_zero = skewed.clone();
        with_zero[3][4].1 = 0.0;
        assert!(!choose_log_scale(&refs(&with_zero)));
    }

    #[test]
    fn on_the_log_scale_non_positive_units_are_set_aside() {
        let mut v: Vec<f64> = (1..=20).map(|i| i as f64).collect();
        v[3] = -1.0;
        let s = screen(5, &units(&v), Some(&FENCE), true).unwrap();
        assert_eq!(s.summary.n(), 19);
        assert_eq!(s.outliers.len(), 1);
        assert_eq!(s.outliers[0].value, -1.0);
        assert_eq!(s.outliers[0].rule, "non-positive-on-log-scale");
        assert!(
            (s.summary.mean()
                - (2..=20)
                    .filter(|&i| i != 4)
                    .map(|i| (i as f64).ln())
                    .sum::<f64>()
                    / 19.0
                - 0.0)
                .abs()
                < 1.0
        );
    }
}
