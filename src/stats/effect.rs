//! Effect-size helpers: Hedges' small-sample correction factor.
//!
//! Owns [`hedges_correction`]. Pure computation, no I/O.

use super::dist::ln_gamma_pos;

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
    let ln_j = if m >= 20.0 {
        // ln Γ(m) − ln Γ(m − ½) − ½ ln m from Stirling's series, free of the
        // cancellation between two large ln Γ values.
        -(m - 1.0) * (-0.5 / m).ln_1p() - 0.5 + stirling_diff(m)
    } else {
        ln_gamma_pos(m) - ln_gamma_pos(m - 0.5) - 0.5 * m.ln()
    };
    ln_j.exp()
}

/// δ(m) − δ(m − ½) for m ≥ 20, with δ the Stirling error.
fn stirling_diff(m: f64) -> f64 {
    let d = |z: f64| {
        let r = 1.0 / z;
        let r2 = r * r;
        r * (1.0 / 12.0 - r2 * (1.0 / 360.0 - r2 * (1.0 / 1260.0 - r2 / 1680.0)))
    };
    d(m) - d(m - 0.5)
}
