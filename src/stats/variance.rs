//! Tests of equal variances: the F test of two variances, Levene's test with
//! mean or median centring for k ≥ 2 groups, and the Brown–Forsythe test
//! (median-centred Levene for two samples).
//!
//! Owns [`Center`], [`FTestResult`], [`LeveneResult`] and the test functions.
//! Pure computation, no I/O.

use super::StatsError;
use super::dist::FDist;
use super::summary::Summary;
use super::ttest::Alternative;

/// Centre from which Levene's absolute deviations are taken.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Center {
    /// Group means (Levene 1960).
    Mean,
    /// Group medians (Brown & Forsythe 1974); robust to skewed data.
    Median,
}

/// Result of the F test of two variances.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FTestResult {
    /// F = var(a) / var(b).
    pub statistic: f64,
    /// Numerator degrees of freedom, n_a − 1.
    pub df1: f64,
    /// Denominator degrees of freedom, n_b − 1.
    pub df2: f64,
    /// p-value for the alternative; two-sided is twice the smaller tail, capped at 1.
    pub p_value: f64,
    /// Estimated variance ratio var(a) / var(b) (equals the statistic).
    pub estimate: f64,
    /// Confidence interval of the variance ratio (one-sided alternatives give
    /// `(0, high)` or `(low, +inf)`).
    pub ci: Option<(f64, f64)>,
}

/// Result of Levene's / the Brown–Forsythe test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LeveneResult {
    /// Levene's W (the one-way ANOVA F of the absolute deviations).
    pub statistic: f64,
    /// k − 1.
    pub df1: f64,
    /// N − k.
    pub df2: f64,
    /// Upper-tail p-value of W under F(df1, df2).
    pub p_value: f64,
    /// For two groups: mean absolute deviation of group a minus that of
    /// group b (from the chosen centres); `None` for k > 2.
    pub estimate: Option<f64>,
    /// No standard interval exists for this test: always `None`.
    pub ci: Option<(f64, f64)>,
}

fn check_conf(conf_level: f64) -> Result<(), StatsError> {
    if conf_level > 0.0 && conf_level < 1.0 {
        Ok(())
    } else {
        Err(StatsError::InvalidParameter {
            name: "conf_level",
            value: conf_level,
        })
    }
}

/// F test of var(a) = var(b) from summaries (each needs n ≥ 2).
///
/// A zero variance in b makes the ratio infinite: [`StatsError::ZeroVariance`].
pub fn f_test(
    a: &Summary,
    b: &Summary,
    alternative: Alternative,
    conf_level: f64,
) -> Result<FTestResult, StatsError> {
    check_conf(conf_level)?;
    let (Some(va), Some(vb)) = (a.variance(), b.variance()) else {
        return Err(StatsError::TooFewValues {
            needed: 2,
            got: usize::try_from(a.n().min(b.n())).unwrap_or(usize::MAX),
        });
    };
    if vb == 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    let f = va / vb;
    if !f.is_finite() {
        return Err(StatsError::NonFinite);
    }
    let df1 = (a.n() - 1) as f64;
    let df2 = (b.n() - 1) as f64;
    let dist = FDist::new(df1, df2);
    let (cdf, sf) = dist.cdf_sf(f)?;
    let p_value = match alternative {
        Alternative::TwoSided => (2.0 * cdf.min(sf)).min(1.0),
        Alternative::Less => cdf,
        Alternative::Greater => sf,
    };
    let alpha = 1.0 - conf_level;
    let ci = match alternative {
        Alternative::TwoSided => (f / dist.isf(0.5 * alpha)?, f / dist.quantile(0.5 * alpha)?),
        Alternative::Less => (0.0, f / dist.quantile(alpha)?),
        Alternative::Greater => (f / dist.isf(alpha)?, f64::INFINITY),
    };
    Ok(FTestResult {
        statistic: f,
        df1,
        df2,
        p_value: p_value.clamp(0.0, 1.0),
        estimate: f,
        ci: Some(ci),
    })
}

/// F test on raw samples (see [`f_test`]).
pub fn f_test_samples(
    a: &[f64],
    b: &[f64],
    alternative: Alternative,
    conf_level: f64,
) -> Result<FTestResult, StatsError> {
    f_test(
        &Summary::from_slice(a)?,
        &Summary::from_slice(b)?,
        alternative,
        conf_level,
    )
}

