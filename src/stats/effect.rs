//! Effect-size helpers: Hedges' small-sample correction factor.
//!
//! Owns [`hedges_correction`]. Pure computation, no I/O.

use super::dist::half_shift_parts;

/// Exact Hedges correction J(df) = Γ(df/2) / (√(df/2) · Γ((df−1)/2)),
/// the factor that makes Cohen's d unbiased; J(df) → 1 as df → ∞.
/// Returns 0 for df ≤ 1 (the limit at df = 1) and for invalid df.
pub fn hedges_correction(df: f64) -> f64 {
    if df.is_nan() || df <= 1.0 {
        return 0.0;
    }
    if df == f64::INFINITY {
        return 1.0;
    }
    let m = 0.5 * df;
    // With a = m − ½: ln J = R(a) + ½ ln(a/m), where
    // R(a) = ln Γ(a + ½) − ln Γ(a) − ½ ln a = s + ln f (Stirling's series, so
    // no cancellation between two large ln Γ values at large m).
    let a = m - 0.5;
    let (s, f) = half_shift_parts(a);
    s.exp() * f * (a / m).sqrt()
}

#[cfg(test)]
mod tests {
    use super::hedges_correction;

    /// Reference values from mpmath (40 digits):
    /// `gamma(df/2) / (sqrt(df/2) * gamma((df-1)/2))`.
    #[test]
    fn matches_mpmath() {
        let cases = [
            (1.5, 0.390_276_218_869_176_3),
            (2.0, 0.564_189_583_547_756_3),
            (3.0, 0.723_601_254_558_267_7),
            (7.3, 0.892_987_264_305_938_5),
            (20.0, 0.961_944_533_740_748_7),
            (38.5, 0.980_370_682_511_163_4),
            (39.0, 0.980_624_238_680_341_5),
            (41.0, 0.981_576_176_704_517),
            (118.0, 0.993_628_314_869_006),
            (10_000.0, 0.999_924_997_812_429_7),
            (1e8, 0.999_999_992_5),
        ];
        for (df, want) in cases {
            let got = hedges_correction(df);
            assert!(
                ((got - want) / want).abs() < 1e-14,
                "df {df}: {got} vs {want}"
            );
        }
        assert_eq!(hedges_correction(1.0), 0.0);
        assert_eq!(hedges_correction(f64::INFINITY), 1.0);
    }
}
