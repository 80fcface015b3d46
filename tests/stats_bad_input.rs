//! Bad input gives typed errors, never panics or NaN.

use lotdrift::stats::{
    Alternative, Center, MannWhitneyMethod, StatsError, Summary, TTestOptions, brown_forsythe,
    f_test, f_test_samples, hodges_lehmann, levene, mann_whitney, mann_whitney_with,
    pooled_samples, shapiro_wilk, welch_samples,
};

const NAN: f64 = f64::NAN;
const INF: f64 = f64::INFINITY;

#[test]
fn empty_and_single_values() {
    let o = TTestOptions::default();
    assert_eq!(welch_samples(&[], &[], &o), Err(StatsError::EmptySample));
    assert_eq!(
        welch_samples(&[1.0], &[1.0, 2.0], &o),
        Err(StatsError::TooFewValues { needed: 2, got: 1 })
    );
    assert_eq!(
        pooled_samples(&[1.0], &[2.0], &o),
        Err(StatsError::TooFewValues { needed: 3, got: 2 })
    );
    assert_eq!(
        f_test_samples(&[1.0], &[1.0, 2.0], Alternative::TwoSided, 0.95),
        Err(StatsError::TooFewValues { needed: 2, got: 1 })
    );
    assert_eq!(
        mann_whitney(&[], &[1.0], Alternative::TwoSided),
        Err(StatsError::EmptySample)
    );
    assert_eq!(hodges_lehmann(&[1.0], &[]), Err(StatsError::EmptySample));
    assert_eq!(
        shapiro_wilk(&[1.0, 2.0]),
        Err(StatsError::TooFewValues { needed: 3, got: 2 })
    );
    let big = vec![1.0; 5001];
    assert_eq!(
        shapiro_wilk(&big),
        Err(StatsError::TooManyValues {
            max: 5000,
            got: 5001
        })
    );
    assert_eq!(
        levene(&[&[1.0, 2.0]], Center::Mean),
        Err(StatsError::TooFewValues { needed: 2, got: 1 })
    );
    assert_eq!(
        levene(&[&[1.0, 2.0], &[]], Center::Mean),
        Err(StatsError::EmptySample)
    );
    assert_eq!(
        levene(&[&[1.0], &[2.0]], Center::Median),
        Err(StatsError::TooFewValues { needed: 3, got: 2 })
    );
}

#[test]
fn zero_variance() {
    let o = TTestOptions::default();
    let (a, b) = ([4.0, 4.0, 4.0], [5.0, 5.0]);
    assert_eq!(welch_samples(&a, &b, &o), Err(StatsError::ZeroVariance));
    assert_eq!(pooled_samples(&a, &b, &o), Err(StatsError::ZeroVariance));
    assert_eq!(
        f_test_samples(&[1.0, 2.0], &b, Alternative::TwoSided, 0.95),
        Err(StatsError::ZeroVariance)
    );
    assert_eq!(brown_forsythe(&a, &b), Err(StatsError::ZeroVariance));
    assert_eq!(shapiro_wilk(&a), Err(StatsError::ZeroVariance));
    assert_eq!(
        mann_whitney_with(
            &a,
            &[4.0, 4.0],
            Alternative::TwoSided,
            MannWhitneyMethod::Asymptotic
        ),
        Err(StatsError::ZeroVariance)
    );
    // One zero-variance sample is fine for Welch (df = n − 1 of the other).
    let r = welch_samples(&a, &[1.0, 2.0, 3.0], &o).unwrap();
    assert!((r.df - 2.0).abs() < 1e-12);
}

#[test]
fn non_finite_values() {
    let o = TTestOptions::default();
    let good = [1.0, 2.0, 3.0];
    for bad in [NAN, INF, -INF] {
        let with_bad = [1.0, bad, 3.0];
        assert_eq!(
            welch_samples(&with_bad, &good, &o),
            Err(StatsError::NonFinite)
        );
        assert_eq!(
            pooled_samples(&good, &with_bad, &o),
            Err(StatsError::NonFinite)
        );
        assert_eq!(
            f_test_samples(&good, &with_bad, Alternative::Less, 0.95),
            Err(StatsError::NonFinite)
        );
        assert_eq!(
            levene(&[&good, &with_bad], Center::Mean),
            Err(StatsError::NonFinite)
        );
        assert_eq!(
            mann_whitney(&with_bad, &good, Alternative::TwoSided),
            Err(StatsError::NonFinite)
        );
        assert_eq!(hodges_lehmann(&good, &with_bad), Err(StatsError::NonFinite));
        assert_eq!(shapiro_wilk(&with_bad), Err(StatsError::NonFinite));
    }
    let s = Summary::from_slice(&good).unwrap();
    assert!(matches!(
        f_test(&s, &s, Alternative::TwoSided, NAN),
        Err(StatsError::InvalidParameter {
            name: "conf_level",
            ..
        })
    ));
}

#[test]
fn extreme_but_valid_values_give_numbers() {
    let o = TTestOptions::default();
    // Huge separation: p underflows towards 0 but stays a number.
    let a = [0.0, 1e-12, 2e-12];
    let b = [1e6, 1e6 + 1e-9, 1e6 + 2e-9];
    let r = welch_samples(&a, &b, &o).unwrap();
    // t ≈ −1.7e15 with df ≈ 2: p ≈ 1/t² ≈ 3e-31 (t tails are polynomial).
    assert!(r.p_value > 0.0 && r.p_value < 1e-25, "p = {}", r.p_value);
    // Values near the f64 limit: either a result or a typed error, no NaN.
    let huge = [1e307, -1e307, 5e306];
    match welch_samples(&huge, &good_three(), &o) {
        Ok(r) => assert!(r.statistic.is_finite() && !r.p_value.is_nan()),
        Err(e) => assert_eq!(e, StatsError::NonFinite),
    }
    let mw = mann_whitney(&huge, &good_three(), Alternative::Greater).unwrap();
    assert!(!mw.p_value.is_nan());
    assert!(hodges_lehmann(&[1e308], &[-1e308]).is_err());
}

fn good_three() -> [f64; 3] {
    [1.0, 2.0, 3.0]
}

#[test]
fn the_screening_welch_refuses_what_welch_refuses() {
    let one = Summary::from_slice(&[1.0]).unwrap();
    let flat = Summary::from_slice(&[2.0, 2.0, 2.0]).unwrap();
    let ok = Summary::from_slice(&[1.0, 2.0, 4.0]).unwrap();
    let two = Alternative::TwoSided;
    assert_eq!(
        lotdrift::stats::welch_p(&one, &ok, 0.0, two),
        Err(StatsError::TooFewValues { needed: 2, got: 1 })
    );
    assert_eq!(
        lotdrift::stats::welch_p(&flat, &flat, 0.0, two),
        Err(StatsError::ZeroVariance)
    );
    assert!(matches!(
        lotdrift::stats::welch_p(&ok, &flat, NAN, two),
        Err(StatsError::InvalidParameter { name: "delta", .. })
    ));
}
