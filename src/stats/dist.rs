//! Distribution functions with relative accuracy in the far tails: Student t,
//! Fisher F and standard normal cdf / survival function / quantiles.
//!
//! Owns the numerical kernels the tests rely on; does no I/O.
//!
//! * The regularized incomplete beta function `I_x(a, b)` is evaluated by the
//!   classical continued fraction (Abramowitz & Stegun 26.5.8) with the modified
//!   Lentz method, always on the side where the fraction converges and the
//!   wanted tail is small, so upper tails are computed directly, never as
//!   `1 - cdf`. The prefactor `x^a (1-x)^b / B(a, b)` is formed in logarithms
//!   from Stirling-series corrections and Loader's (2000) deviance function
//!   `bd0`, which avoids the cancellation of `ln Γ` differences at large degrees
//!   of freedom.
//! * The normal tail uses the series A&S 26.2.11 near the centre and Laplace's
//!   continued fraction A&S 26.2.14 beyond |z| = 3, with `exp(-z²/2)` evaluated
//!   from an exactly split argument.
//! * Quantiles: the normal quantile starts from A&S 26.2.23 and is polished by
//!   Halley steps; t and F quantiles are found by a safeguarded Newton iteration
//!   on the logarithm of the tail probability in `ln x`, inside a bracket that
//!   falls back to bisection, with a hard iteration cap. Every input gives a
//!   number (possibly `±inf` for `p` of exactly 0 or 1, or when the quantile
//!   exceeds the f64 range) or a typed error.

use super::StatsError;
use statrs::function::gamma::ln_gamma;

/// ½·ln(2π).
const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;
/// 1/√(2π).
const INV_SQRT_2PI: f64 = 0.398_942_280_401_432_7;
const LN_2: f64 = std::f64::consts::LN_2;
/// Guard against division by zero in the Lentz recursion.
const LENTZ_TINY: f64 = 1e-300;

// ---------------------------------------------------------------------------
// Parameter checks
// ---------------------------------------------------------------------------

fn check_prob(name: &'static str, p: f64) -> Result<(), StatsError> {
    if p.is_nan() || !(0.0..=1.0).contains(&p) {
        Err(StatsError::InvalidParameter { name, value: p })
    } else {
        Ok(())
    }
}

fn check_df(name: &'static str, df: f64, allow_inf: bool) -> Result<(), StatsError> {
    let ok = df > 0.0 && (df.is_finite() || (allow_inf && df == f64::INFINITY));
    if ok {
        Ok(())
    } else {
        Err(StatsError::InvalidParameter { name, value: df })
    }
}

fn check_x(x: f64) -> Result<(), StatsError> {
    if x.is_nan() {
        Err(StatsError::NonFinite)
    } else {
        Ok(())
    }
}

// ---------------------------------------------------------------------------
// Gamma-function helpers
// ---------------------------------------------------------------------------

/// Stirling error δ(z) = ln Γ(z) − [(z − ½) ln z − z + ½ ln 2π], z > 0.
fn stirling_err(z: f64) -> f64 {
    if z >= 10.0 {
        let r = 1.0 / z;
        let r2 = r * r;
        // Coefficients B_{2k} / (2k (2k − 1)), k = 1..7.
        r * (1.0 / 12.0
            - r2 * (1.0 / 360.0
                - r2 * (1.0 / 1260.0
                    - r2 * (1.0 / 1680.0
                        - r2 * (1.0 / 1188.0 - r2 * (691.0 / 360_360.0 - r2 / 156.0))))))
    } else {
        ln_gamma(z) - (z - 0.5) * z.ln() + z - HALF_LN_2PI
    }
}

/// ln Γ(z) for z > 0, accurate in absolute terms also for large z.
pub(crate) fn ln_gamma_pos(z: f64) -> f64 {
    if z >= 10.0 {
        (z - 0.5) * z.ln() - z + HALF_LN_2PI + stirling_err(z)
    } else {
        ln_gamma(z)
    }
}

