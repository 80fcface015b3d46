//! One entry point over the two-sample tests, for callers that pick the test by name (the
//! `compare` command). Pure: slices in, a uniform result out.

use std::fmt;
use std::str::FromStr;

use super::StatsError;
use super::ttest::{self, Alternative, TTestOptions};

/// The tests `compare` offers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TestKind {
    Welch,
    Pooled,
}

impl TestKind {
    pub fn as_str(self) -> &'static str {
        match self {
            TestKind::Welch => "welch",
            TestKind::Pooled => "pooled",
        }
    }
}

impl fmt::Display for TestKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for TestKind {
    type Err = StatsError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s.trim().to_ascii_lowercase().as_str() {
            "welch" => Ok(TestKind::Welch),
            "pooled" | "student" => Ok(TestKind::Pooled),
            _ => Err(StatsError::UnknownMethod {
                name: s.to_string(),
                allowed: "welch|pooled",
            }),
        }
    }
}

/// df of a test: one number, or the pair of an F distribution.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Df {
    One(f64),
    Two(f64, f64),
}

/// A test's result in the shape every test shares.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    pub test: TestKind,
    pub alternative: Alternative,
    pub statistic: f64,
    pub df: Option<Df>,
    pub p_value: f64,
    /// What the test estimates (difference of means a − b, ratio of variances, ...).
    pub estimate: f64,
    pub estimate_label: &'static str,
    pub ci: Option<(f64, f64)>,
    pub conf_level: f64,
    /// The assumption the test rests on, in words.
    pub assumption: &'static str,
    pub n_a: usize,
    pub n_b: usize,
    pub delta: f64,
}

/// Runs `test` on samples `a` and `b`. `alpha` sets the interval's confidence (1 − alpha).
pub fn compare(
    a: &[f64],
    b: &[f64],
    test: TestKind,
    alternative: Alternative,
    delta: f64,
    alpha: f64,
) -> Result<Comparison, StatsError> {
    let opts = TTestOptions {
        delta,
        alternative,
        conf_level: 1.0 - alpha,
    };
    let (r, assumption) = match test {
        TestKind::Welch => (
            ttest::welch_samples(a, b, &opts)?,
            "independent samples from normal populations (variances may differ); robust to \
             moderate non-normality for larger samples",
        ),
        TestKind::Pooled => (
            ttest::pooled_samples(a, b, &opts)?,
            "independent samples from normal populations with equal variances",
        ),
    };
    Ok(Comparison {
        test,
        alternative,
        statistic: r.statistic,
        df: Some(Df::One(r.df)),
        p_value: r.p_value,
        estimate: r.estimate,
        estimate_label: "difference of means (a − b)",
        ci: Some(r.ci),
        conf_level: 1.0 - alpha,
        assumption,
        n_a: a.len(),
        n_b: b.len(),
        delta,
    })
}
