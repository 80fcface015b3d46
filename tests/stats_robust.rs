//! Robust statistics of the outlier fence and the spread test against reference values from
//! numpy 2.4.6 and scipy 1.17.1 (`tests/fixtures/gen_robust_fixtures.py` writes
//! `tests/fixtures/robust_fixtures.json`): the median (`numpy.median`), the MAD scaled to a
//! normal sd (`scipy.stats.median_abs_deviation(scale="normal")`), the mean absolute
//! deviation from the median, Hill's (1975) estimator from its definition, and the Student t
//! quantiles and tail probabilities the fence and the spread test use (`scipy.stats.t`).

use lotdrift::stats::dist::{t_isf, t_sf};
use lotdrift::stats::robust::{MAD_NORMAL, hill, mad, mean_abs_dev_from_median, median};
use serde::Deserialize;

/// Relative tolerance for order statistics and sums of a few dozen values.
const REL: f64 = 1e-12;
/// Relative tolerance for the t distribution (the rest of the suite holds it to 1e-10 and
/// better against mpmath).
const REL_T: f64 = 1e-9;

#[derive(Deserialize)]
struct Sample {
    kind: String,
    values: Vec<f64>,
    median: f64,
    mad_normal: f64,
    mean_abs_dev_from_median: f64,
    hill_k: usize,
    hill_abs_dev: Option<f64>,
}

#[derive(Deserialize)]
struct TIsf {
    q: f64,
    df: f64,
    value: f64,
}

#[derive(Deserialize)]
struct TSf {
    x: f64,
    df: f64,
    value: f64,
}

#[derive(Deserialize)]
struct Fixtures {
    samples: Vec<Sample>,
    t_isf: Vec<TIsf>,
    t_sf: Vec<TSf>,
}

fn fixtures() -> Fixtures {
    serde_json::from_str(include_str!("fixtures/robust_fixtures.json")).expect("fixture JSON")
}

fn close(got: f64, want: f64, rel: f64) -> bool {
    (got - want).abs() <= rel * want.abs().max(1e-300)
}

#[test]
fn median_mad_and_mean_abs_dev_match_numpy_and_scipy() {
    for s in fixtures().samples {
        let m = median(&s.values).unwrap();
        assert!(
            close(m, s.median, REL),
            "{}: median {m} vs {}",
            s.kind,
            s.median
        );
        let d = MAD_NORMAL * mad(&s.values, m).unwrap();
        assert!(
            close(d, s.mad_normal, 1e-9),
            "{}: MAD {d} vs {}",
            s.kind,
            s.mad_normal
        );
        let a = mean_abs_dev_from_median(&s.values).unwrap();
        assert!(close(a, s.mean_abs_dev_from_median, REL), "{}: {a}", s.kind);
        if let Some(h) = s.hill_abs_dev {
            let abs: Vec<f64> = s.values.iter().map(|v| (v - m).abs()).collect();
            let got = hill(&abs, s.hill_k).unwrap();
            assert!(close(got, h, 1e-10), "{}: Hill {got} vs {h}", s.kind);
        }
    }
}

#[test]
fn t_quantiles_and_tails_of_the_fence_and_spread_test_match_scipy() {
    let f = fixtures();
    for c in f.t_isf {
        let got = t_isf(c.q, c.df).unwrap();
        assert!(
            close(got, c.value, REL_T),
            "t_isf({}, {}) = {got} vs {}",
            c.q,
            c.df,
            c.value
        );
    }
    for c in f.t_sf {
        let got = t_sf(c.x, c.df).unwrap();
        assert!(
            close(got, c.value, REL_T),
            "t_sf({}, {}) = {got} vs {}",
            c.x,
            c.df,
            c.value
        );
    }
}