/// Loader's deviance term `x ln(x/m) + m − x` for x > 0, m ≥ 0, with
/// `ln_ratio = ln(x/m)` supplied accurately by the caller.
fn bd0(x: f64, m: f64, ln_ratio: f64) -> f64 {
    if m > 0.0 && (x - m).abs() < 0.1 * (x + m) {
        let v = (x - m) / (x + m);
        let v2 = v * v;
        let mut sum = (x - m) * v;
        let mut pow = 2.0 * x * v;
        let mut j = 1.0;
        for _ in 0..200 {
            pow *= v2;
            j += 2.0;
            let next = sum + pow / j;
            if next == sum {
                break;
            }
            sum = next;
        }
        sum
    } else {
        x * ln_ratio + m - x
    }
}

/// ln of the incomplete-beta prefactor `x^a y^b / B(a, b)` (y = 1 − x).
fn ln_beta_prefactor(a: f64, b: f64, x: f64, y: f64, ln_x: f64, ln_y: f64) -> f64 {
    let s = a + b;
    let big_a = x * s;
    let big_b = y * s;
    let ln_ra = -(b / a).ln_1p() - ln_x; // ln(a / (x s))
    let ln_rb = -(a / b).ln_1p() - ln_y; // ln(b / (y s))
    let half_ln_h = if a >= b {
        0.5 * (b.ln() - (b / a).ln_1p())
    } else {
        0.5 * (a.ln() - (a / b).ln_1p())
    };
    -bd0(a, big_a, ln_ra) - bd0(b, big_b, ln_rb) + half_ln_h
        - HALF_LN_2PI
        - stirling_err(a)
        - stirling_err(b)
        + stirling_err(s)
}

/// Continued fraction of I_x(a, b) (A&S 26.5.8) by modified Lentz:
/// I_x(a, b) = prefactor · cf / a. Converges well for x < (a+1)/(a+b+2).
fn beta_cf(a: f64, b: f64, x: f64) -> Result<f64, StatsError> {
    let fix = |v: f64| {
        if v.abs() < LENTZ_TINY { LENTZ_TINY } else { v }
    };
    let mut c = 1.0;
    let mut d = 1.0 / fix(1.0 - (a + b) * x / (a + 1.0));
    let mut h = d;
    let max_iter = 100_000 + (50.0 * a.max(b).sqrt()).min(1.0e7) as u64;
    let mut m = 0.0_f64;
    for _ in 0..max_iter {
        m += 1.0;
        let m2 = 2.0 * m;
        let even = m * (b - m) * x / ((a + m2 - 1.0) * (a + m2));
        d = 1.0 / fix(1.0 + even * d);
        c = fix(1.0 + even / c);
        h *= d * c;
        let odd = -(a + m) * (a + b + m) * x / ((a + m2) * (a + m2 + 1.0));
        d = 1.0 / fix(1.0 + odd * d);
        c = fix(1.0 + odd / c);
        let del = d * c;
        h *= del;
        if (del - 1.0).abs() <= f64::EPSILON {
            return Ok(h);
        }
    }
    Err(StatsError::NoConvergence {
        what: "incomplete beta continued fraction",
    })
}

/// Both tails of the beta distribution at x, in logarithms.
struct BetaTails {
    /// ln I_x(a, b).
    ln_lower: f64,
    /// ln (1 − I_x(a, b)).
    ln_upper: f64,
    /// ln (x^a y^b / B(a, b)).
    ln_pref: f64,
}

fn beta_tails(
    a: f64,
    b: f64,
    x: f64,
    y: f64,
    ln_x: f64,
    ln_y: f64,
) -> Result<BetaTails, StatsError> {
    if ln_x == f64::NEG_INFINITY {
        return Ok(BetaTails {
            ln_lower: f64::NEG_INFINITY,
            ln_upper: 0.0,
            ln_pref: f64::NEG_INFINITY,
        });
    }
    if ln_y == f64::NEG_INFINITY {
        return Ok(BetaTails {
            ln_lower: 0.0,
            ln_upper: f64::NEG_INFINITY,
            ln_pref: f64::NEG_INFINITY,
        });
    }
    let ln_pref = ln_beta_prefactor(a, b, x, y, ln_x, ln_y);
    if x * (a + b + 2.0) < a + 1.0 {
        let cf = beta_cf(a, b, x)?;
        let ln_lower = (ln_pref + (cf / a).ln()).min(0.0);
        let ln_upper = (-ln_lower.exp()).ln_1p();
        Ok(BetaTails {
            ln_lower,
            ln_upper,
            ln_pref,
        })
    } else {
        let cf = beta_cf(b, a, y)?;
        let ln_upper = (ln_pref + (cf / b).ln()).min(0.0);
        let ln_lower = (-ln_upper.exp()).ln_1p();
        Ok(BetaTails {
            ln_lower,
            ln_upper,
            ln_pref,
        })
    }
}

