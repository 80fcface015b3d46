//! Multiplicity adjustment against Benjamini & Hochberg (1995).

mod stats_common;

use lotdrift::stats::{Method, StatsError, adjust, reject};
use stats_common::{load_column, load_csv, num, tol};

/// Benjamini, Y. & Hochberg, Y. (1995), "Controlling the false discovery rate:
/// a practical and powerful approach to multiple testing", JRSS B 57(1),
/// Section 3 worked example (15 p-values). Published: BH at q = 0.05 rejects
/// the 4 smallest, Bonferroni 3. Adjusted values: statsmodels
/// `multipletests` = R `p.adjust` (REFERENCES.md §4, cross-library).
#[test]
fn benjamini_hochberg_1995_example() {
    let p = load_column("bh1995_pvalues.txt");
    assert_eq!(p.len(), 15);
    let (header, rows) = load_csv("bh1995_adjusted_pvalues.csv");
    let col = |name: &str| {
        let i = header.iter().position(|h| h == name).expect(name);
        rows.iter().map(|r| num(&r[i])).collect::<Vec<f64>>()
    };
    let cases = [
        (Method::Bonferroni, "bonferroni", 3),
        (Method::Holm, "holm", 3),
        (Method::Hochberg, "hochberg", 3),
        (Method::BenjaminiHochberg, "bh", 4),
        (Method::BenjaminiYekutieli, "by", 3),
    ];
    for (method, name, rejections) in cases {
        let adj = adjust(&p, method).unwrap();
        let want = col(name);
        for (i, (&a, &w)) in adj.iter().zip(&want).enumerate() {
            tol::assert_rel(&format!("{name}[{i}]"), a, w, 1e-13);
        }
        let rej = reject(&adj, 0.05);
        assert_eq!(rej.iter().filter(|&&r| r).count(), rejections, "{name}");
        // Rejections are the smallest p-values.
        assert!(rej[..rejections].iter().all(|&r| r), "{name}");
    }
}

#[test]
fn input_order_is_kept() {
    let p = [0.04, 0.01, 0.03, 0.02];
    for a in adjust(&p, Method::BenjaminiHochberg).unwrap() {
        tol::assert_rel("bh", a, 0.04, 1e-15);
    }
    let holm = adjust(&p, Method::Holm).unwrap();
    let want = [0.06, 0.04, 0.06, 0.06];
    for (a, w) in holm.iter().zip(want) {
        tol::assert_rel("holm", *a, w, 1e-15);
    }
}

#[test]
fn parse_and_bad_input() {
    for m in Method::ALL {
        assert_eq!(m.as_str().parse::<Method>(), Ok(m));
        assert_eq!(m.to_string().to_uppercase().parse::<Method>(), Ok(m));
    }
    match "fdr".parse::<Method>() {
        Err(StatsError::UnknownMethod { name, allowed }) => {
            assert_eq!(name, "fdr");
            assert_eq!(allowed, "bonferroni|holm|hochberg|bh|by");
        }
        other => panic!("expected UnknownMethod, got {other:?}"),
    }
    for bad in [f64::NAN, -0.1, 1.5, f64::INFINITY] {
        assert!(matches!(
            adjust(&[0.1, bad], Method::Holm),
            Err(StatsError::InvalidParameter { name: "p", .. })
        ));
    }
    assert_eq!(adjust(&[], Method::BenjaminiYekutieli), Ok(vec![]));
    assert_eq!(reject(&[0.01, 0.2], f64::NAN), vec![false, false]);
}
