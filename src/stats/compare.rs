//! One entry point over the two-sample tests, for callers that pick the test by name (the
//! `compare` command). Pure: slices in, a uniform result out.

use std::fmt;
use std::str::FromStr;

use super::StatsError;
use super::ttest::{self, Alternative, TTestOptions};
use super::{rank, variance};

/// The tests `compare` offers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TestKind {
    Welch,
    Pooled,
    MannWhitney,
    F,
    BrownForsythe,
}

/// The names `FromStr` accepts, for messages.
pub const TEST_NAMES: &str = "welch|pooled|mann-whitney|f|brown-forsythe";

impl TestKind {
    pub fn as_str(self) -> &'static str {
        match self {
            TestKind::Welch => "welch",
            TestKind::Pooled => "pooled",
            TestKind::MannWhitney => "mann-whitney",
            TestKind::F => "f",
            TestKind::BrownForsythe => "brown-forsythe",
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
            "mann-whitney" | "mann_whitney" | "wilcoxon-rank-sum" => Ok(TestKind::MannWhitney),
            "f" => Ok(TestKind::F),
            "brown-forsythe" | "brown_forsythe" => Ok(TestKind::BrownForsythe),
            _ => Err(StatsError::UnknownMethod {
                name: s.to_string(),
                allowed: TEST_NAMES,
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
    let conf_level = 1.0 - alpha;
    let opts = TTestOptions {
        delta,
        alternative,
        conf_level,
    };
    let base = |statistic, df, p_value, estimate, estimate_label, ci, assumption| Comparison {
        test,
        alternative,
        statistic,
        df,
        p_value,
        estimate,
        estimate_label,
        ci,
        conf_level,
        assumption,
        n_a: a.len(),
        n_b: b.len(),
        delta,
    };
    let only_t = |name: &'static str| -> Result<(), StatsError> {
        if delta != 0.0 {
            Err(StatsError::InvalidParameter { name, value: delta })
        } else {
            Ok(())
        }
    };
    Ok(match test {
        TestKind::Welch | TestKind::Pooled => {
            let (r, assumption) = if test == TestKind::Welch {
                (
                    ttest::welch_samples(a, b, &opts)?,
                    "independent samples from normal populations (variances may differ); \
                     robust to moderate non-normality for larger samples",
                )
            } else {
                (
                    ttest::pooled_samples(a, b, &opts)?,
                    "independent samples from normal populations with equal variances",
                )
            };
            base(
                r.statistic,
                Some(Df::One(r.df)),
                r.p_value,
                r.estimate,
                "difference of means (a − b)",
                Some(r.ci),
                assumption,
            )
        }
        TestKind::MannWhitney => {
            only_t("delta (only the t tests take --delta)")?;
            let r = rank::mann_whitney(a, b, alternative)?;
            base(
                r.statistic,
                None,
                r.p_value,
                rank::hodges_lehmann(a, b)?,
                "Hodges–Lehmann shift (median of a_i − b_j)",
                None,
                match r.method {
                    rank::MannWhitneyMethod::Exact => {
                        "independent samples; exact distribution of U (no ties)"
                    }
                    _ => {
                        "independent samples; normal approximation of U with tie and \
                         continuity correction"
                    }
                },
            )
        }
        TestKind::F => {
            only_t("delta (only the t tests take --delta)")?;
            let r = variance::f_test_samples(a, b, alternative, conf_level)?;
            base(
                r.statistic,
                Some(Df::Two(r.df1, r.df2)),
                r.p_value,
                r.estimate,
                "ratio of variances (a / b)",
                r.ci,
                "independent samples from normal populations (the F test is sensitive to \
                 non-normality; prefer brown-forsythe when in doubt)",
            )
        }
        TestKind::BrownForsythe => {
            only_t("delta (only the t tests take --delta)")?;
            if alternative != Alternative::TwoSided {
                return Err(StatsError::InvalidParameter {
                    name: "alternative (brown-forsythe is two-sided only)",
                    value: f64::NAN,
                });
            }
            let r = variance::brown_forsythe(a, b)?;
            base(
                r.statistic,
                Some(Df::Two(r.df1, r.df2)),
                r.p_value,
                r.estimate.unwrap_or(0.0),
                "difference of mean absolute deviations from the medians (a − b)",
                None,
                "independent samples; robust to non-normality (Levene's test on deviations \
                 from the group medians)",
            )
        }
    })
}
