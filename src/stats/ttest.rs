//! Two-sample t tests (Welch's unequal-variance test and Student's pooled test)
//! from summaries or raw samples, with a hypothesised difference, one- and
//! two-sided alternatives, the confidence interval of the difference of means
//! and Hedges' g.
//!
//! Owns [`Alternative`], [`TTestOptions`], [`TTestResult`] and the test
//! functions. Pure computation, no I/O.

use super::StatsError;
use super::dist::TDist;
use super::effect::hedges_correction;
use super::summary::Summary;
use std::fmt;
use std::str::FromStr;

/// Alternative hypothesis about `mean_a − mean_b − delta`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub enum Alternative {
    /// The difference is not `delta`.
    #[default]
    TwoSided,
    /// The difference is less than `delta`.
    Less,
    /// The difference is greater than `delta`.
    Greater,
}

impl Alternative {
    /// The alternative with the direction reversed (what it becomes when the
    /// two samples are swapped).
    pub fn reversed(self) -> Alternative {
        match self {
            Alternative::TwoSided => Alternative::TwoSided,
            Alternative::Less => Alternative::Greater,
            Alternative::Greater => Alternative::Less,
        }
    }

    /// Canonical name: `two-sided`, `less` or `greater`.
    pub fn as_str(self) -> &'static str {
        match self {
            Alternative::TwoSided => "two-sided",
            Alternative::Less => "less",
            Alternative::Greater => "greater",
        }
    }
}

impl fmt::Display for Alternative {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for Alternative {
    type Err = StatsError;

    /// Accepts `two-sided` (also `two_sided`, `twosided`), `less`, `greater`,
    /// case-insensitively.
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s.trim().to_ascii_lowercase().as_str() {
            "two-sided" | "two_sided" | "twosided" => Ok(Alternative::TwoSided),
            "less" => Ok(Alternative::Less),
            "greater" => Ok(Alternative::Greater),
            _ => Err(StatsError::UnknownMethod {
                name: s.to_string(),
                allowed: "two-sided|less|greater",
            }),
        }
    }
}

/// Options shared by the t tests.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TTestOptions {
    /// Hypothesised difference `mean_a − mean_b` under the null (default 0).
    pub delta: f64,
    /// Alternative hypothesis (default two-sided).
    pub alternative: Alternative,
    /// Confidence level of the interval, strictly between 0 and 1 (default 0.95).
    pub conf_level: f64,
}

impl Default for TTestOptions {
    fn default() -> Self {
        TTestOptions {
            delta: 0.0,
            alternative: Alternative::TwoSided,
            conf_level: 0.95,
        }
    }
}

/// Result of a two-sample t test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TTestResult {
    /// t statistic `(mean_a − mean_b − delta) / std_error`.
    pub statistic: f64,
    /// Degrees of freedom (Welch–Satterthwaite: fractional, not rounded).
    pub df: f64,
    /// p-value for the chosen alternative, in [0, 1].
    pub p_value: f64,
    /// Estimated difference `mean_a − mean_b`.
    pub estimate: f64,
    /// Confidence interval of `mean_a − mean_b` at `conf_level`; one-sided
    /// alternatives give `(-inf, high)` (less) or `(low, +inf)` (greater).
    pub ci: (f64, f64),
    /// Standard error of the difference.
    pub std_error: f64,
    /// Hedges' g: difference of means over the pooled sd, times the exact
    /// small-sample correction J(n_a + n_b − 2).
    pub hedges_g: f64,
    /// Mean of sample a.
    pub mean_a: f64,
    /// Mean of sample b.
    pub mean_b: f64,
    /// Standard deviation of sample a (0 when `n_a == 1`).
    pub sd_a: f64,
    /// Standard deviation of sample b (0 when `n_b == 1`).
    pub sd_b: f64,
    /// Size of sample a.
    pub n_a: u64,
    /// Size of sample b.
    pub n_b: u64,
}