/// (x, y, ln x, ln y) with x = 1/(1+r), y = r/(1+r), given r ≥ 0 by value
/// and by logarithm (the logarithm is used when r is out of range).
fn split_ratio(r: f64, ln_r: f64) -> (f64, f64, f64, f64) {
    if r > 1e-300 && r < 1e300 {
        (
            1.0 / (1.0 + r),
            r / (1.0 + r),
            -r.ln_1p(),
            -(1.0 / r).ln_1p(),
        )
    } else if ln_r > 0.0 {
        let inv = (-ln_r).exp();
        (inv, 1.0, -ln_r - inv.ln_1p(), -inv.ln_1p())
    } else {
        let rr = ln_r.exp();
        (1.0, rr, -rr.ln_1p(), ln_r - rr.ln_1p())
    }
}

// ---------------------------------------------------------------------------
// Normal distribution
// ---------------------------------------------------------------------------

/// exp(−z²/2) with the square formed from an exact split of z.
fn exp_neg_half_sq(z: f64) -> f64 {
    let z = z.abs();
    let hi = (z * 65_536.0).floor() / 65_536.0;
    let lo = z - hi;
    (-0.5 * hi * hi).exp() * (-lo * (hi + 0.5 * lo)).exp()
}

fn norm_pdf(z: f64) -> f64 {
    INV_SQRT_2PI * exp_neg_half_sq(z)
}

/// Upper tail Q(z) = P(Z > z) for any finite or infinite z.
pub(crate) fn norm_sf_raw(z: f64) -> f64 {
    if z.is_nan() {
        return f64::NAN;
    }
    if z < 0.0 {
        return 1.0 - norm_sf_raw(-z).min(0.5);
    }
    if z == f64::INFINITY || z > 40.0 {
        return 0.0;
    }
    if z < 3.0 {
        // Φ(z) − ½ = φ(z) Σ z^{2n+1} / (2n+1)!!   (A&S 26.2.11)
        let z2 = z * z;
        let mut term = z;
        let mut sum = z;
        let mut k = 1.0;
        for _ in 0..200 {
            k += 2.0;
            term *= z2 / k;
            let next = sum + term;
            if next == sum {
                break;
            }
            sum = next;
        }
        return 0.5 - norm_pdf(z) * sum;
    }
    // Laplace continued fraction Q(z) = φ(z) / (z + 1/(z + 2/(z + 3/(z + …))))
    let mut f = z;
    let mut c = z;
    let mut d = 0.0;
    let mut n = 0.0;
    for _ in 0..5_000 {
        n += 1.0;
        d = 1.0 / {
            let v = z + n * d;
            if v.abs() < LENTZ_TINY { LENTZ_TINY } else { v }
        };
        c = z + n / c;
        let del = c * d;
        f *= del;
        if (del - 1.0).abs() <= f64::EPSILON {
            break;
        }
    }
    norm_pdf(z) / f
}

/// Standard normal cdf Φ(x).
pub fn normal_cdf(x: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    Ok(norm_sf_raw(-x))
}

/// Standard normal survival function 1 − Φ(x), computed directly.
pub fn normal_sf(x: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    Ok(norm_sf_raw(x))
}

/// Lower-tail normal quantile for 0 < p ≤ ½ (result ≤ 0).
fn norm_lower_quantile(p: f64) -> f64 {
    if p == 0.5 {
        return 0.0;
    }
    // A&S 26.2.23 starting value (|error| < 4.5e-4).
    let t = (-2.0 * p.ln()).sqrt();
    let num = 2.515_517 + t * (0.802_853 + t * 0.010_328);
    let den = 1.0 + t * (1.432_788 + t * (0.189_269 + t * 0.001_308));
    let mut x = -(t - num / den);
    for _ in 0..12 {
        let pdf = norm_pdf(x);
        if pdf == 0.0 {
            break;
        }
        let u = (norm_sf_raw(-x) - p) / pdf;
        let step = u / (1.0 + 0.5 * x * u);
        x -= step;
        if step.abs() <= 1e-15 * x.abs().max(1e-300) {
            break;
        }
    }
    x.min(0.0)
}

