//! Outlier screening of a lot's units against the fence learned from the baseline.
//!
//! A unit is an outlier when it lies farther from its lot's median than the baseline's fence
//! (`stats::robust::outlier_fence`, in robust within-lot sds). Outliers are reported and set
//! aside from the lot's mean and spread tests, unless more than a tenth of the lot crosses
//! the fence: then the lot's shape has changed, nothing is set aside, and the spread test sees
//! every unit. The same rule screens the baseline lots when a baseline is frozen, so a lot and
//! its baseline are always compared on the same footing. Stored values are never altered.

use crate::stats::Summary;
use crate::stats::robust::{OutlierFence, median, outlier_fence};
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

/// Learns the fence from baseline lots' units, for a per-lot rate `per_lot` of outlier
/// findings in in-control lots. None when the lots are too small or too few, or more than
/// half of the residuals are zero (a gauge too coarse for a robust scale).
pub fn learn_fence(lots: &[&[(i64, f64)]], per_lot: f64) -> Option<OutlierFence> {
    let mut residuals = Vec::new();
    let mut sizes = Vec::new();
    for lot in lots.iter().filter(|l| l.len() >= MIN_UNITS) {
        let values: Vec<f64> = lot.iter().map(|u| u.1).collect();
        let med = median(&values).ok()?;
        residuals.extend(values.iter().map(|v| v - med));
        sizes.push(values.len() as f64);
    }
    if sizes.is_empty() {
        return None;
    }
    let typical = median(&sizes).ok()?;
    outlier_fence(&residuals, per_lot / typical).ok()
}

/// Screens one lot. Without a fence (or with too few units) every unit is kept.
pub fn screen(sample_id: i64, units: &[(i64, f64)], fence: Option<&OutlierFence>) -> Screened {
    let values: Vec<f64> = units.iter().map(|u| u.1).collect();
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
            value: values[i],
            lot_median: med,
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
    let listed: Vec<String> = outliers
        .iter()
        .map(|o| format!("seq {} = {} ({:.1} robust sd)", o.seq, o.value, o.distance))
        .collect();
    Screened {
        summary: Summary::from_slice(&kept).expect("at least MIN_UNITS - 1 units kept"),
        kept,
        note: Some(format!(
            "{} unit(s) set aside as outliers, beyond {:.2} robust sd from the lot median: {}",
            outliers.len(),
            fence.fence,
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
        let s = screen(9, &units(&v), Some(&FENCE));
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
        let s = screen(9, &units(&v), Some(&FENCE));
        assert!(s.outliers.is_empty());
        assert_eq!(s.summary.n(), 20);
        assert!(s.note.unwrap().contains("none was set aside"));
    }

    #[test]
    fn small_lots_and_no_fence_keep_everything() {
        let v = [1.0, 2.0, 100.0];
        assert_eq!(screen(1, &units(&v), Some(&FENCE)).summary.n(), 3);
        assert_eq!(screen(1, &units(&[1.0; 8]), None).outliers.len(), 0);
    }
}
