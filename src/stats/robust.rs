//! Robust location and scale, tail-index estimation, the outlier fence of a baseline and the
//! lot spread statistic. Pure functions of slices; no I/O.
//!
//! Methods and their sources:
//! - median absolute deviation, scaled by 1/Φ⁻¹(3/4) = 1.4826 to estimate a normal sd
//!   (Hampel 1974; `scipy.stats.median_abs_deviation(scale="normal")`);
//! - Hill's (1975) estimator of the extreme-value index from the k largest order statistics,
//!   and Weissman's (1978) extrapolated quantile `x_(k+1) (k / (N p))^γ`;
//! - the lot spread statistic ln D, D the mean absolute deviation from the lot median: the
//!   logarithm of a scale estimate is close to normal (Bartlett & Kendall 1946), and D is far
//!   less moved by one extreme unit than s². For units with normal-looking tails (pooled excess
//!   kurtosis within ±0.5) and lots whose spreads vary no more than sampling explains (a
//!   preliminary χ² test at 0.25, the "sometimes pool" rule of Bozivich, Bancroft & Hartley
//!   1956), ln D of a lot of n is compared by a z test with its normal-theory sampling variance
//!   (π/2 − 1)/(n − 1) (the asymptotic variance of the mean absolute deviation, Var D / (E D)²
//!   = (π/2 − 1)/n, with n − 1 for small lots); otherwise with the baseline lots' own spread of
//!   ln D by a prediction interval for one future observation, `x̄ ± t(m−1) s √(1 + 1/m)`
//!   (Hahn & Meeker, *Statistical Intervals*, 1991, sect. 4.7), which assumes nothing about
//!   the units' tails.

use super::StatsError;
use super::dist::{f_sf, normal_sf, t_isf, t_sf};

/// 1 / Φ⁻¹(3/4): makes the median absolute deviation a consistent estimate of a normal sd.
pub const MAD_NORMAL: f64 = 1.482_602_218_505_602;

fn check(xs: &[f64]) -> Result<(), StatsError> {
    if xs.is_empty() {
        return Err(StatsError::EmptySample);
    }
    if xs.iter().any(|x| !x.is_finite()) {
        return Err(StatsError::NonFinite);
    }
    Ok(())
}

/// The median (mean of the two middle values for an even count).
pub fn median(xs: &[f64]) -> Result<f64, StatsError> {
    check(xs)?;
    let mut v = xs.to_vec();
    Ok(median_in_place(&mut v))
}

/// The median of finite values, reordering `v` (not empty).
fn median_in_place(v: &mut [f64]) -> f64 {
    let n = v.len();
    let mid = n / 2;
    let (_, upper, _) = v.select_nth_unstable_by(mid, f64::total_cmp);
    let upper = *upper;
    if n % 2 == 1 {
        upper
    } else {
        let lower = v[..mid].iter().copied().fold(f64::NEG_INFINITY, f64::max);
        0.5 * (lower + upper)
    }
}

/// The median absolute deviation from `center`, unscaled.
pub fn mad(xs: &[f64], center: f64) -> Result<f64, StatsError> {
    check(xs)?;
    let mut d: Vec<f64> = xs.iter().map(|x| (x - center).abs()).collect();
    Ok(median_in_place(&mut d))
}