/// Standard normal quantile Φ⁻¹(p); ±inf at p = 0 / 1.
pub fn normal_quantile(p: f64) -> Result<f64, StatsError> {
    check_prob("p", p)?;
    Ok(norm_quantile_raw(p))
}

fn norm_quantile_raw(p: f64) -> f64 {
    if p == 0.0 {
        f64::NEG_INFINITY
    } else if p == 1.0 {
        f64::INFINITY
    } else if p <= 0.5 {
        norm_lower_quantile(p)
    } else {
        -norm_lower_quantile(1.0 - p)
    }
}

/// Inverse survival function of the standard normal: the z with Q(z) = q.
pub fn normal_isf(q: f64) -> Result<f64, StatsError> {
    check_prob("q", q)?;
    Ok(-norm_quantile_raw(q))
}

// ---------------------------------------------------------------------------
// Student t
// ---------------------------------------------------------------------------

/// Logarithms of the tails of Student t at t: (ln sf, ln cdf, ln P) with
/// d sf / d ln|t| = −P (for t > 0).
pub(crate) fn t_ln_tails(t: f64, df: f64) -> Result<(f64, f64, f64), StatsError> {
    if t == 0.0 {
        return Ok((-LN_2, -LN_2, f64::NEG_INFINITY));
    }
    if t.is_infinite() {
        return Ok(if t > 0.0 {
            (f64::NEG_INFINITY, 0.0, f64::NEG_INFINITY)
        } else {
            (0.0, f64::NEG_INFINITY, f64::NEG_INFINITY)
        });
    }
    if df == f64::INFINITY {
        let q = norm_sf_raw(t.abs());
        let ln_small = q.ln();
        let ln_big = (-q).ln_1p();
        let ln_pref = t.abs().ln() + norm_pdf(t).ln();
        return Ok(if t > 0.0 {
            (ln_small, ln_big, ln_pref)
        } else {
            (ln_big, ln_small, ln_pref)
        });
    }
    let at = t.abs();
    let r = (at * at) / df;
    let ln_r = 2.0 * at.ln() - df.ln();
    let (x, y, ln_x, ln_y) = split_ratio(r, ln_r);
    let tails = beta_tails(0.5 * df, 0.5, x, y, ln_x, ln_y)?;
    // sf(|t|) = ½ I_x(ν/2, ½)
    let ln_small = tails.ln_lower - LN_2;
    let ln_big = (-0.5 * tails.ln_lower.exp()).ln_1p();
    Ok(if t > 0.0 {
        (ln_small, ln_big, tails.ln_pref)
    } else {
        (ln_big, ln_small, tails.ln_pref)
    })
}

/// Student t cdf P(T ≤ x) with `df` degrees of freedom (df > 0, may be +inf).
pub fn t_cdf(x: f64, df: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_df("df", df, true)?;
    Ok(t_ln_tails(x, df)?.1.exp())
}

/// Student t survival function P(T > x), computed directly in the upper tail.
pub fn t_sf(x: f64, df: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_df("df", df, true)?;
    Ok(t_ln_tails(x, df)?.0.exp())
}

/// Two-sided p-value 2·P(T > |t|), capped at 1 (validated inputs).
pub(crate) fn t_two_sided_raw(t: f64, df: f64) -> Result<f64, StatsError> {
    let (ln_sf, _, _) = t_ln_tails(t.abs(), df)?;
    Ok((ln_sf + LN_2).exp().min(1.0))
}

