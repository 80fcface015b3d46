//! Variance, rank and normality tests against published worked examples.

mod stats_common;

use lotdrift::stats::{
    Alternative, Center, MannWhitneyMethod, Summary, brown_forsythe, f_test, f_test_samples,
    hodges_lehmann, levene, mann_whitney, mann_whitney_with, shapiro_wilk,
};
use stats_common::{load_column, load_csv, load_group, num, tol};

fn gear_batches() -> Vec<Vec<f64>> {
    let (header, rows) = load_csv("nist_gear_diameter_batch.csv");
    assert_eq!(header, ["diameter", "batch"]);
    let mut batches = vec![Vec::new(); 10];
    for r in &rows {
        let b: usize = r[1].parse().expect("batch");
        batches[b - 1].push(num(&r[0]));
    }
    assert!(batches.iter().all(|b| b.len() == 10));
    batches
}

/// NIST/SEMATECH e-Handbook §1.3.5.9 "F-Test for Equality of Two Variances",
/// JAHANMI2.DAT batch 1 vs batch 2 (REFERENCES.md §2). NIST prints Dataplot
/// single-precision output: compare with relative 1e-5, and with the exact
/// double-precision values (scipy / R `var.test`).
#[test]
fn nist_jahanmi2_f_test() {
    let b1 = load_column("nist_jahanmi2_batch1_strength.txt");
    let b2 = load_column("nist_jahanmi2_batch2_strength.txt");
    assert_eq!((b1.len(), b2.len()), (240, 240));
    let (s1, s2) = (
        Summary::from_slice(&b1).unwrap(),
        Summary::from_slice(&b2).unwrap(),
    );
    tol::assert_rel("mean 1 (NIST)", s1.mean(), 688.9987, tol::NIST_DATAPLOT_REL);
    tol::assert_rel("mean 1 (exact)", s1.mean(), 688.99864167, 1e-10);
    tol::assert_rel("sd 1 (NIST)", s1.sd().unwrap(), 65.54909, 1e-7);
    tol::assert_rel("mean 2 (exact)", s2.mean(), 611.155975, 1e-12);
    tol::assert_rel("sd 2 (NIST)", s2.sd().unwrap(), 61.85425, 1e-7);
    let r = f_test(&s1, &s2, Alternative::TwoSided, 0.95).unwrap();
    tol::assert_rel("F (NIST)", r.statistic, 1.123037, tol::NIST_DATAPLOT_REL);
    tol::assert_rel("F (exact)", r.statistic, 1.1230375233, 1e-10);
    assert_eq!((r.df1, r.df2), (239.0, 239.0));
    // Two-sided p: scipy 0.370383 (R 0.3704), cross-library.
    tol::assert_abs("F p", r.p_value, 0.370383, 5e-7);
    // R var.test 95 % interval: F / F(0.975) .. F / F(0.025) with the NIST
    // critical values 1.2894 / 0.7756.
    let (lo, hi) = r.ci.unwrap();
    tol::assert_rel("ci low", lo, 1.1230375233 / 1.2893844, 1e-6);
    tol::assert_rel("ci high", hi, 1.1230375233 / 0.7755639, 1e-6);
    let same = f_test_samples(&b1, &b2, Alternative::TwoSided, 0.95).unwrap();
    assert_eq!(same, r);
    let greater = f_test(&s1, &s2, Alternative::Greater, 0.95).unwrap();
    tol::assert_rel("one-sided p", greater.p_value, r.p_value / 2.0, 1e-12);
    assert_eq!(greater.ci.unwrap().1, f64::INFINITY);
}

