//! Distribution functions: published t critical values and basic identities.
//! The far-tail accuracy checks against mpmath are in stats_fixtures.rs.

mod stats_common;

use lotdrift::stats::{
    StatsError, f_cdf, f_isf, f_quantile, f_sf, normal_cdf, normal_isf, normal_quantile, normal_sf,
    t_cdf, t_isf, t_quantile, t_sf,
};
use stats_common::{load_csv, num, tol};

fn df_of(s: &str) -> f64 {
    if s == "inf" { f64::INFINITY } else { num(s) }
}

/// NIST/SEMATECH e-Handbook §1.3.6.7.2 "Critical Values of the Student's t
/// Distribution" (third-party reproduction credited to the e-Handbook;
/// REFERENCES.md §5). Three decimals. The 0.001 column is wrong for df 1 and
/// 7–12 in that table (REFERENCES.md §5 and surprise 3), so those entries
/// are checked against the computed values only.
#[test]
fn nist_t_table() {
    let (header, rows) = load_csv("nist_t_table_upper_critical.csv");
    let mut checked = 0;
    for row in &rows {
        let df = df_of(&row[0]);
        for (j, h) in header.iter().enumerate().skip(1) {
            let p = num(h.trim_start_matches('p'));
            if p == 0.001 && (df == 1.0 || (7.0..=12.0).contains(&df)) {
                continue;
            }
            tol::assert_printed(
                &format!("t({p}, {df})"),
                t_isf(p, df).unwrap(),
                num(&row[j]),
                3,
            );
            checked += 1;
        }
    }
    // 34 rows x 6 columns, less the 7 known-wrong 0.001 entries.
    assert_eq!(checked, 197);
}

/// Computed t critical values (scipy `t.isf`, 10 decimals; REFERENCES.md §5,
/// data/t_critical_computed.csv), including df 326 and ∞.
#[test]
fn computed_t_table_ten_decimals() {
    let (header, rows) = load_csv("t_critical_computed.csv");
    for row in &rows {
        let df = df_of(&row[0]);
        for (j, h) in header.iter().enumerate().skip(1) {
            let p = num(h.trim_start_matches('p'));
            let q = t_isf(p, df).unwrap();
            tol::assert_printed(&format!("t({p}, {df})"), q, num(&row[j]), 10);
            // Round trip through the survival function.
            tol::assert_rel("sf(isf(p))", t_sf(q, df).unwrap(), p, 1e-13);
            assert_eq!(t_quantile(p, df).unwrap(), -q);
        }
    }
}

/// Closed forms: Cauchy (t with 1 df) sf = ½ − atan(x)/π; t with 2 df
/// sf = ½ − x / (2√(2 + x²)); df 1, p 0.001 quantile = tan(0.499π)
/// (REFERENCES.md §5).
#[test]
fn closed_forms() {
    for x in [0.1f64, 1.0, 3.0, 10.0, 1e3] {
        let cauchy = (1.0 / x).atan() / std::f64::consts::PI;
        tol::assert_rel("cauchy sf", t_sf(x, 1.0).unwrap(), cauchy, 1e-13);
        let two = 0.5 * (1.0 - x / (2.0 + x * x).sqrt());
        // Cancellation-free form of the same expression.
        let two_stable = 1.0 / ((2.0 + x * x).sqrt() * ((2.0 + x * x).sqrt() + x));
        tol::assert_rel("t2 sf", t_sf(x, 2.0).unwrap(), two_stable, 1e-13);
        assert!((t_sf(x, 2.0).unwrap() - two).abs() < 1e-15);
    }
    tol::assert_rel(
        "tan(0.499 pi)",
        t_isf(0.001, 1.0).unwrap(),
        (0.499 * std::f64::consts::PI).tan(),
        1e-12,
    );
    // 0.975 is not exact in binary; its quantile differs by ~1e-16.
    tol::assert_rel(
        "normal 0.975",
        normal_quantile(0.975).unwrap(),
        1.959963984540054,
        1e-14,
    );
    tol::assert_rel(
        "normal isf",
        normal_isf(0.025).unwrap(),
        1.959963984540054,
        1e-15,
    );
    tol::assert_rel(
        "Phi(-1.96)",
        normal_cdf(-1.959963984540054).unwrap(),
        0.025,
        1e-14,
    );
    tol::assert_rel(
        "Q(1.96)",
        normal_sf(1.959963984540054).unwrap(),
        0.025,
        1e-14,
    );
    // F(1, n) = t(n)²: sf_F(x², 1, n) = 2 sf_t(x, n).
    for (x, n) in [(0.5, 3.0), (2.0, 10.0), (30.0, 7.5)] {
        tol::assert_rel(
            "F = t^2",
            f_sf(x * x, 1.0, n).unwrap(),
            2.0 * t_sf(x, n).unwrap(),
            1e-12,
        );
        tol::assert_rel(
            "F cdf",
            f_cdf(x * x, 1.0, n).unwrap(),
            1.0 - 2.0 * t_sf(x, n).unwrap(),
            1e-12,
        );
    }
    // JAHANMI2 F critical values, NIST e-Handbook §1.3.5.9 (4 decimals).
    tol::assert_printed(
        "F(0.025;239,239)",
        f_quantile(0.025, 239.0, 239.0).unwrap(),
        0.7756,
        4,
    );
    tol::assert_printed(
        "F(0.975;239,239)",
        f_isf(0.025, 239.0, 239.0).unwrap(),
        1.2894,
        4,
    );
    // Levene critical value F(0.95; 9, 90), NIST §1.3.5.10 prints 1.9855
    // (truncated); exact 1.985594964 (REFERENCES.md §2).
    tol::assert_rel(
        "F(0.95;9,90)",
        f_isf(0.05, 9.0, 90.0).unwrap(),
        1.985594964,
        1e-9,
    );
    tol::assert_rel(
        "F(0.95;9,90) NIST",
        f_isf(0.05, 9.0, 90.0).unwrap(),
        1.9855,
        1e-4,
    );
}

