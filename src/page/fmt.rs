//! Numbers as people write them on a page: a few significant digits, no exponent notation
//! for everyday magnitudes. p-values, degrees of freedom, the missing mark and units of
//! measure come from `crate::numbers`, the one convention of tables, pages and emails.

use crate::numbers::MISSING;

/// A value with `sig` significant digits, trailing zeros kept to that precision, and a
/// `× 10^k` form only for very large or very small magnitudes.
pub fn sig(v: f64, sig: usize) -> String {
    if !v.is_finite() {
        return MISSING.into();
    }
    if v == 0.0 {
        return "0".into();
    }
    let mag = v.abs().log10().floor() as i32;
    if !(-4..6).contains(&mag) {
        let m = v / 10f64.powi(mag);
        return format!("{:.*} × 10^{mag}", sig.saturating_sub(1), m);
    }
    let decimals = (sig as i32 - 1 - mag).max(0) as usize;
    format!("{v:.decimals$}")
}

/// A value or the missing mark.
pub fn opt(v: Option<f64>, digits: usize) -> String {
    v.map_or_else(|| MISSING.into(), |v| sig(v, digits))
}

/// A tick label on an axis: as short as it can be while telling ticks apart.
pub fn axis(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    let s = sig(v, 4);
    if s.contains('.') && !s.contains('×') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// A date-time stored as RFC 3339 UTC text, shown as `2026-03-04 10:20 UTC` (a date alone
/// stays a date).
pub fn when(t: &str) -> String {
    if t.len() >= 16 && t.as_bytes()[10] == b'T' {
        format!("{} {} UTC", &t[..10], &t[11..16])
    } else {
        t.to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_read_as_written_by_hand() {
        assert_eq!(sig(3212.456, 4), "3212");
        assert_eq!(sig(0.012345, 3), "0.0123");
        assert_eq!(sig(1.5, 3), "1.50");
        assert_eq!(sig(f64::NAN, 3), "-");
        assert_eq!(opt(None, 3), "-");
        assert_eq!(axis(2.5), "2.5");
        assert_eq!(axis(3000.0), "3000");
        assert_eq!(when("2026-03-04T10:20:00.000Z"), "2026-03-04 10:20 UTC");
    }
}