fn check_options(opts: &TTestOptions) -> Result<(), StatsError> {
    if !opts.delta.is_finite() {
        return Err(StatsError::InvalidParameter {
            name: "delta",
            value: opts.delta,
        });
    }
    if !(opts.conf_level > 0.0 && opts.conf_level < 1.0) {
        return Err(StatsError::InvalidParameter {
            name: "conf_level",
            value: opts.conf_level,
        });
    }
    Ok(())
}

/// p-value of a t statistic for an alternative (validated inputs).
pub(crate) fn t_p_value(t: f64, dist: &TDist, alternative: Alternative) -> Result<f64, StatsError> {
    Ok(match alternative {
        Alternative::TwoSided => dist.two_sided(t)?,
        Alternative::Less => dist.ln_cdf(t)?.exp(),
        Alternative::Greater => dist.ln_sf(t)?.exp(),
    })
}

fn t_interval(
    estimate: f64,
    se: f64,
    dist: &TDist,
    opts: &TTestOptions,
) -> Result<(f64, f64), StatsError> {
    let alpha = 1.0 - opts.conf_level;
    Ok(match opts.alternative {
        Alternative::TwoSided => {
            let q = -dist.quantile(0.5 * alpha)?;
            (estimate - q * se, estimate + q * se)
        }
        Alternative::Less => {
            let q = -dist.quantile(alpha)?;
            (f64::NEG_INFINITY, estimate + q * se)
        }
        Alternative::Greater => {
            let q = -dist.quantile(alpha)?;
            (estimate - q * se, f64::INFINITY)
        }
    })
}

fn pooled_sd(a: &Summary, b: &Summary) -> Option<f64> {
    let df = (a.n() + b.n()).checked_sub(2)?;
    if df == 0 {
        return None;
    }
    Some(((a.m2() + b.m2()) / df as f64).sqrt())
}

fn hedges_g(a: &Summary, b: &Summary, diff: f64) -> f64 {
    match pooled_sd(a, b) {
        Some(sp) if sp > 0.0 => {
            let g = diff / sp * hedges_correction((a.n() + b.n() - 2) as f64);
            if g.is_finite() { g } else { 0.0 }
        }
        _ => 0.0,
    }
}

fn finish(
    a: &Summary,
    b: &Summary,
    diff: f64,
    se: f64,
    df: f64,
    opts: &TTestOptions,
) -> Result<TTestResult, StatsError> {
    let (statistic, p_value, dist) = decision(diff, se, df, opts.delta, opts.alternative)?;
    let ci = t_interval(diff, se, &dist, opts)?;
    Ok(TTestResult {
        statistic,
        df,
        p_value,
        estimate: diff,
        ci,
        std_error: se,
        hedges_g: hedges_g(a, b, diff),
        mean_a: a.mean(),
        mean_b: b.mean(),
        sd_a: a.sd().unwrap_or(0.0),
        sd_b: b.sd().unwrap_or(0.0),
        n_a: a.n(),
        n_b: b.n(),
    })
}

/// The t statistic, its p-value and the t distribution, from the difference, its standard
/// error and df.
fn decision(
    diff: f64,
    se: f64,
    df: f64,
    delta: f64,
    alternative: Alternative,
) -> Result<(f64, f64, TDist), StatsError> {
    let statistic = (diff - delta) / se;
    if !statistic.is_finite() || !diff.is_finite() || !se.is_finite() || !df.is_finite() {
        return Err(StatsError::NonFinite);
    }
    let dist = TDist::new(df);
    let p_value = t_p_value(statistic, &dist, alternative)?.clamp(0.0, 1.0);
    Ok((statistic, p_value, dist))
}

fn to_usize(n: u64) -> usize {
    usize::try_from(n).unwrap_or(usize::MAX)
}

/// Welch's t test (unequal variances) from summaries.
///
/// df is the Welch–Satterthwaite value, kept fractional. Each sample needs at
/// least 2 values ([`StatsError::TooFewValues`]); if both variances are zero
/// the statistic is undefined ([`StatsError::ZeroVariance`]).
pub fn welch(a: &Summary, b: &Summary, opts: &TTestOptions) -> Result<TTestResult, StatsError> {
    check_options(opts)?;
    let (diff, se, df) = welch_parts(a, b)?;
    finish(a, b, diff, se, df, opts)
}

