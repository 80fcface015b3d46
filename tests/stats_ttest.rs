//! Two-sample t tests against the NIST/SEMATECH e-Handbook AUTO83B example and
//! the Boost.Math Welch example; bad-input checks.

mod stats_common;

use lotdrift::stats::{
    Alternative, StatsError, Summary, TTestOptions, pooled, pooled_samples, welch, welch_samples,
};
use stats_common::{load_column, tol};

fn auto83b() -> (Vec<f64>, Vec<f64>) {
    (
        load_column("nist_auto83b_us_mpg.txt"),
        load_column("nist_auto83b_japan_mpg.txt"),
    )
}

/// NIST/SEMATECH e-Handbook of Statistical Methods, §1.3.5.3 "Two-Sample
/// t-Test for Equal Means", AUTO83B.DAT (US vs Japan mpg), and its R companion
/// page (REFERENCES.md §1).
#[test]
fn nist_auto83b_pooled() {
    let (us, jp) = auto83b();
    assert_eq!((us.len(), jp.len()), (249, 79));
    let r = pooled_samples(&us, &jp, &TTestOptions::default()).unwrap();
    // Published: T = -12.62059, df = 326, sp = 6.34260 (5 decimals).
    tol::assert_printed("NIST pooled T", r.statistic, -12.62059, 5);
    assert_eq!(r.df, 326.0);
    // Published summary statistics (§1.3.5.3 table).
    tol::assert_printed("mean US", r.mean_a, 20.14458, 5);
    tol::assert_printed("sd US", r.sd_a, 6.41470, 5);
    tol::assert_printed("mean Japan", r.mean_b, 30.48101, 5);
    tol::assert_printed("sd Japan", r.sd_b, 6.10771, 5);
    // Exact double-precision value (scipy ttest_ind, equal_var=True).
    tol::assert_rel(
        "pooled T exact",
        r.statistic,
        -12.620591288724,
        tol::EXACT_REL,
    );
    // R page: 95 % CI (-11.947653, -8.725216), 6 decimals.
    tol::assert_printed("CI low", r.ci.0, -11.947653, 6);
    tol::assert_printed("CI high", r.ci.1, -8.725216, 6);
    // Two-sided p (R prints < 2.2e-16; scipy 5.2729354566e-30).
    tol::assert_rel("pooled p", r.p_value, 5.2729354566e-30, 1e-9);
}

/// Welch on the raw AUTO83B data: scipy `ttest_ind(equal_var=False)` and R
/// `t.test(var.equal=FALSE)` (REFERENCES.md §1). The raw-data df is
/// 136.874977, not the 136.87499 obtained from rounded summary statistics.
#[test]
fn nist_auto83b_welch_raw() {
    let (us, jp) = auto83b();
    let r = welch_samples(&us, &jp, &TTestOptions::default()).unwrap();
    tol::assert_rel("Welch t", r.statistic, -12.946273275, 1e-10);
    tol::assert_abs("Welch df (raw)", r.df, 136.8749767, 1e-7);
    tol::assert_rel("Welch p", r.p_value, 1.570854784e-25, 1e-9);
    tol::assert_printed("R CI low", r.ci.0, -11.915248, 6);
    tol::assert_printed("R CI high", r.ci.1, -8.757621, 6);
}

/// Boost.Math documentation, "Comparing the means of two samples with the
/// Students-t test" (students_t_two_samples.cpp): Welch from the NIST
/// summary statistics, t = -12.94627, df = 136.87499, p = 1.571e-25.
#[test]
fn boost_welch_from_rounded_summaries() {
    let (us, jp) = auto83b();
    let part = |n: u64, mean: f64, sd: f64, xs: &[f64]| {
        let min = xs.iter().cloned().fold(f64::INFINITY, f64::min);
        let max = xs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        Summary::from_parts(n, mean, sd * sd * (n - 1) as f64, min, max).unwrap()
    };
    let a = part(249, 20.14458, 6.41470, &us);
    let b = part(79, 30.48101, 6.10771, &jp);
    let r = welch(&a, &b, &TTestOptions::default()).unwrap();
    tol::assert_printed("Boost t", r.statistic, -12.94627, 5);
    tol::assert_printed("Boost df", r.df, 136.87499, 5);
    tol::assert_printed("Boost p", r.p_value * 1e25, 1.571, 3);
    // NIST §1.3.5.3 one- and two-sided critical values for the pooled df 326.
    let crit = lotdrift::stats::t_isf(0.025, 326.0).unwrap();
    tol::assert_printed("t(0.975, 326)", crit, 1.9673, 4);
    let crit = lotdrift::stats::t_isf(0.05, 326.0).unwrap();
    tol::assert_printed("t(0.95, 326)", crit, 1.6495, 4);
}