/// NIST/SEMATECH e-Handbook §1.3.5.10 "Levene Test for Equality of
/// Variances", GEAR.DAT, 10 batches (REFERENCES.md §2). Published W = 1.705910
/// (Dataplot single precision); exact value 5679/3329 = 1.705917693;
/// p = 0.0990830 (scipy, R 0.09908); mean-centred W = 2.1594599 (computed only).
#[test]
fn nist_gear_levene() {
    let batches = gear_batches();
    let groups: Vec<&[f64]> = batches.iter().map(Vec::as_slice).collect();
    let r = levene(&groups, Center::Median).unwrap();
    tol::assert_rel("W (NIST)", r.statistic, 1.705910, tol::NIST_DATAPLOT_REL);
    tol::assert_rel("W (exact 5679/3329)", r.statistic, 5679.0 / 3329.0, 1e-12);
    assert_eq!((r.df1, r.df2), (9.0, 90.0));
    tol::assert_abs("p", r.p_value, 0.0990830, 5e-8);
    assert_eq!(r.estimate, None);
    assert_eq!(r.ci, None);
    let m = levene(&groups, Center::Mean).unwrap();
    tol::assert_abs("mean-centred W", m.statistic, 2.1594599, 5e-8);
}

#[test]
fn brown_forsythe_two_samples() {
    let batches = gear_batches();
    let (a, b) = (&batches[0], &batches[1]);
    let bf = brown_forsythe(a, b).unwrap();
    let lev = levene(&[a, b], Center::Median).unwrap();
    assert_eq!(bf, lev);
    assert_eq!((bf.df1, bf.df2), (1.0, 18.0));
    // Estimate: mean |a − median(a)| − mean |b − median(b)|.
    let mad = |xs: &[f64]| {
        let mut s = xs.to_vec();
        s.sort_by(f64::total_cmp);
        let med = (s[4] + s[5]) / 2.0;
        xs.iter().map(|x| (x - med).abs()).sum::<f64>() / xs.len() as f64
    };
    tol::assert_rel("estimate", bf.estimate.unwrap(), mad(a) - mad(b), 1e-12);
}

/// R. Shier (2004), "Statistics: 2.3 The Mann-Whitney U Test", Mathematics
/// Learning Support Centre: diabetes ages, 5 men vs 4 women, no ties.
/// Published U_M = 17, U_F = 3, exact two-sided p = 0.11 (scipy 0.111111,
/// R `wilcox.test` W = 17, p = 0.1111) (REFERENCES.md §6).
#[test]
fn shier_2004_exact() {
    let men = load_group("mw_shier2004_diabetes_ages.csv", "male");
    let women = load_group("mw_shier2004_diabetes_ages.csv", "female");
    let r = mann_whitney(&men, &women, Alternative::TwoSided).unwrap();
    assert_eq!(r.method, MannWhitneyMethod::Exact);
    assert_eq!((r.statistic, r.u_b), (17.0, 3.0));
    tol::assert_printed("published p", r.p_value, 0.11, 2);
    // Exact: P(U >= 17) = 7/126 (counting), doubled.
    tol::assert_rel("exact p", r.p_value, 14.0 / 126.0, 1e-14);
    assert!(!r.ties && r.z.is_none());
}

/// Hollander & Wolfe (1973) p. 69, permeability example in R's
/// `?wilcox.test`: W = 35, exact one-sided (greater) p = 0.127206
/// (R 0.1272) (REFERENCES.md §6, cross-library).
#[test]
fn hollander_wolfe_permeability() {
    let x = load_group("mw_hollander_wolfe_permeability.csv", "x");
    let y = load_group("mw_hollander_wolfe_permeability.csv", "y");
    let r = mann_whitney(&x, &y, Alternative::Greater).unwrap();
    assert_eq!(r.method, MannWhitneyMethod::Exact);
    assert_eq!(r.statistic, 35.0);
    tol::assert_abs("p", r.p_value, 0.127206, 5e-7);
}

