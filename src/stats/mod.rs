//! Statistics core of lotdrift: summaries, distribution functions, two-sample
//! tests, rank and normality tests, and multiple-testing adjustment.
//!
//! Everything in this module is pure and synchronous: no I/O, no allocation
//! beyond what a computation needs, no global state. Every public function
//! validates its input and reports problems as a typed [`StatsError`]; no
//! function panics on user input and no result field is ever NaN.

pub mod capability;
pub mod compare;
pub mod dist;
pub mod effect;
pub mod monitoring;
pub mod multiplicity;
pub mod normality;
pub mod rank;
pub mod robust;
pub mod summary;
pub mod ttest;
pub mod variance;

pub use dist::{
    f_cdf, f_isf, f_quantile, f_sf, normal_cdf, normal_isf, normal_quantile, normal_sf, t_cdf,
    t_isf, t_quantile, t_sf,
};
pub use multiplicity::{Method, adjust, reject};
pub use normality::{ShapiroWilkResult, shapiro_wilk};
pub use rank::{
    MannWhitneyMethod, MannWhitneyResult, hodges_lehmann, mann_whitney, mann_whitney_with,
};
pub use summary::Summary;
pub use ttest::{
    Alternative, TTestOptions, TTestP, TTestResult, pooled, pooled_samples, welch, welch_p,
    welch_samples,
};
pub use variance::{
    Center, FTestResult, LeveneResult, brown_forsythe, f_test, f_test_samples, levene,
};

/// Everything that can go wrong in the statistics core.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StatsError {
    /// A sample (or a list of p-values where one is required) has no values.
    #[error("empty sample")]
    EmptySample,
    /// A sample is too small for the requested computation.
    #[error("too few values: need at least {needed}, got {got}")]
    TooFewValues {
        /// Minimum number of values required.
        needed: usize,
        /// Number of values supplied.
        got: usize,
    },
    /// A sample is too large for the requested computation.
    #[error("too many values: at most {max} supported, got {got}")]
    TooManyValues {
        /// Maximum number of values supported.
        max: usize,
        /// Number of values supplied.
        got: usize,
    },
    /// An input value is NaN or infinite, or an intermediate result overflowed.
    #[error("non-finite value in input or result")]
    NonFinite,
    /// All values are identical where a spread is needed (e.g. both samples
    /// of a t test have zero variance).
    #[error("zero variance: the test statistic is undefined")]
    ZeroVariance,
    /// A parameter is outside its domain.
    #[error("invalid parameter {name} = {value}")]
    InvalidParameter {
        /// Name of the parameter.
        name: &'static str,
        /// The offending value.
        value: f64,
    },
    /// A method name was not recognised.
    #[error("unknown method {name:?}; allowed: {allowed}")]
    UnknownMethod {
        /// The name as given.
        name: String,
        /// The accepted names, separated by `|`.
        allowed: &'static str,
    },
    /// An iterative algorithm failed to converge (should not happen for valid
    /// input; reported rather than returning an inaccurate number).
    #[error("numerical algorithm did not converge: {what}")]
    NoConvergence {
        /// Which computation failed.
        what: &'static str,
    },
}