#[test]
fn one_sided_intervals_and_alternatives() {
    let (us, jp) = auto83b();
    let two = welch_samples(&us, &jp, &TTestOptions::default()).unwrap();
    let less = welch_samples(
        &us,
        &jp,
        &TTestOptions {
            alternative: Alternative::Less,
            ..TTestOptions::default()
        },
    )
    .unwrap();
    let greater = welch_samples(
        &us,
        &jp,
        &TTestOptions {
            alternative: Alternative::Greater,
            ..TTestOptions::default()
        },
    )
    .unwrap();
    assert_eq!(less.ci.0, f64::NEG_INFINITY);
    assert_eq!(greater.ci.1, f64::INFINITY);
    assert!(less.ci.1 < two.ci.1 && greater.ci.0 > two.ci.0);
    tol::assert_rel(
        "less p = half two-sided",
        less.p_value,
        two.p_value / 2.0,
        1e-12,
    );
    tol::assert_rel("greater p", greater.p_value, 1.0, 1e-15);
}

#[test]
fn bad_input() {
    let opts = TTestOptions::default();
    let one = Summary::single(1.0).unwrap();
    let three = Summary::from_slice(&[1.0, 2.0, 4.0]).unwrap();
    assert_eq!(
        welch(&one, &three, &opts),
        Err(StatsError::TooFewValues { needed: 2, got: 1 })
    );
    // Pooled accepts one single-value sample (df = 2 here) but not two.
    assert!(pooled(&one, &three, &opts).is_ok());
    assert_eq!(
        pooled(&one, &one, &opts),
        Err(StatsError::TooFewValues { needed: 3, got: 2 })
    );
    let flat_a = Summary::from_slice(&[2.0, 2.0, 2.0]).unwrap();
    let flat_b = Summary::from_slice(&[3.0, 3.0]).unwrap();
    assert_eq!(
        welch(&flat_a, &flat_b, &opts),
        Err(StatsError::ZeroVariance)
    );
    assert_eq!(
        pooled(&flat_a, &flat_b, &opts),
        Err(StatsError::ZeroVariance)
    );
    assert_eq!(
        welch_samples(&[], &[1.0, 2.0], &opts),
        Err(StatsError::EmptySample)
    );
    assert_eq!(
        welch_samples(&[1.0, f64::NAN], &[1.0, 2.0], &opts),
        Err(StatsError::NonFinite)
    );
    assert_eq!(
        pooled_samples(&[1.0, 2.0], &[f64::INFINITY, 2.0], &opts),
        Err(StatsError::NonFinite)
    );
    for bad in [0.0, 1.0, f64::NAN, -0.5] {
        let o = TTestOptions {
            conf_level: bad,
            ..opts
        };
        assert!(matches!(
            welch(&three, &three, &o),
            Err(StatsError::InvalidParameter {
                name: "conf_level",
                ..
            })
        ));
    }
    let o = TTestOptions {
        delta: f64::NAN,
        ..opts
    };
    assert!(matches!(
        welch(&three, &three, &o),
        Err(StatsError::InvalidParameter { name: "delta", .. })
    ));
    assert!("sideways".parse::<Alternative>().is_err());
    assert_eq!(
        "Two-Sided".parse::<Alternative>(),
        Ok(Alternative::TwoSided)
    );
}