/// R `datasets::airquality`, Ozone in May vs August (NAs dropped), example in
/// R's `?wilcox.test`: ties present; W = 127.5, two-sided p with tie and
/// continuity correction 1.208078e-4 (REFERENCES.md §6, cross-library).
#[test]
fn airquality_ozone_ties() {
    let (_, rows) = load_csv("mw_airquality_ozone_may_aug.csv");
    let pick = |m: &str| {
        rows.iter()
            .filter(|r| r[0] == m)
            .map(|r| num(&r[1]))
            .collect::<Vec<_>>()
    };
    let (may, aug) = (pick("5"), pick("8"));
    assert_eq!((may.len(), aug.len()), (26, 26));
    let r = mann_whitney(&may, &aug, Alternative::TwoSided).unwrap();
    assert_eq!(r.method, MannWhitneyMethod::Asymptotic);
    assert!(r.ties);
    assert_eq!(r.statistic, 127.5);
    tol::assert_rel("p", r.p_value, 1.208078e-4, 1e-6);
    // Exact is refused when there are ties.
    assert!(
        mann_whitney_with(&may, &aug, Alternative::TwoSided, MannWhitneyMethod::Exact).is_err()
    );
}

#[test]
fn hodges_lehmann_small() {
    // Differences of {1, 2, 10} − {0, 4}: 1, −3, 2, −2, 10, 6 → median of
    // {−3, −2, 1, 2, 6, 10} = 1.5.
    assert_eq!(hodges_lehmann(&[1.0, 2.0, 10.0], &[0.0, 4.0]), Ok(1.5));
    assert_eq!(hodges_lehmann(&[5.0], &[2.0]), Ok(3.0));
    // Odd number of pairs.
    assert_eq!(hodges_lehmann(&[1.0, 2.0, 3.0], &[0.0]), Ok(2.0));
    // Brute force on a larger sample.
    let a: Vec<f64> = (0..37)
        .map(|i| ((i * 7919) % 101) as f64 * 0.37 - 3.0)
        .collect();
    let b: Vec<f64> = (0..24)
        .map(|i| ((i * 104_729) % 89) as f64 * 0.41)
        .collect();
    let mut d: Vec<f64> = a
        .iter()
        .flat_map(|x| b.iter().map(move |y| x - y))
        .collect();
    d.sort_by(f64::total_cmp);
    let n = d.len();
    let want = (d[n / 2 - 1] + d[n / 2]) / 2.0;
    tol::assert_rel(
        "HL brute force",
        hodges_lehmann(&a, &b).unwrap(),
        want,
        1e-15,
    );
}

/// Shapiro & Wilk (1965), Biometrika 52:591–611, weights of 11 men:
/// published W = 0.79 (2 dp); scipy W = 0.78881469, p = 0.0067038
/// (R `shapiro.test` W = 0.78881, p = 0.006704) (REFERENCES.md §6).
#[test]
fn shapiro_wilk_1965_weights() {
    let x = load_column("shapiro_wilk_1965_weights.txt");
    assert_eq!(x.len(), 11);
    let r = shapiro_wilk(&x).unwrap();
    tol::assert_printed("published W", r.statistic, 0.79, 2);
    tol::assert_abs("W (scipy)", r.statistic, 0.78881469, 5e-9);
    tol::assert_abs("p (scipy)", r.p_value, 0.0067038, 5e-8);
    assert_eq!(r.n, 11);
}

#[test]
fn shapiro_wilk_n3_exact_formula() {
    // n = 3: W = 3/4 + ... and p = 6/π (asin √W − asin √(3/4)); equally
    // spaced values give W = 1, p = 1.
    let r = shapiro_wilk(&[1.0, 2.0, 3.0]).unwrap();
    tol::assert_rel("W", r.statistic, 1.0, 1e-15);
    tol::assert_rel("p", r.p_value, 1.0, 1e-12);
    let r = shapiro_wilk(&[1.0, 2.0, 10.0]).unwrap();
    let w = r.statistic;
    let p = 6.0 / std::f64::consts::PI * (w.sqrt().asin() - 0.75f64.sqrt().asin());
    tol::assert_rel("p n=3", r.p_value, p, 1e-14);
}