#[test]
fn edges_and_errors() {
    assert_eq!(t_cdf(f64::NEG_INFINITY, 3.0), Ok(0.0));
    assert_eq!(t_sf(f64::INFINITY, 3.0), Ok(0.0));
    assert_eq!(t_sf(0.0, 3.0), Ok(0.5));
    assert_eq!(t_quantile(0.0, 3.0), Ok(f64::NEG_INFINITY));
    assert_eq!(t_quantile(1.0, 3.0), Ok(f64::INFINITY));
    assert_eq!(t_quantile(0.5, 3.0), Ok(0.0));
    assert_eq!(f_cdf(-1.0, 2.0, 3.0), Ok(0.0));
    assert_eq!(f_quantile(0.0, 2.0, 3.0), Ok(0.0));
    assert_eq!(f_isf(0.0, 2.0, 3.0), Ok(f64::INFINITY));
    assert_eq!(t_sf(f64::NAN, 3.0), Err(StatsError::NonFinite));
    for bad_df in [0.0, -1.0, f64::NAN] {
        assert!(matches!(
            t_sf(1.0, bad_df),
            Err(StatsError::InvalidParameter { .. })
        ));
        assert!(matches!(
            f_sf(1.0, bad_df, 2.0),
            Err(StatsError::InvalidParameter { .. })
        ));
        assert!(matches!(
            t_quantile(0.3, bad_df),
            Err(StatsError::InvalidParameter { .. })
        ));
    }
    assert!(matches!(
        f_sf(1.0, 2.0, f64::INFINITY),
        Err(StatsError::InvalidParameter { .. })
    ));
    for bad_p in [-0.1, 1.1, f64::NAN] {
        assert!(matches!(
            t_quantile(bad_p, 3.0),
            Err(StatsError::InvalidParameter { .. })
        ));
        assert!(matches!(
            normal_quantile(bad_p),
            Err(StatsError::InvalidParameter { .. })
        ));
        assert!(matches!(
            f_quantile(bad_p, 1.0, 2.0),
            Err(StatsError::InvalidParameter { .. })
        ));
    }
    // Quantiles beyond the f64 range are reported as inf / 0, not clamped.
    assert_eq!(t_isf(1e-300, 1e-3), Ok(f64::INFINITY));
    assert_eq!(f_isf(1e-300, 1.0, 1.0), Ok(f64::INFINITY));
    assert_eq!(f_quantile(1e-300, 1e-3, 1e-3), Ok(0.0));
    // Near the centre the quantile keeps relative accuracy: closed forms for
    // df 1 (tan(π(½ − q))) and df 2 ((1 − 2q) √(2 / (4q(1 − q))).
    for q in [0.26, 0.4, 0.49, 0.4999999] {
        let c1 = (std::f64::consts::PI * (0.5 - q)).tan();
        tol::assert_rel("t1 central", t_isf(q, 1.0).unwrap(), c1, 1e-12);
        let c2 = (1.0 - 2.0 * q) * (2.0 / (4.0 * q * (1.0 - q))).sqrt();
        tol::assert_rel("t2 central", t_isf(q, 2.0).unwrap(), c2, 1e-12);
    }
    // Extreme but valid inputs terminate with a finite number.
    for df in [1e-3, 0.5, 1.0, 2.5, 1e3, 1e6, 1e7] {
        for p in [1e-300, 1e-100, 1e-10, 0.3, 0.5 - 1e-12] {
            let q = t_isf(p, df).unwrap();
            assert!(q > 0.0 && !q.is_nan(), "t_isf({p}, {df}) = {q}");
        }
    }
}
