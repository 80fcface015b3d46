//! Shared helpers for the statistics tests: named tolerances and loaders for
//! the reference data copied into `tests/data/stats/`.
#![allow(dead_code)]

use std::path::PathBuf;

/// Named tolerances and comparison helpers.
pub mod tol {
    /// Statistic vs generated scipy/statsmodels fixtures (relative).
    pub const STATISTIC_REL: f64 = 1e-9;
    /// p-value vs generated fixtures (relative) ...
    pub const P_REL: f64 = 1e-7;
    /// ... or absolute, whichever is looser.
    pub const P_ABS: f64 = 1e-15;
    /// Distribution-function values vs 50-digit mpmath references (relative).
    pub const DIST_P_REL: f64 = 1e-10;
    /// Quantiles for df ≤ 1e4 (relative).
    pub const QUANTILE_REL: f64 = 1e-12;
    /// Quantiles for df > 1e4 (relative).
    pub const QUANTILE_REL_LARGE_DF: f64 = 1e-9;
    /// NIST e-Handbook Dataplot output (single precision; see REFERENCES.md).
    pub const NIST_DATAPLOT_REL: f64 = 1e-5;
    /// Values reproduced exactly in double precision (relative).
    pub const EXACT_REL: f64 = 1e-11;

    /// Relative difference |a − b| / |b| (|a − b| when b = 0).
    pub fn rel(a: f64, b: f64) -> f64 {
        if b == 0.0 {
            (a - b).abs()
        } else {
            ((a - b) / b).abs()
        }
    }

    /// Asserts |a − b| ≤ rel·|b|.
    #[track_caller]
    pub fn assert_rel(what: &str, a: f64, b: f64, rel_tol: f64) {
        assert!(
            a == b || rel(a, b) <= rel_tol,
            "{what}: got {a:e}, expected {b:e}, rel diff {:e} > {rel_tol:e}",
            rel(a, b)
        );
    }

    /// Asserts |a − b| ≤ abs_tol.
    #[track_caller]
    pub fn assert_abs(what: &str, a: f64, b: f64, abs_tol: f64) {
        assert!(
            (a - b).abs() <= abs_tol,
            "{what}: got {a:e}, expected {b:e}, abs diff {:e} > {abs_tol:e}",
            (a - b).abs()
        );
    }

    /// Value printed to `decimals` places: |a − b| ≤ ½ unit of the last digit
    /// (plus a few ulps for binary rounding of both numbers).
    #[track_caller]
    pub fn assert_printed(what: &str, a: f64, printed: f64, decimals: i32) {
        let half = 0.5 * 10f64.powi(-decimals) * (1.0 + 1e-9) + 8.0 * f64::EPSILON * printed.abs();
        assert_abs(what, a, printed, half);
    }

    /// p-value check: relative P_REL or absolute P_ABS.
    #[track_caller]
    pub fn assert_p(what: &str, a: f64, b: f64) {
        assert!(
            (a - b).abs() <= P_ABS || rel(a, b) <= P_REL,
            "{what}: p got {a:e}, expected {b:e}, rel diff {:e}",
            rel(a, b)
        );
    }

    /// Log relative error (StRD's accuracy measure), capped at 15.
    pub fn lre(computed: f64, certified: f64) -> f64 {
        let r = rel(computed, certified);
        if r == 0.0 {
            15.0
        } else {
            (-r.log10()).min(15.0)
        }
    }
}

/// Directory holding the copied reference data.
pub fn data_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/data/stats")
}

/// Reads a text file from the data directory.
pub fn read_data(name: &str) -> String {
    std::fs::read_to_string(data_dir().join(name))
        .unwrap_or_else(|e| panic!("reading test data {name}: {e}"))
}

/// One number per line.
pub fn load_column(name: &str) -> Vec<f64> {
    read_data(name)
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty())
        .map(|l| l.parse().unwrap_or_else(|e| panic!("{name}: {l:?}: {e}")))
        .collect()
}

/// CSV with a header: returns (header, rows of raw string fields).
pub fn load_csv(name: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let text = read_data(name);
    let mut lines = text.lines().filter(|l| !l.trim().is_empty());
    let header = lines
        .next()
        .unwrap_or_else(|| panic!("{name}: empty"))
        .split(',')
        .map(|s| s.trim().to_string())
        .collect();
    let rows = lines
        .map(|l| l.split(',').map(|s| s.trim().to_string()).collect())
        .collect();
    (header, rows)
}

/// Parses a numeric field; "inf" is +∞.
pub fn num(s: &str) -> f64 {
    s.parse()
        .unwrap_or_else(|e| panic!("not a number: {s:?}: {e}"))
}

/// Two-group CSV (`group,value`): values of the named group, in file order.
pub fn load_group(name: &str, group: &str) -> Vec<f64> {
    let (_, rows) = load_csv(name);
    rows.iter()
        .filter(|r| r[0] == group)
        .map(|r| num(&r[1]))
        .collect()
}

/// Fixture sample data are stored as decimal strings (see the generators) and parsed with
/// Rust's correctly rounded `str::parse` (serde_json's float parsing can be one ulp off).
pub fn strings<'de, D: serde::Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
    use serde::Deserialize;
    let raw: Vec<String> = Vec::deserialize(d)?;
    raw.iter()
        .map(|s| s.parse::<f64>().map_err(serde::de::Error::custom))
        .collect()
}

/// Groups of decimal strings, as [`strings`].
pub fn string_groups<'de, D: serde::Deserializer<'de>>(d: D) -> Result<Vec<Vec<f64>>, D::Error> {
    use serde::Deserialize;
    let raw: Vec<Vec<String>> = Vec::deserialize(d)?;
    raw.iter()
        .map(|g| {
            g.iter()
                .map(|s| s.parse::<f64>().map_err(serde::de::Error::custom))
                .collect()
        })
        .collect()
}