/// Safeguarded Newton iteration in u for h(u) = ln tail(u) − target, tail
/// decreasing in u, on [u_min, u_max]. `eval(u)` returns (ln tail, ln P) with
/// d tail / du = −P. Returns u (clamped to the bounds when the root lies
/// outside them).
fn solve_decreasing(
    target: f64,
    u0: f64,
    u_min: f64,
    u_max: f64,
    eval: &dyn Fn(f64) -> Result<(f64, f64), StatsError>,
) -> Result<f64, StatsError> {
    let mut lo = u_min;
    let mut hi = u_max;
    let mut u = if u0.is_finite() {
        u0.clamp(u_min, u_max)
    } else {
        0.0_f64.clamp(u_min, u_max)
    };
    for _ in 0..400 {
        let (lt, lp) = eval(u)?;
        let h = lt - target;
        if h == 0.0 {
            return Ok(u);
        }
        if h > 0.0 {
            lo = u;
        } else {
            hi = u;
        }
        let slope = -(lp - lt).exp();
        let newton = u - h / slope;
        let (next, newton_ok) = if newton.is_finite() && newton > lo && newton < hi {
            (newton, true)
        } else {
            (0.5 * (lo + hi), false)
        };
        let step = (next - u).abs();
        let scale = next.abs().max(1.0);
        u = next;
        // Once a Newton step is below 1e-9 (relative), the quadratic
        // convergence makes the error after it negligible.
        if (newton_ok && step <= 1e-9 * scale) || hi - lo <= 4.0 * f64::EPSILON * scale {
            return Ok(u);
        }
    }
    Ok(u)
}

const U_MAX: f64 = 709.0;
const U_MIN: f64 = -744.0;

/// Upper-tail t quantile for 0 < q < ½ (positive result).
fn t_upper_quantile(q: f64, df: f64) -> Result<f64, StatsError> {
    let z = -norm_lower_quantile(q);
    if df == f64::INFINITY {
        return Ok(z);
    }
    // Starting value: Cornish–Fisher type expansion (A&S 26.7.5) for moderate
    // z²/ν, the power-law tail of the density otherwise.
    let z2 = z * z;
    let guess = if z2 < df {
        let g1 = (z2 + 1.0) * z / 4.0;
        let g2 = ((5.0 * z2 + 16.0) * z2 + 3.0) * z / 96.0;
        let g3 = (((3.0 * z2 + 19.0) * z2 + 17.0) * z2 - 15.0) * z / 384.0;
        let g4 = ((((79.0 * z2 + 776.0) * z2 + 1482.0) * z2 - 1920.0) * z2 - 945.0) * z / 92_160.0;
        z + (g1 + (g2 + (g3 + g4 / df) / df) / df) / df
    } else {
        let ln_k = ln_gamma_pos(0.5 * (df + 1.0))
            - ln_gamma_pos(0.5 * df)
            - 0.5 * (df * std::f64::consts::PI).ln();
        ((ln_k + 0.5 * (df - 1.0) * df.ln() - q.ln()) / df).exp()
    };
    let eval = |u: f64| -> Result<(f64, f64), StatsError> {
        let (ln_sf, _, ln_pref) = t_ln_tails(u.exp(), df)?;
        Ok((ln_sf, ln_pref))
    };
    let u = solve_decreasing(q.ln(), guess.ln(), U_MIN, U_MAX, &eval)?;
    Ok(if u >= U_MAX {
        f64::INFINITY
    } else if u <= U_MIN {
        0.0
    } else {
        u.exp()
    })
}

/// Student t quantile: the x with P(T ≤ x) = p (df > 0, may be +inf).
pub fn t_quantile(p: f64, df: f64) -> Result<f64, StatsError> {
    check_prob("p", p)?;
    check_df("df", df, true)?;
    t_quantile_raw(p, df)
}

pub(crate) fn t_quantile_raw(p: f64, df: f64) -> Result<f64, StatsError> {
    if p == 0.0 {
        Ok(f64::NEG_INFINITY)
    } else if p == 1.0 {
        Ok(f64::INFINITY)
    } else if p == 0.5 {
        Ok(0.0)
    } else if p < 0.5 {
        Ok(-t_upper_quantile(p, df)?)
    } else {
        t_upper_quantile(1.0 - p, df)
    }
}

/// Inverse survival function of Student t: the x with P(T > x) = q.
pub fn t_isf(q: f64, df: f64) -> Result<f64, StatsError> {
    check_prob("q", q)?;
    check_df("df", df, true)?;
    Ok(-t_quantile_raw(q, df)?)
}