/// Median of a non-empty slice of finite values (mean of the middle two for
/// even length) as an unevaluated sum hi + lo (exact for the mean of the two middle
/// values up to the rounding of their half-difference).
fn median_parts(xs: &[f64]) -> (f64, f64) {
    let mut v = xs.to_vec();
    let n = v.len();
    let mid = n / 2;
    let (_, &mut upper, _) = v.select_nth_unstable_by(mid, f64::total_cmp);
    if n % 2 == 1 {
        (upper, 0.0)
    } else {
        let lower = v[..mid].iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let half = 0.5 * (upper - lower);
        // Knuth's two-sum of lower + half.
        let hi = lower + half;
        let bb = hi - lower;
        let lo = (lower - (hi - bb)) + (half - bb);
        (hi, lo)
    }
}

/// Neumaier-compensated sum.
fn accurate_sum(xs: impl Iterator<Item = f64>) -> f64 {
    let mut sum = 0.0_f64;
    let mut comp = 0.0_f64;
    for x in xs {
        let t = sum + x;
        if sum.abs() >= x.abs() {
            comp += (sum - t) + x;
        } else {
            comp += (x - t) + sum;
        }
        sum = t;
    }
    sum + comp
}

/// Levene's test of equal variances across k ≥ 2 groups.
///
/// Every group must be non-empty and the total size N must exceed k. A zero
/// within-group spread of the absolute deviations gives
/// [`StatsError::ZeroVariance`].
pub fn levene(groups: &[&[f64]], center: Center) -> Result<LeveneResult, StatsError> {
    let k = groups.len();
    if k < 2 {
        return Err(StatsError::TooFewValues { needed: 2, got: k });
    }
    let mut total = 0usize;
    for g in groups {
        if g.is_empty() {
            return Err(StatsError::EmptySample);
        }
        if g.iter().any(|x| !x.is_finite()) {
            return Err(StatsError::NonFinite);
        }
        total += g.len();
    }
    if total <= k {
        return Err(StatsError::TooFewValues {
            needed: k + 1,
            got: total,
        });
    }
    // Absolute deviations from each group's centre.
    let devs: Vec<Vec<f64>> = groups
        .iter()
        .map(|g| {
            // The centre as an unevaluated sum hi + lo: for data with a large
            // offset (1e7 ± 1e-3) the rounding of the mean to one f64 would
            // otherwise shift every deviation by up to half an ulp of 1e7.
            let (hi, lo) = match center {
                Center::Mean => {
                    let hi = Summary::from_slice(g)?.mean();
                    let resid = accurate_sum(g.iter().map(|&x| x - hi)) / g.len() as f64;
                    (hi, resid)
                }
                Center::Median => median_parts(g),
            };
            let d: Vec<f64> = g.iter().map(|&x| ((x - hi) - lo).abs()).collect();
            if d.iter().all(|v| v.is_finite()) {
                Ok(d)
            } else {
                Err(StatsError::NonFinite)
            }
        })
        .collect::<Result<_, _>>()?;
    let means: Vec<f64> = devs
        .iter()
        .map(|d| accurate_sum(d.iter().copied()) / d.len() as f64)
        .collect();
    let nf = total as f64;
    let grand = accurate_sum(devs.iter().zip(&means).map(|(d, m)| d.len() as f64 * m)) / nf;
    let between = accurate_sum(devs.iter().zip(&means).map(|(d, m)| {
        let e = m - grand;
        d.len() as f64 * e * e
    }));
    let within = accurate_sum(devs.iter().zip(&means).flat_map(|(d, &m)| {
        d.iter().map(move |&z| {
            let e = z - m;
            e * e
        })
    }));
    if within == 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    let df1 = (k - 1) as f64;
    let df2 = (total - k) as f64;
    let w = (between / df1) / (within / df2);
    if !w.is_finite() {
        return Err(StatsError::NonFinite);
    }
    let (_, p) = FDist::new(df1, df2).cdf_sf(w)?;
    Ok(LeveneResult {
        statistic: w,
        df1,
        df2,
        p_value: p.clamp(0.0, 1.0),
        estimate: if k == 2 {
            Some(means[0] - means[1])
        } else {
            None
        },
        ci: None,
    })
}

/// Brown–Forsythe test for two samples: median-centred Levene, df [1, N − 2];
/// the estimate is the difference of the mean absolute deviations from the
/// group medians, a − b.
pub fn brown_forsythe(a: &[f64], b: &[f64]) -> Result<LeveneResult, StatsError> {
    levene(&[a, b], Center::Median)
}