/// The p-quantile of a sample by linear interpolation between order statistics (Hyndman &
/// Fan 1996, definition 7; numpy's and R's default).
pub fn quantile(xs: &[f64], p: f64) -> Result<f64, StatsError> {
    check(xs)?;
    if !(0.0..=1.0).contains(&p) {
        return Err(StatsError::InvalidParameter {
            name: "p",
            value: p,
        });
    }
    let mut v = xs.to_vec();
    v.sort_unstable_by(f64::total_cmp);
    let h = (v.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(v.len() - 1);
    Ok(v[lo] + (h - lo as f64) * (v[hi] - v[lo]))
}

/// Quartile (Bowley's) skewness (Q3 + Q1 − 2 Q2) / (Q3 − Q1), from quartiles of
/// [`quantile`]: 0 for a symmetric sample, in [−1, 1].
pub fn quartile_skewness(xs: &[f64]) -> Result<f64, StatsError> {
    let q1 = quantile(xs, 0.25)?;
    let q2 = quantile(xs, 0.5)?;
    let q3 = quantile(xs, 0.75)?;
    if q3 <= q1 {
        return Err(StatsError::ZeroVariance);
    }
    Ok((q3 + q1 - 2.0 * q2) / (q3 - q1))
}

/// The mean absolute deviation from the median: a scale measure that is less sensitive to the
/// tails than the variance (its logarithm is the lot spread statistic).
pub fn mean_abs_dev_from_median(xs: &[f64]) -> Result<f64, StatsError> {
    let m = median(xs)?;
    Ok(xs.iter().map(|x| (x - m).abs()).sum::<f64>() / xs.len() as f64)
}

/// Hill's estimator of the extreme-value index γ from the `k` largest of `xs` (all > 0 among
/// the k + 1 largest): mean of ln x_(i) − ln x_(k+1), i = 1..k.
pub fn hill(xs: &[f64], k: usize) -> Result<f64, StatsError> {
    check(xs)?;
    if k == 0 || k >= xs.len() {
        return Err(StatsError::TooFewValues {
            needed: k + 1,
            got: xs.len(),
        });
    }
    let mut v = xs.to_vec();
    v.sort_unstable_by(|a, b| b.total_cmp(a));
    let threshold = v[k];
    if threshold <= 0.0 {
        return Err(StatsError::InvalidParameter {
            name: "x_(k+1)",
            value: threshold,
        });
    }
    let ln_t = threshold.ln();
    Ok(v[..k].iter().map(|x| x.ln() - ln_t).sum::<f64>() / k as f64)
}

/// Weissman's extrapolated quantile exceeded with probability `p` (per value): from the
/// (k+1)-th largest of N values and a tail index γ.
pub fn weissman_quantile(x_k1: f64, gamma: f64, k: usize, n: usize, p: f64) -> f64 {
    x_k1 * (k as f64 / (n as f64 * p)).powf(gamma)
}

/// How units far from their lot's median are recognised as outliers, learned from a baseline.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OutlierFence {
    /// Robust within-lot sd: 1.4826 × the median absolute residual from the lot medians.
    pub scale: f64,
    /// A unit is an outlier when |value − lot median| > fence × scale.
    pub fence: f64,
    /// The baseline has more far units than a normal sample (see [`outlier_fence`]); the fence
    /// was extrapolated from its own tail.
    pub heavy_tailed: bool,
}

/// Share of baseline units beyond 3 robust sd above which the baseline counts as heavy-tailed
/// (a normal sample has 0.27 %; our choice, allowing a few gross outliers).
const HEAVY_SHARE: f64 = 0.01;

/// Asymptotic efficiency of the MAD at the normal (Hampel et al. 1986): its variance equals
/// that of a sample sd from 0.37 N values.
const MAD_EFFICIENCY: f64 = 0.37;

/// The outlier fence of a baseline from its units' residuals about their lot medians, so that
/// a unit of an in-control lot crosses it with probability at most `per_unit` (two-sided).
///
/// The normal fence is the Student t quantile t(1 − per_unit / 2) with 0.37 N df, in robust
/// sd: a prediction-type fence for a scale estimated from N residuals by the MAD, whose
/// asymptotic efficiency at the normal is 0.37 (Hampel et al. 1986, *Robust Statistics*),
/// so its noise does not double the rate of findings. When more than 1 % of the baseline's
/// units (and at least 3) lie beyond 3 robust sd, or more than 3 % (and at least 5) beyond
/// 2.5 robust sd (a normal sample has 0.27 % and 1.24 %), its tails are heavier than normal
/// and the fence is the larger of the normal fence and Weissman's extrapolation with Hill's index
/// from the top 5 % (at least 10) of the absolute residuals.
pub fn outlier_fence(residuals: &[f64], per_unit: f64) -> Result<OutlierFence, StatsError> {
    check(residuals)?;
    if !(per_unit > 0.0 && per_unit < 0.5) {
        return Err(StatsError::InvalidParameter {
            name: "per_unit",
            value: per_unit,
        });
    }
    let n = residuals.len();
    if n < 20 {
        return Err(StatsError::TooFewValues { needed: 20, got: n });
    }
    let scale = MAD_NORMAL * mad(residuals, 0.0)?;
    if scale <= 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    let z: Vec<f64> = residuals.iter().map(|r| r.abs() / scale).collect();
    let normal = t_isf(per_unit / 2.0, MAD_EFFICIENCY * n as f64)?;
    let far = z.iter().filter(|&&v| v > 3.0).count();
    let near = z.iter().filter(|&&v| v > 2.5).count();
    let heavy_tailed = (far >= 3 && far as f64 > HEAVY_SHARE * n as f64)
        || (near >= 5 && near as f64 > 0.03 * n as f64);
    let mut fence = normal;
    if heavy_tailed {
        let k = (n / 20).max(10).min(n - 1);
        let gamma = hill(&z, k)?;
        let mut sorted = z.clone();
        sorted.sort_unstable_by(|a, b| b.total_cmp(a));
        fence = fence.max(weissman_quantile(sorted[k], gamma, k, n, per_unit));
    }
    Ok(OutlierFence {
        scale,
        fence,
        heavy_tailed,
    })
}