// ---------------------------------------------------------------------------
// Fisher F
// ---------------------------------------------------------------------------

/// (ln cdf, ln sf, ln P) of F(df1, df2) at x > 0, with d cdf / d ln x = P.
fn f_ln_tails(x: f64, df1: f64, df2: f64) -> Result<(f64, f64, f64), StatsError> {
    if x <= 0.0 {
        return Ok((f64::NEG_INFINITY, 0.0, f64::NEG_INFINITY));
    }
    if x == f64::INFINITY {
        return Ok((0.0, f64::NEG_INFINITY, f64::NEG_INFINITY));
    }
    // With r = df2 / (df1 x): cdf = I_{1/(1+r)}(df1/2, df2/2).
    let r = df2 / (df1 * x);
    let ln_r = df2.ln() - df1.ln() - x.ln();
    let (xx, yy, ln_x, ln_y) = split_ratio(r, ln_r);
    let tails = beta_tails(0.5 * df1, 0.5 * df2, xx, yy, ln_x, ln_y)?;
    Ok((tails.ln_lower, tails.ln_upper, tails.ln_pref))
}

fn check_f_dfs(df1: f64, df2: f64) -> Result<(), StatsError> {
    check_df("df1", df1, false)?;
    check_df("df2", df2, false)
}

/// F distribution cdf P(F ≤ x) (finite df1, df2 > 0).
pub fn f_cdf(x: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_f_dfs(df1, df2)?;
    Ok(f_ln_tails(x, df1, df2)?.0.exp())
}

/// F distribution survival function P(F > x), computed directly.
pub fn f_sf(x: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_f_dfs(df1, df2)?;
    Ok(f_ln_tails(x, df1, df2)?.1.exp())
}

/// Pair (cdf, sf) of F for validated inputs.
pub(crate) fn f_tails_raw(x: f64, df1: f64, df2: f64) -> Result<(f64, f64), StatsError> {
    let (lc, ls, _) = f_ln_tails(x, df1, df2)?;
    Ok((lc.exp(), ls.exp()))
}

fn f_quantile_lower(p: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    // Solve ln cdf(e^{-v}) = ln p, decreasing in v.
    let eval = |v: f64| -> Result<(f64, f64), StatsError> {
        let (lc, _, lp) = f_ln_tails((-v).exp(), df1, df2)?;
        Ok((lc, lp))
    };
    let v = solve_decreasing(p.ln(), 0.0, -U_MAX, -U_MIN, &eval)?;
    Ok(if v >= -U_MIN {
        0.0
    } else if v <= -U_MAX {
        f64::INFINITY
    } else {
        (-v).exp()
    })
}

fn f_quantile_upper(q: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    let eval = |u: f64| -> Result<(f64, f64), StatsError> {
        let (_, ls, lp) = f_ln_tails(u.exp(), df1, df2)?;
        Ok((ls, lp))
    };
    let u = solve_decreasing(q.ln(), 0.0, U_MIN, U_MAX, &eval)?;
    Ok(if u >= U_MAX {
        f64::INFINITY
    } else if u <= U_MIN {
        0.0
    } else {
        u.exp()
    })
}

pub(crate) fn f_quantile_raw(p: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    if p == 0.0 {
        Ok(0.0)
    } else if p == 1.0 {
        Ok(f64::INFINITY)
    } else if p <= 0.5 {
        f_quantile_lower(p, df1, df2)
    } else {
        f_quantile_upper(1.0 - p, df1, df2)
    }
}

/// F quantile: the x with P(F ≤ x) = p.
pub fn f_quantile(p: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_prob("p", p)?;
    check_f_dfs(df1, df2)?;
    f_quantile_raw(p, df1, df2)
}

/// Inverse survival function of F: the x with P(F > x) = q.
pub fn f_isf(q: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_prob("q", q)?;
    check_f_dfs(df1, df2)?;
    if q == 0.0 {
        Ok(f64::INFINITY)
    } else if q == 1.0 {
        Ok(0.0)
    } else if q <= 0.5 {
        f_quantile_upper(q, df1, df2)
    } else {
        f_quantile_lower(1.0 - q, df1, df2)
    }
}