/// The decision part of a t test: statistic, df and p-value, without the
/// interval or the effect size.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TTestP {
    /// t statistic `(mean_a − mean_b − delta) / std_error`.
    pub statistic: f64,
    /// Degrees of freedom (Welch–Satterthwaite: fractional, not rounded).
    pub df: f64,
    /// p-value for the alternative, in [0, 1].
    pub p_value: f64,
    /// Estimated difference `mean_a − mean_b`.
    pub estimate: f64,
    /// Standard error of the difference.
    pub std_error: f64,
}

/// Welch's t test from summaries, statistic, df and p-value only: the same
/// numbers as [`welch`] (same code), for screening many pairs where the
/// interval (a quantile, which costs more than the p-value) is needed only
/// for the pairs reported.
pub fn welch_p(
    a: &Summary,
    b: &Summary,
    delta: f64,
    alternative: Alternative,
) -> Result<TTestP, StatsError> {
    if !delta.is_finite() {
        return Err(StatsError::InvalidParameter {
            name: "delta",
            value: delta,
        });
    }
    let (diff, se, df) = welch_parts(a, b)?;
    let (statistic, p_value, _) = decision(diff, se, df, delta, alternative)?;
    Ok(TTestP {
        statistic,
        df,
        p_value,
        estimate: diff,
        std_error: se,
    })
}

/// (difference of means, standard error, Welch–Satterthwaite df).
fn welch_parts(a: &Summary, b: &Summary) -> Result<(f64, f64, f64), StatsError> {
    let (Some(var_a), Some(var_b)) = (a.variance(), b.variance()) else {
        return Err(StatsError::TooFewValues {
            needed: 2,
            got: to_usize(a.n().min(b.n())),
        });
    };
    let va = var_a / a.n() as f64;
    let vb = var_b / b.n() as f64;
    let se2 = va + vb;
    if se2 == 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    // df = se⁴ / (va²/(na−1) + vb²/(nb−1)), written with the shares of se²
    // so that tiny or huge variances neither underflow nor overflow.
    let wa = va / se2;
    let wb = vb / se2;
    let df = 1.0 / (wa * wa / (a.n() - 1) as f64 + wb * wb / (b.n() - 1) as f64);
    Ok((a.mean() - b.mean(), se2.sqrt(), df))
}

/// Student's pooled-variance t test from summaries, df = n_a + n_b − 2.
///
/// Accepts one sample with a single value as long as the other has at least
/// two (as scipy does: the pooled variance then comes from the larger sample
/// alone); `n_a + n_b < 3` gives [`StatsError::TooFewValues`]. A pooled
/// variance of zero gives [`StatsError::ZeroVariance`].
pub fn pooled(a: &Summary, b: &Summary, opts: &TTestOptions) -> Result<TTestResult, StatsError> {
    check_options(opts)?;
    let total = a.n().saturating_add(b.n());
    let Some(sp) = pooled_sd(a, b) else {
        return Err(StatsError::TooFewValues {
            needed: 3,
            got: to_usize(total),
        });
    };
    if sp == 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    let df = (total - 2) as f64;
    let se = sp * (1.0 / a.n() as f64 + 1.0 / b.n() as f64).sqrt();
    finish(a, b, a.mean() - b.mean(), se, df, opts)
}

/// Welch's t test on raw samples (see [`welch`]).
pub fn welch_samples(a: &[f64], b: &[f64], opts: &TTestOptions) -> Result<TTestResult, StatsError> {
    welch(&Summary::from_slice(a)?, &Summary::from_slice(b)?, opts)
}

/// Pooled t test on raw samples (see [`pooled`]).
pub fn pooled_samples(
    a: &[f64],
    b: &[f64],
    opts: &TTestOptions,
) -> Result<TTestResult, StatsError> {
    pooled(&Summary::from_slice(a)?, &Summary::from_slice(b)?, opts)
}