/// The baseline distribution of the lot spread statistic ln D: its mean and sd over the
/// baseline lots, their count, the median lot size they came from, and the units' excess
/// kurtosis when the pooled z test applies (normal-looking tails, lots varying no more than
/// sampling explains); None: the prediction t test on the lots' own spread.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SpreadBaseline {
    pub mean: f64,
    pub sd: f64,
    pub lots: usize,
    pub n: f64,
    pub kurtosis: Option<f64>,
}

/// The preliminary test's level for pooling (Bozivich, Bancroft & Hartley 1956 recommend
/// 0.25 so that a real between-lot component is rarely pooled away).
const POOL_P: f64 = 0.25;

/// Largest |excess kurtosis| of the baseline's units for which the pooled z test is used.
const NORMAL_TAILS: f64 = 0.5;

/// Normal-theory sampling variance of ln D for a lot of n units: (π/2 − 1)/(n − 1).
pub fn spread_sampling_var(n: f64) -> f64 {
    (std::f64::consts::FRAC_PI_2 - 1.0) / (n - 1.0).max(1.0)
}

/// Pooled excess kurtosis of units about their lot means: N Σ m4 / (Σ m2)² − 3, from each
/// lot's sums of 2nd and 4th powers of deviations and the unit count N.
pub fn pooled_excess_kurtosis(lots: &[&[f64]]) -> Result<f64, StatsError> {
    let (mut m2, mut m4, mut n) = (0.0, 0.0, 0usize);
    for lot in lots.iter().filter(|l| l.len() >= 2) {
        check(lot)?;
        let mean = lot.iter().sum::<f64>() / lot.len() as f64;
        for x in lot.iter() {
            let d2 = (x - mean).powi(2);
            m2 += d2;
            m4 += d2 * d2;
        }
        n += lot.len();
    }
    if m2 <= 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    Ok(n as f64 * m4 / (m2 * m2) - 3.0)
}

/// One lot's spread against the baseline lots' spreads.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SpreadTest {
    /// z (pooled) or prediction t statistic of the lot's ln s².
    pub statistic: f64,
    /// Infinite for the pooled z test.
    pub df: f64,
    /// One-sided (an increase) p-value.
    pub p_value: f64,
    /// The lot's spread over the baseline's typical spread.
    pub ratio: f64,
}

/// The spread statistic of a lot: ln D (mean absolute deviation from the median), with D
/// floored at `floor` (a coarse gauge can give a lot with every unit equal).
pub fn spread_statistic(xs: &[f64], floor: f64) -> Result<f64, StatsError> {
    if xs.len() < 2 {
        return Err(StatsError::TooFewValues {
            needed: 2,
            got: xs.len(),
        });
    }
    Ok(mean_abs_dev_from_median(xs)?.max(floor).ln())
}

impl SpreadBaseline {
    /// From the spread statistics of the baseline lots, their sizes (at least 5 lots) and the
    /// units' pooled excess kurtosis (None: always the lots' own spread).
    pub fn new(
        stats: &[f64],
        sizes: &[f64],
        kurtosis: Option<f64>,
    ) -> Result<SpreadBaseline, StatsError> {
        check(stats)?;
        let m = stats.len();
        if m < 5 || sizes.len() != m {
            return Err(StatsError::TooFewValues { needed: 5, got: m });
        }
        let mean = stats.iter().sum::<f64>() / m as f64;
        let var = stats.iter().map(|s| (s - mean).powi(2)).sum::<f64>() / (m - 1) as f64;
        if var <= 0.0 {
            return Err(StatsError::ZeroVariance);
        }
        let n = median(sizes)?;
        // Pool when the χ² test of (m − 1) s² / v against m − 1 df does not show lot-to-lot
        // variation of the spread (χ²/k is F(k, ∞); a large df2 stands for infinity).
        let kurtosis = kurtosis.filter(|&g| {
            g.abs() <= NORMAL_TAILS
                && f_sf(var / spread_sampling_var(n), (m - 1) as f64, 1e9).is_ok_and(|p| p > POOL_P)
        });
        Ok(SpreadBaseline {
            mean,
            sd: var.sqrt(),
            lots: m,
            n,
            kurtosis,
        })
    }

