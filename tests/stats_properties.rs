//! Property tests (proptest): symmetry and invariance of the test statistics,
//! p-values in [0, 1], monotone adjusted p-values.

use lotdrift::stats::{
    Alternative, Center, Method, StatsError, TTestOptions, adjust, f_test_samples, levene,
    mann_whitney, pooled_samples, shapiro_wilk, welch_samples,
};
use proptest::prelude::*;

fn sample() -> impl Strategy<Value = Vec<f64>> {
    prop::collection::vec(-100.0f64..100.0, 2..40)
}

fn opts(alternative: Alternative) -> TTestOptions {
    TTestOptions {
        alternative,
        ..TTestOptions::default()
    }
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    a == b || (a - b).abs() <= rel * a.abs().max(b.abs()).max(1e-300)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    #[test]
    fn swapping_samples_flips_t_and_alternative(a in sample(), b in sample()) {
        for test in [welch_samples, pooled_samples] {
            let ab = test(&a, &b, &opts(Alternative::TwoSided));
            let ba = test(&b, &a, &opts(Alternative::TwoSided));
            match (ab, ba) {
                (Ok(ab), Ok(ba)) => {
                    prop_assert_eq!(ab.statistic, -ba.statistic);
                    prop_assert_eq!(ab.df, ba.df);
                    prop_assert!(close(ab.p_value, ba.p_value, 1e-14));
                    let less = test(&a, &b, &opts(Alternative::Less)).unwrap();
                    let greater = test(&b, &a, &opts(Alternative::Greater)).unwrap();
                    prop_assert!(close(less.p_value, greater.p_value, 1e-14));
                    prop_assert!(close(less.ci.1, -greater.ci.0, 1e-12));
                }
                (Err(e1), Err(e2)) => prop_assert_eq!(e1, e2),
                (x, y) => prop_assert!(false, "asymmetric outcome {:?} / {:?}", x, y),
            }
        }
    }

    #[test]
    fn shift_and_scale_leave_t_unchanged(
        a in sample(),
        b in sample(),
        shift in -1000.0f64..1000.0,
        scale in 0.001f64..1000.0,
    ) {
        let base = welch_samples(&a, &b, &TTestOptions::default());
        prop_assume!(base.is_ok());
        let base = base.unwrap();
        let shifted = |xs: &[f64]| xs.iter().map(|x| x + shift).collect::<Vec<_>>();
        let scaled = |xs: &[f64]| xs.iter().map(|x| x * scale).collect::<Vec<_>>();
        let s = welch_samples(&shifted(&a), &shifted(&b), &TTestOptions::default()).unwrap();
        let k = welch_samples(&scaled(&a), &scaled(&b), &TTestOptions::default()).unwrap();
        // Shifting by up to 1e3 rounds the data at ~1e-13 of their spread.
        prop_assert!(close(s.statistic, base.statistic, 1e-9), "{} vs {}", s.statistic, base.statistic);
        prop_assert!(close(s.df, base.df, 1e-9));
        prop_assert!(close(k.statistic, base.statistic, 1e-12));
        prop_assert!(close(k.df, base.df, 1e-12));
        let p = pooled_samples(&scaled(&a), &scaled(&b), &TTestOptions::default()).unwrap();
        let p0 = pooled_samples(&a, &b, &TTestOptions::default()).unwrap();
        prop_assert!(close(p.statistic, p0.statistic, 1e-12));
    }

    #[test]
    fn p_values_in_unit_interval(a in sample(), b in sample(), delta in -50.0f64..50.0) {
        for alt in [Alternative::TwoSided, Alternative::Less, Alternative::Greater] {
            let o = TTestOptions { delta, alternative: alt, conf_level: 0.9 };
            for r in [welch_samples(&a, &b, &o), pooled_samples(&a, &b, &o)].into_iter().flatten() {
                prop_assert!((0.0..=1.0).contains(&r.p_value));
                prop_assert!(r.ci.0 <= r.estimate && r.estimate <= r.ci.1);
                prop_assert!(r.statistic.is_finite() && r.df.is_finite() && r.hedges_g.is_finite());
            }
            if let Ok(r) = mann_whitney(&a, &b, alt) {
                prop_assert!((0.0..=1.0).contains(&r.p_value));
            }
            if let Ok(r) = f_test_samples(&a, &b, alt, 0.95) {
                prop_assert!((0.0..=1.0).contains(&r.p_value));
                let (lo, hi) = r.ci.unwrap();
                prop_assert!(lo <= r.estimate && r.estimate <= hi);
            }
        }
        for center in [Center::Mean, Center::Median] {
            if let Ok(r) = levene(&[&a, &b], center) {
                prop_assert!((0.0..=1.0).contains(&r.p_value));
            }
        }
        if a.len() >= 3 {
            match shapiro_wilk(&a) {
                Ok(r) => {
                    prop_assert!((0.0..=1.0).contains(&r.p_value));
                    prop_assert!(r.statistic > 0.0 && r.statistic <= 1.0);
                }
                Err(e) => prop_assert_eq!(e, StatsError::ZeroVariance),
            }
        }
    }

    #[test]
    fn mann_whitney_swap(a in sample(), b in sample()) {
        let ab = mann_whitney(&a, &b, Alternative::Less).unwrap();
        let ba = mann_whitney(&b, &a, Alternative::Greater).unwrap();
        prop_assert_eq!(ab.statistic, ba.u_b);
        prop_assert!(close(ab.p_value, ba.p_value, 1e-14));
    }

    #[test]
    fn adjusted_monotone_and_not_below_raw(p in prop::collection::vec(0.0f64..=1.0, 0..60)) {
        let mut order: Vec<usize> = (0..p.len()).collect();
        order.sort_by(|&i, &j| p[i].total_cmp(&p[j]));
        for m in Method::ALL {
            let adj = adjust(&p, m).unwrap();
            prop_assert_eq!(adj.len(), p.len());
            for (q, raw) in adj.iter().zip(&p) {
                prop_assert!(*q >= *raw && *q <= 1.0, "{}: {} < {}", m, q, raw);
            }
            for w in order.windows(2) {
                prop_assert!(adj[w[0]] <= adj[w[1]], "{} not monotone", m);
            }
        }
    }
}
