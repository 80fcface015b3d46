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
    let mut out = String::new();
    push_fixed(&mut out, v, decimals);
    out
}

/// [`fixed`] appended to `out`.
///
/// The text is always the one `format!("{v:.decimals$}")` writes (the exact binary value
/// rounded half to even). Where one multiplication decides that rounding the digits come from
/// it, at a fraction of the exact formatter's cost (a long `history` formats hundreds of
/// thousands of values).
pub fn push_fixed(out: &mut String, v: Option<f64>, decimals: usize) {
    use std::fmt::Write as _;
    match v {
        Some(v) if v.is_finite() => {
            if !push_fixed_from_product(out, v, decimals) {
                let _ = write!(out, "{v:.decimals$}");
            }
        }
        _ => out.push_str(MISSING),
    }
}

/// Writes `v` (finite) with `d` decimals from `t = v * 10^d` computed in floating point, or
/// returns `false` having written nothing when `t` does not decide the rounding.
///
/// Why `t` decides it: 10^d is exact for these `d`, so `t` is the exact product rounded once,
/// within half an ulp of `t` of it, and an ulp of `t` is at most `t * EPSILON`. When `t`'s
/// fraction is further than that from one half, the exact product lies on the same side of
/// the half and rounds to the same whole number. Exact ties and near-ties (and every `t` from
/// 2^51 up, whose fraction that bound cannot resolve) go to the exact formatter; `LIMIT` only
/// keeps the whole number far inside a `u64`.
fn push_fixed_from_product(out: &mut String, v: f64, d: usize) -> bool {
    const LIMIT: f64 = (1u64 << 50) as f64;
    const POW10: [f64; 13] = [
        1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12,
    ];
    let Some(scale) = POW10.get(d) else {
        return false;
    };
    let t = v.abs() * scale;
    if t >= LIMIT {
        return false;
    }
    let below = t.floor();
    let fraction = t - below;
    if (fraction - 0.5).abs() <= t * f64::EPSILON {
        return false;
    }
    let whole = below as u64 + u64::from(fraction > 0.5);
    if v.is_sign_negative() {
        out.push('-');
    }
    push_digits(out, whole, d);
    true
}

/// `whole / 10^d` in decimal with `d` decimals (`whole` 31415, `d` 3: `31.415`).
fn push_digits(out: &mut String, mut whole: u64, d: usize) {
    let mut buffer = [b'0'; 24];
    let mut at = buffer.len();
    while whole > 0 || buffer.len() - at <= d {
        at -= 1;
        buffer[at] = b'0' + (whole % 10) as u8;
        whole /= 10;
    }
    let digits = &buffer[at..];
    let point = digits.len() - d;
    out.extend(digits[..point].iter().map(|b| char::from(*b)));
    if d > 0 {
        out.push('.');
        out.extend(digits[point..].iter().map(|b| char::from(*b)));
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
    let mut out = String::new();
    push_p_value(&mut out, p);
    out
}

/// [`p_value`] appended to `out`.
pub fn push_p_value(out: &mut String, p: Option<f64>) {
    match p {
        None => out.push_str(MISSING),
        Some(p) if !p.is_finite() => out.push_str(MISSING),
        Some(p) if p < P_FLOOR => out.push_str("< 1e-9"),
        Some(p) if p >= P_PLAIN => {
            let start = out.len();
            push_fixed(out, Some(p), decimals_for(p).max(2));
            let kept = out[start..]
                .trim_end_matches('0')
                .trim_end_matches('.')
                .len();
            out.truncate(start + kept);
        }
        Some(p) => {
            use std::fmt::Write as _;
            let _ = write!(out, "{p:.1e}");
        }
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

    /// The fast path writes what Rust's exact formatter writes (the reference here), for any
    /// finite value and 0 to 13 decimals: random bit patterns of every magnitude, gauge-like
    /// values with few decimals, rounding boundaries (…5 at decimal d + 1) and their
    /// neighbours one ulp away, carries (9.9996) and signed zeros.
    #[test]
    fn fixed_decimals_are_those_of_the_exact_formatter() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand::rngs::StdRng::seed_from_u64(20261203);
        let check = |v: f64, d: usize| {
            assert_eq!(
                fixed(Some(v), d),
                format!("{v:.d$}"),
                "{v:e} with {d} decimals"
            );
        };
        let mut from_product = 0;
        for _ in 0..200_000 {
            let d = rng.random_range(0..=13);
            let bits = f64::from_bits(rng.random::<u64>());
            if bits.is_finite() {
                check(bits, d);
            }
            let gauge = rng.random_range(-1e6..1e6_f64);
            let places = rng.random_range(0..=6);
            let gauge = (gauge * 10f64.powi(places)).round() / 10f64.powi(places);
            check(gauge, d);
            let mut out = String::new();
            from_product += usize::from(push_fixed_from_product(&mut out, gauge, d));
            let boundary =
                ((rng.random_range(-1e7..1e7_f64)).round() * 10.0 + 5.0) / 10f64.powi(d as i32 + 1);
            for v in [boundary, boundary.next_up(), boundary.next_down()] {
                check(v, d);
            }
        }
        // The fast path is the one mostly taken for gauge values, not the exact formatter.
        assert!(from_product > 100_000, "{from_product}");
        for v in [
            0.0, -0.0, -1e-9, 9.9996, 99.5, 0.5, 1.5, 2.5, 2.675, 1e-300, -1e300,
        ] {
            for d in 0..=13 {
                check(v, d);
            }
        }
        assert_eq!(fixed(Some(f64::NAN), 2), "-");
        assert_eq!(fixed(None, 2), "-");
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