    /// Tests a lot of `n` units with spread statistic `stat`: a prediction-type t test with
    /// m − 1 df; the lot's own sampling variance is scaled by (n_baseline − 1) / (n − 1).
    pub fn test(&self, stat: f64, n: usize) -> Result<SpreadTest, StatsError> {
        if !stat.is_finite() {
            return Err(StatsError::NonFinite);
        }
        if n < 2 {
            return Err(StatsError::TooFewValues { needed: 2, got: n });
        }
        let m = self.lots as f64;
        let diff = stat - self.mean;
        let (statistic, df, p) = match self.kurtosis {
            Some(_) => {
                let v = spread_sampling_var(n as f64);
                let vb = spread_sampling_var(self.n);
                // E ln D ≈ ln E D − v / 2: lots of other sizes are compared without bias.
                let z = (diff + 0.5 * (v - vb)) / (v + vb / m).sqrt();
                (z, f64::INFINITY, normal_sf(z)?)
            }
            None => {
                let own = (self.n - 1.0).max(1.0) / (n as f64 - 1.0);
                let t = diff / (self.sd * (own + 1.0 / m).sqrt());
                (t, m - 1.0, t_sf(t, m - 1.0)?)
            }
        };
        Ok(SpreadTest {
            statistic,
            df,
            p_value: p.clamp(0.0, 1.0),
            ratio: diff.exp(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::dist::normal_isf;

    #[test]
    fn median_odd_even_and_mad() {
        assert_eq!(median(&[3.0, 1.0, 2.0]).unwrap(), 2.0);
        assert_eq!(median(&[4.0, 1.0, 3.0, 2.0]).unwrap(), 2.5);
        // |x - 2| = 1, 1, 0, 2, 5 -> median 1.
        assert_eq!(mad(&[1.0, 3.0, 2.0, 4.0, 7.0], 2.0).unwrap(), 1.0);
        assert!(median(&[]).is_err());
        assert!(median(&[f64::NAN]).is_err());
    }

    #[test]
    fn hill_of_exact_pareto_quantiles_is_close_to_its_index() {
        // Expected order statistics of a Pareto tail with index gamma = 0.25 (x = u^-gamma);
        // Hill's estimator is consistent for it (common practice check).
        let n = 20_000;
        let xs: Vec<f64> = (1..=n)
            .map(|i| ((i as f64 - 0.5) / n as f64).powf(-0.25))
            .collect();
        let g = hill(&xs, 500).unwrap();
        assert!((g - 0.25).abs() < 0.01, "{g}");
    }

    #[test]
    fn normal_baseline_gets_the_normal_fence() {
        // Normal scores of 400 units: no heavy tail; the fence is t(1 - 1e-5 / 2) with 148 df
        // (z would be 4.417).
        let n = 400;
        let r: Vec<f64> = (1..=n)
            .map(|i| -normal_isf((i as f64 - 0.5) / n as f64).unwrap())
            .collect();
        let f = outlier_fence(&r, 1e-5).unwrap();
        assert!(!f.heavy_tailed);
        assert!((f.scale - 1.0).abs() < 0.02, "{}", f.scale);
        let t = t_isf(0.5e-5, 148.0).unwrap();
        assert!(t > 4.417 && t < 4.8, "{t}");
        assert!((f.fence - t).abs() < 1e-12, "{}", f.fence);
    }

    #[test]
    fn spread_test_is_a_prediction_t_test() {
        let stats = [0.0, 0.1, -0.1, 0.2, -0.2];
        let b = SpreadBaseline::new(&stats, &[20.0; 5], None).unwrap();
        // sd of the five values = sqrt(0.1 / 4) = 0.158114; se = sd * sqrt(1 + 1/5).
        let t = b.test(0.5, 20).unwrap();
        let se = 0.158_113_883 * 1.2f64.sqrt();
        assert!((t.statistic - 0.5 / se).abs() < 1e-8);
        assert_eq!(t.df, 4.0);
        assert!(t.p_value > 0.0 && t.p_value < 0.05);
    }
}
