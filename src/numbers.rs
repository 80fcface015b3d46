//! Numbers as people write them in a table, on a page or in an email: values rounded to what
//! the data support, p-values as `0.0012` or `< 1e-9`, never e-notation for an sd.
//!
//! **One convention**: tables (`report`), pages (`page`) and alert emails (`alert`) write
//! p-values, degrees of freedom, missing values and units of measure through this module, so
//! the same number reads the same everywhere.

/// Bytes as lower-case hex, two digits each: content digests and tokens.
pub fn hex(bytes: &[u8]) -> String {
    use std::fmt::Write;
    bytes
        .iter()
        .fold(String::with_capacity(bytes.len() * 2), |mut s, b| {
            let _ = write!(s, "{b:02x}");
            s
        })
}

/// What stands for a value that is absent or not finite.
pub const MISSING: &str = "-";

/// A formatted value followed by its unit of measure, `3001.2 mAh` (the value alone without
/// one, or when it is the missing mark).
pub fn with_unit(value: String, unit: Option<&str>) -> String {
    match unit {
        Some(u) if value != MISSING => format!("{value} {u}"),
        _ => value,
    }
}

/// The decimals that show a quantity whose natural scale (its sd, say) is `scale` with two
/// significant digits of that scale: scale 1.5 → 1 decimal, 0.012 → 3, 250 → 0.
pub fn decimals_for(scale: f64) -> usize {
    if !(scale.is_finite() && scale > 0.0) {
        return 3;
    }
    (1 - scale.log10().floor() as i64).clamp(0, 9) as usize
}

/// A value with `decimals` decimals, or `-` when absent or not finite.
pub fn fixed(v: Option<f64>, decimals: usize) -> String {
    match v {
        Some(v) if v.is_finite() => format!("{v:.decimals$}"),
        _ => MISSING.into(),
    }
}

/// A signed difference with `decimals` decimals (`+3.1`, `-0.40`).
pub fn signed(v: Option<f64>, decimals: usize) -> String {
    match v {
        Some(v) if v.is_finite() => format!("{v:+.decimals$}"),
        _ => MISSING.into(),
    }
}

/// A value with two significant digits in plain decimals (a standard deviation, a ratio):
/// `1.5`, `0.012`, `250`.
pub fn two_digits(v: Option<f64>) -> String {
    match v {
        Some(0.0) => "0".into(),
        Some(v) if v.is_finite() => fixed(Some(v), decimals_for(v.abs())),
        _ => MISSING.into(),
    }
}

/// Smallest p-value written out; below it a p-value is `< 1e-9` (the tail of a test's
/// reference distribution is not that precise, and nobody reads more digits).
const P_FLOOR: f64 = 1e-9;

/// Smallest p-value written in plain decimals (`0.00012`); below it `2.3e-5`.
const P_PLAIN: f64 = 1e-4;

/// A p-value (or a level) as people write it: two significant digits without trailing zeros,
/// plain decimals down to 0.0001 (`0.31`, `0.047`, `0.0012`, `0.00012`), then `2.3e-5`, and
/// `< 1e-9` below that; `-` when absent. The only p-value format of tables, pages and emails.
pub fn p_value(p: Option<f64>) -> String {
    match p {
        None => MISSING.into(),
        Some(p) if !p.is_finite() => MISSING.into(),
        Some(p) if p < P_FLOOR => "< 1e-9".into(),
        Some(p) if p >= P_PLAIN => {
            let s = fixed(Some(p), decimals_for(p).max(2));
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        }
        Some(p) => format!("{p:.1e}"),
    }
}

/// A p-value after its name: `= 0.0012` or `< 1e-9`.
pub fn p_is(p: Option<f64>) -> String {
    let s = p_value(p);
    if s.starts_with('<') {
        s
    } else {
        format!("= {s}")
    }
}

/// Degrees of freedom: whole numbers as such, else one decimal; an F test's two (`9 and 620`).
pub fn df(df: Option<f64>, df2: Option<f64>) -> String {
    let one = |d: f64| {
        if (d - d.round()).abs() < 1e-9 {
            format!("{}", d.round())
        } else {
            format!("{d:.1}")
        }
    };
    match (df, df2) {
        (Some(a), Some(b)) => format!("{} and {}", one(a), one(b)),
        (Some(a), None) => one(a),
        (None, _) => MISSING.into(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn p_values_read_as_written_by_hand() {
        assert_eq!(p_value(Some(0.594)), "0.59");
        assert_eq!(p_value(Some(0.0474)), "0.047");
        assert_eq!(p_value(Some(0.00123)), "0.0012");
        assert_eq!(p_value(Some(0.5)), "0.5");
        assert_eq!(p_value(Some(1.0)), "1");
        assert_eq!(p_value(Some(2.34e-5)), "2.3e-5");
        assert_eq!(p_value(Some(3e-12)), "< 1e-9");
        assert_eq!(p_value(Some(0.0)), "< 1e-9");
        assert_eq!(p_value(None), "-");
        assert_eq!(p_value(Some(0.000123)), "0.00012");
        assert_eq!(p_value(Some(9.96e-5)), "1.0e-4");
        assert_eq!(p_is(Some(0.0012)), "= 0.0012");
        assert_eq!(p_is(Some(1e-12)), "< 1e-9");
    }

    #[test]
    fn degrees_of_freedom_and_units_read_as_written_by_hand() {
        assert_eq!(df(Some(19.0), None), "19");
        assert_eq!(df(Some(13.52), None), "13.5");
        assert_eq!(df(Some(9.0), Some(620.0)), "9 and 620");
        assert_eq!(df(None, None), "-");
        assert_eq!(with_unit("3001.2".into(), Some("mAh")), "3001.2 mAh");
        assert_eq!(with_unit("3001.2".into(), None), "3001.2");
        assert_eq!(with_unit(MISSING.into(), Some("mAh")), "-");
    }

    #[test]
    fn values_keep_the_digits_their_scale_supports() {
        assert_eq!(decimals_for(1.495), 1);
        assert_eq!(decimals_for(0.0123), 3);
        assert_eq!(decimals_for(250.0), 0);
        assert_eq!(two_digits(Some(1.495)), "1.5");
        assert_eq!(two_digits(Some(0.01234)), "0.012");
        assert_eq!(two_digits(Some(12.6)), "13");
        assert_eq!(fixed(Some(3001.234), decimals_for(1.495)), "3001.2");
        assert_eq!(signed(Some(-0.4), 2), "-0.40");
    }
}
