//! Distribution functions with relative accuracy in the far tails: Student t,
//! Fisher F and standard normal cdf / survival function / quantiles.
//!
//! Owns the numerical kernels the tests rely on; does no I/O.
//!
//! * The regularized incomplete beta function `I_x(a, b)` is evaluated by the
//!   classical continued fraction (Abramowitz & Stegun 26.5.8), evaluated by
//!   the forward recurrence of its convergents, always on the side where the fraction converges and the
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
    if z == 0.5 {
        // δ(½) = ½ ln π + ½ − ½ ln 2π = ½ − ½ ln 2.
        return 0.5 - 0.5 * LN_2;
    }
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

/// Coefficients of the asymptotic series of ln Γ(a + ½) − ln Γ(a) − ½ ln a in
/// odd powers of 1/a: (2^{1−2k} − 2) B_{2k} / (2k (2k − 1)) for k = 1..7, from
/// the Bernoulli-polynomial form of Stirling's series (B_n(½) = (2^{1−n} − 1) B_n).
const HALF_SHIFT_COEF: [f64; 7] = [
    -1.0 / 8.0,
    1.0 / 192.0,
    -1.0 / 640.0,
    17.0 / 14_336.0,
    -31.0 / 18_432.0,
    691.0 / 180_224.0,
    -5461.0 / 425_984.0,
];

/// R(a) = ln Γ(a + ½) − ln Γ(a) − ½ ln a for a > 0, returned as (s, f) with
/// R(a) = s + ln f. For a ≥ 10, s is the asymptotic series (truncation error
/// below 1e-16) and f = 1. Below that the argument is first raised to
/// z = a + k ≥ 10 with Γ(w + 1) = w Γ(w), which contributes the exact factor
/// f = √(a z) · ∏_{i=1}^{k−1} (a + i) / ∏_{i=0}^{k−1} (a + i + ½); callers that
/// want exp(R) then need no logarithm at all.
pub(crate) fn half_shift_parts(a: f64) -> (f64, f64) {
    const SWITCH: f64 = 10.0;
    let series = |z: f64| {
        let r = 1.0 / z;
        let r2 = r * r;
        let mut s = HALF_SHIFT_COEF[6];
        for c in HALF_SHIFT_COEF[..6].iter().rev() {
            s = s * r2 + c;
        }
        s * r
    };
    if a >= SWITCH {
        return (series(a), 1.0);
    }
    let k = (SWITCH - a).ceil().max(1.0);
    let z = a + k;
    let mut num = (a * z).sqrt();
    let mut den = a + 0.5;
    let mut i = 1.0;
    while i < k {
        num *= a + i;
        den *= a + i + 0.5;
        i += 1.0;
    }
    (series(z), num / den)
}

/// Loader's deviance term `x ln(x/m) + m − x` for x > 0, m ≥ 0, with
/// `ln_ratio() = ln(x/m)` supplied accurately by the caller (only evaluated
/// away from x = m, where the series is not used).
fn bd0(x: f64, m: f64, ln_ratio: impl FnOnce() -> f64) -> f64 {
    if m > 0.0 && (x - m).abs() < 0.1 * (x + m) {
        let v = (x - m) / (x + m);
        let v2 = v * v;
        let mut sum = (x - m) * v;
        let mut pow = 2.0 * x * v;
        for inv in INV_ODD.iter().skip(1) {
            pow *= v2;
            let next = sum + pow * inv;
            if next == sum {
                break;
            }
            sum = next;
        }
        sum
    } else {
        x * ln_ratio() + m - x
    }
}

/// ln(1 + v) for v ≥ 0: from v ≥ 1 on, 1 + v is formed with a relative
/// error of at most 1.1e-16 and the plain logarithm (faster than `ln_1p`)
/// is as accurate.
fn ln_1p_pos(v: f64) -> f64 {
    if v >= 1.0 { (1.0 + v).ln() } else { v.ln_1p() }
}

/// ln(1 − e^l) for l ≤ 0.
fn ln_1m_exp(l: f64) -> f64 {
    (-l.exp()).ln_1p()
}

/// Per-(a, b) constants of the incomplete-beta prefactor
/// `x^a y^b / B(a, b)`, computed once per distribution.
#[derive(Debug, Clone, Copy)]
struct BetaKernel {
    a: f64,
    b: f64,
    /// ½ ln(ab/(a+b)) − ½ ln 2π − δ(a) − δ(b) + δ(a+b).
    c0: f64,
    /// ln(1 + b/a).
    l_ba: f64,
    /// ln(1 + a/b).
    l_ab: f64,
}

/// Both tails of the beta distribution at x: the one on the side where the
/// continued fraction converges is computed directly, the other on demand.
struct BetaTails {
    /// ln (x^a y^b / B(a, b)).
    ln_pref: f64,
    /// The directly computed tail divided by the prefactor (cf / a or cf / b);
    /// 0 when the prefactor is 0 because x or y is 0.
    cf_ratio: f64,
    direct_is_lower: bool,
}

impl BetaTails {
    /// (ln D, pref / D) for the directly computed tail D ≤ 1.
    fn direct(&self) -> (f64, f64) {
        if self.ln_pref == f64::NEG_INFINITY {
            return (f64::NEG_INFINITY, f64::NAN);
        }
        let ln_d = self.ln_pref + self.cf_ratio.ln();
        if ln_d <= 0.0 {
            (ln_d, 1.0 / self.cf_ratio)
        } else {
            (0.0, self.ln_pref.exp())
        }
    }

    /// The directly computed tail D as a probability (at most 1), formed
    /// without a logarithm when the prefactor is a normal number.
    fn direct_prob(&self) -> f64 {
        if self.ln_pref > -700.0 {
            (self.ln_pref.exp() * self.cf_ratio).min(1.0)
        } else {
            self.direct().0.exp()
        }
    }

    /// (ln (1 − D), pref / (1 − D)) for the other tail.
    fn complement(&self) -> (f64, f64) {
        let pref = self.ln_pref.exp();
        let d = if self.ln_pref > -700.0 {
            (pref * self.cf_ratio).min(1.0)
        } else {
            self.direct().0.exp()
        };
        ((-d).ln_1p(), pref / (1.0 - d))
    }

    /// (ln I_x(a, b), pref / I_x(a, b)).
    fn lower(&self) -> (f64, f64) {
        if self.direct_is_lower {
            self.direct()
        } else {
            self.complement()
        }
    }

    /// (ln (1 − I_x(a, b)), pref / (1 − I_x(a, b))).
    fn upper(&self) -> (f64, f64) {
        if self.direct_is_lower {
            self.complement()
        } else {
            self.direct()
        }
    }

    /// ln I_x(a, b).
    fn ln_lower(&self) -> f64 {
        self.lower().0
    }

    /// ln (1 − I_x(a, b)).
    fn ln_upper(&self) -> f64 {
        self.upper().0
    }

    /// I_x(a, b) as a probability.
    fn lower_prob(&self) -> f64 {
        let d = self.direct_prob();
        if self.direct_is_lower { d } else { 1.0 - d }
    }
}

impl BetaKernel {
    fn new(a: f64, b: f64) -> BetaKernel {
        let half_ln_h = if a >= b {
            0.5 * (b.ln() - (b / a).ln_1p())
        } else {
            0.5 * (a.ln() - (a / b).ln_1p())
        };
        BetaKernel {
            a,
            b,
            c0: half_ln_h - HALF_LN_2PI - stirling_err(a) - stirling_err(b) + stirling_err(a + b),
            l_ba: (b / a).ln_1p(),
            l_ab: (a / b).ln_1p(),
        }
    }

    /// The kernel of b = ½ (Student t with ν = 2a). Uses
    /// δ(a + ½) − δ(a) = R(a) − a ln(1 + 1/(2a)) + ½ with R from
    /// [`half_shift_parts`] below a = 10, where δ would need two ln Γ values.
    fn new_half(a: f64) -> BetaKernel {
        let l_ba = (0.5 / a).ln_1p();
        let l_ab = ln_1p_pos(2.0 * a);
        let half_ln_h = if a >= 0.5 {
            -0.5 * (LN_2 + l_ba)
        } else {
            0.5 * (a.ln() - l_ab)
        };
        let d_diff = if a >= 10.0 {
            stirling_err(a + 0.5) - stirling_err(a)
        } else {
            let (s, f) = half_shift_parts(a);
            s + f.ln() - a * l_ba + 0.5
        };
        BetaKernel {
            a,
            b: 0.5,
            c0: half_ln_h - HALF_LN_2PI - stirling_err(0.5) + d_diff,
            l_ba,
            l_ab,
        }
    }

    /// ln (x^a y^b / B(a, b)) = −bd0(a, x(a+b)) − bd0(b, y(a+b)) + c0.
    ///
    /// ln(a / (x(a+b))) is needed only away from 1; for a ≤ 1 the logarithm
    /// of the quotient itself is then accurate enough (its absolute error,
    /// a few units in 1e-16, is multiplied by a ≤ 1), otherwise it is
    /// assembled from ln(1 + b/a) and ln x, which keeps it accurate for large a.
    fn ln_pref(&self, sp: &Split) -> f64 {
        let s = self.a + self.b;
        let (a, b) = (self.a, self.b);
        let (m_a, m_b) = (sp.x * s, sp.y * s);
        let direct = sp.logs.is_none();
        -bd0(a, m_a, || {
            if direct && a <= 1.0 {
                (a / m_a).ln()
            } else {
                -self.l_ba - sp.ln_x()
            }
        }) - bd0(b, m_b, || {
            if direct && b <= 1.0 {
                (b / m_b).ln()
            } else {
                -self.l_ab - sp.ln_y()
            }
        }) + self.c0
    }

    fn tails(&self, sp: &Split) -> Result<BetaTails, StatsError> {
        self.tails_with(sp, false)
    }

    /// As [`BetaKernel::tails`]; with `upper_ok` the upper tail is computed
    /// directly also for y < 0.45 on the lower side of the usual switch
    /// point. For b = ½ the fraction for the upper tail converges much faster
    /// there (about 10 instead of 15 to 60 steps for t quantiles at ν ≥ 5),
    /// but the lower tail is then a difference, so callers allow it only where
    /// the lower tail is known not to be small.
    fn tails_with(&self, sp: &Split, upper_ok: bool) -> Result<BetaTails, StatsError> {
        let (a, b) = (self.a, self.b);
        let (x, y) = (sp.x, sp.y);
        if let Some((ln_x, ln_y)) = sp.logs
            && (ln_x == f64::NEG_INFINITY || ln_y == f64::NEG_INFINITY)
        {
            return Ok(BetaTails {
                ln_pref: f64::NEG_INFINITY,
                cf_ratio: 0.0,
                direct_is_lower: ln_x == f64::NEG_INFINITY,
            });
        }
        let ln_pref = self.ln_pref(sp);
        let lower_side = x * (a + b + 2.0) < a + 1.0 && !(upper_ok && y < 0.45);
        let cf_ratio = if lower_side {
            beta_cf(a, b, x)? / a
        } else {
            beta_cf(b, a, y)? / b
        };
        Ok(BetaTails {
            ln_pref,
            cf_ratio,
            direct_is_lower: lower_side,
        })
    }
}

/// Continued fraction of I_x(a, b) (A&S 26.5.8):
/// I_x(a, b) = prefactor · cf / a with cf = 1/(1 + d₁/(1 + d₂/(1 + …))).
/// Converges well for x < (a+1)/(a+b+2). Evaluated by the forward
/// recurrence of numerators and denominators with rescaling, in its
/// contracted form that steps from one odd convergent to the next:
/// S_{2m+1} = (1 + d_{2m} + d_{2m+1}) S_{2m−1} − d_{2m} d_{2m−1} S_{2m−3}.
/// Each step then costs one multiply-add on the serial dependency chain
/// instead of two, and divisions stay off that chain.
fn beta_cf(a: f64, b: f64, x: f64) -> Result<f64, StatsError> {
    const BIG: f64 = 1e100;
    // Odd convergents (A, B): S₋₁ = (0, 1) and S₁ = (1, 1 + d₁), with
    // d₁ = −(a+b)x/(a+1).
    let mut d_odd = -(a + b) * x / (a + 1.0);
    let (mut a_prev, mut b_prev) = (0.0_f64, 1.0_f64);
    let (mut a_cur, mut b_cur) = (1.0_f64, 1.0 + d_odd);
    let max_iter = 100_000 + (50.0 * a.max(b).sqrt()).min(1.0e7) as u64;
    let mut m = 0.0_f64;
    for _ in 0..max_iter {
        m += 1.0;
        let m2 = 2.0 * m;
        let (p, q, r) = (a + m2 - 1.0, a + m2, a + m2 + 1.0);
        // One division for both coefficients of this pair.
        let inv = x / (p * q * r);
        let d_even = m * (b - m) * r * inv;
        let e = -d_even * d_odd;
        d_odd = -(a + m) * (a + b + m) * p * inv;
        let c = 1.0 + d_even + d_odd;
        let a_next = c * a_cur + e * a_prev;
        let b_next = c * b_cur + e * b_prev;
        (a_prev, b_prev, a_cur, b_cur) = (a_cur, b_cur, a_next, b_next);
        let scale = b_cur.abs();
        if !(1.0 / BIG..=BIG).contains(&scale) {
            if scale == 0.0 || !scale.is_finite() {
                break;
            }
            let inv_scale = 1.0 / scale;
            a_prev *= inv_scale;
            b_prev *= inv_scale;
            a_cur *= inv_scale;
            b_cur *= inv_scale;
        }
        // Consecutive odd convergents agree:
        // |A_m B_{m−1} − A_{m−1} B_m| ≤ ε |A_m B_{m−1}|.
        let cross = a_cur * b_prev;
        if (cross - a_prev * b_cur).abs() <= f64::EPSILON * cross.abs() {
            return Ok(a_cur / b_cur);
        }
    }
    Err(StatsError::NoConvergence {
        what: "incomplete beta continued fraction",
    })
}

/// x = 1/(1+r) and y = r/(1+r) for some r ≥ 0, with ln x and ln y formed
/// only when asked for (the deviance series often does without them).
struct Split {
    x: f64,
    y: f64,
    r: f64,
    /// (ln x, ln y) when r is out of the range where they are formed from r.
    logs: Option<(f64, f64)>,
}

impl Split {
    fn ln_x(&self) -> f64 {
        match self.logs {
            Some((l, _)) => l,
            None => -ln_1p_pos(self.r),
        }
    }

    fn ln_y(&self) -> f64 {
        match self.logs {
            Some((_, l)) => l,
            None => -ln_1p_pos(1.0 / self.r),
        }
    }
}

/// The [`Split`] of r ≥ 0 given by value; `ln_r` is only evaluated when r
/// is out of range.
fn split_ratio(r: f64, ln_r: impl Fn() -> f64) -> Split {
    if r > 1e-300 && r < 1e300 {
        Split {
            x: 1.0 / (1.0 + r),
            y: r / (1.0 + r),
            r,
            logs: None,
        }
    } else {
        let ln_r = ln_r();
        let (x, y, ln_x, ln_y) = if ln_r > 0.0 {
            let inv = (-ln_r).exp();
            (inv, 1.0, -ln_r - inv.ln_1p(), -inv.ln_1p())
        } else {
            let rr = ln_r.exp();
            (1.0, rr, -rr.ln_1p(), ln_r - rr.ln_1p())
        };
        Split {
            x,
            y,
            r,
            logs: Some((ln_x, ln_y)),
        }
    }
}

// ---------------------------------------------------------------------------
// Normal distribution
// ---------------------------------------------------------------------------

/// 1/(2k+1) for k = 0..N_ODD (the series below needs about 60 terms at z = 3).
const N_ODD: usize = 96;
const INV_ODD: [f64; N_ODD] = {
    let mut t = [0.0; N_ODD];
    let mut k = 0;
    while k < N_ODD {
        t[k] = 1.0 / (2 * k + 1) as f64;
        k += 1;
    }
    t
};

/// exp(−z²/2) with the square formed from an exact split of z.
fn exp_neg_half_sq(z: f64) -> f64 {
    let z = z.abs();
    if z < 4.0 {
        // Rounding of z² costs at most ~1e-15 relative here.
        return (-0.5 * z * z).exp();
    }
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
    norm_tail_with_pdf(z, norm_pdf(z))
}

/// S(z) = Σ z^{2n+1} / (2n+1)!!, so that Φ(z) − ½ = φ(z) S(z) (A&S 26.2.11);
/// used for |z| < 3.
fn central_series(z: f64) -> f64 {
    let z2 = z * z;
    let mut term = z;
    let mut sum = z;
    for inv in INV_ODD.iter().skip(1) {
        term *= z2 * inv;
        let next = sum + term;
        if next == sum {
            break;
        }
        sum = next;
    }
    sum
}

/// Q(z) for 0 ≤ z ≤ 40 given pdf = φ(z).
fn norm_tail_with_pdf(z: f64, pdf: f64) -> f64 {
    if z < 3.0 {
        return 0.5 - pdf * central_series(z);
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
    pdf / f
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

/// Lower-tail normal quantile for 0 < p ≤ ½ (result ≤ 0), with at most
/// `max_iter` Halley refinements of the A&S 26.2.23 start.
fn norm_lower_quantile(p: f64, max_iter: usize) -> f64 {
    if p == 0.5 {
        return 0.0;
    }
    if p > 0.25 {
        // Near the centre solve φ(z) S(z) = ½ − p (exact by Sterbenz) for
        // z > 0 with relative accuracy, instead of Φ(x) = p.
        let c = 0.5 - p;
        let mut z = c * (2.0 * std::f64::consts::PI).sqrt();
        for _ in 0..max_iter.max(2) + 4 {
            let pdf = norm_pdf(z);
            let u = (pdf * central_series(z) - c) / pdf;
            let step = u / (1.0 + 0.5 * z * u);
            z -= step;
            if step.abs() <= 1e-15 * z.abs() {
                break;
            }
        }
        return -z.max(0.0);
    }
    // A&S 26.2.23 starting value (|error| < 4.5e-4).
    let t = (-2.0 * p.ln()).sqrt();
    let num = 2.515_517 + t * (0.802_853 + t * 0.010_328);
    let den = 1.0 + t * (1.432_788 + t * (0.189_269 + t * 0.001_308));
    let mut x = -(t - num / den);
    for _ in 0..max_iter {
        let pdf = norm_pdf(x);
        if pdf == 0.0 {
            break;
        }
        // Φ(x) = Q(−x) for x ≤ 0, reusing φ(x).
        let cdf = if x < -40.0 {
            0.0
        } else {
            norm_tail_with_pdf(-x, pdf)
        };
        let u = (cdf - p) / pdf;
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
        norm_lower_quantile(p, 12)
    } else {
        -norm_lower_quantile(1.0 - p, 12)
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

/// Student t distribution with its prefactor constants precomputed.
#[derive(Debug, Clone, Copy)]
pub(crate) struct TDist {
    df: f64,
    /// `None` for df = +inf (standard normal).
    kernel: Option<BetaKernel>,
}

impl TDist {
    /// Validated df > 0 (may be +inf).
    pub(crate) fn new(df: f64) -> TDist {
        TDist {
            df,
            kernel: if df.is_finite() {
                Some(BetaKernel::new_half(0.5 * df))
            } else {
                None
            },
        }
    }

    /// Beta tails at t > 0 (finite): sf(t) = ½ I_x(ν/2, ½) with
    /// x = ν/(ν + t²); also returns y = 1 − x.
    /// See [`BetaKernel::tails_with`] for `upper_ok`.
    fn beta_tails(
        k: &BetaKernel,
        df: f64,
        t: f64,
        upper_ok: bool,
    ) -> Result<(BetaTails, f64), StatsError> {
        let sp = split_ratio(t * t / df, || 2.0 * t.ln() - df.ln());
        Ok((k.tails_with(&sp, upper_ok)?, sp.y))
    }

    /// For t > 0 (finite): (ln P(T > t), P / P(T > t), d ln P / d ln t) with
    /// P = t·pdf(t) = −d sf / d ln t. For t ≤ z(0.99), P(T > t) ≥ 0.01 for every
    /// ν, and the faster fraction of the upper beta tail is used.
    fn upper(&self, t: f64) -> Result<(f64, f64, f64), StatsError> {
        self.upper_with(t, t <= Z_99)
    }

    /// As [`TDist::upper`]; `upper_ok` as in [`BetaKernel::tails_with`].
    fn upper_with(&self, t: f64, upper_ok: bool) -> Result<(f64, f64, f64), StatsError> {
        let Some(k) = self.kernel else {
            let q = norm_sf_raw(t);
            return Ok((q.ln(), t * norm_pdf(t) / q, 1.0 - t * t));
        };
        let df = self.df;
        let (tails, y) = TDist::beta_tails(&k, df, t, upper_ok)?;
        // sf(t) = ½ I_x(ν/2, ½) and P is the beta prefactor.
        let (ln_i, ratio) = tails.lower();
        Ok((ln_i - LN_2, 2.0 * ratio, 1.0 - (df + 1.0) * y))
    }

    /// ln P(T > t).
    pub(crate) fn ln_sf(&self, t: f64) -> Result<f64, StatsError> {
        if t == 0.0 {
            Ok(-LN_2)
        } else if t == f64::INFINITY {
            Ok(f64::NEG_INFINITY)
        } else if t == f64::NEG_INFINITY {
            Ok(0.0)
        } else if t > 0.0 {
            Ok(self.upper(t)?.0)
        } else {
            Ok(ln_1m_exp(self.upper(-t)?.0))
        }
    }

    /// ln P(T ≤ t).
    pub(crate) fn ln_cdf(&self, t: f64) -> Result<f64, StatsError> {
        self.ln_sf(-t)
    }

    /// 2·P(T > |t|), capped at 1.
    pub(crate) fn two_sided(&self, t: f64) -> Result<f64, StatsError> {
        let t = t.abs();
        match self.kernel {
            // 2·sf(t) = I_x(ν/2, ½), taken directly as a probability.
            // For t ≤ z(0.995) the result is at least 0.01 whatever ν (t quantiles exceed
            // normal ones), so it may be formed as 1 − (upper beta tail), losing at most two
            // digits, with the fraction that converges faster there.
            Some(k) if t > 0.0 && t.is_finite() => {
                Ok(TDist::beta_tails(&k, self.df, t, t <= Z_995)?
                    .0
                    .lower_prob())
            }
            _ => Ok((self.ln_sf(t)? + LN_2).exp().min(1.0)),
        }
    }

    /// Upper-tail quantile for 0 < q < ½ (positive result).
    fn upper_quantile(&self, q: f64) -> Result<f64, StatsError> {
        let df = self.df;
        if self.kernel.is_none() {
            return Ok(-norm_lower_quantile(q, 12));
        }
        let guess = match hill_t_start(q, df) {
            Some(t) => t,
            None => {
                // Cornish–Fisher type expansion (A&S 26.7.5) for moderate
                // z²/ν, the power-law tail of the density otherwise.
                let z = -norm_lower_quantile(q, 1);
                let z2 = z * z;
                if z2 < df {
                    let g1 = (z2 + 1.0) * z / 4.0;
                    let g2 = ((5.0 * z2 + 16.0) * z2 + 3.0) * z / 96.0;
                    let g3 = (((3.0 * z2 + 19.0) * z2 + 17.0) * z2 - 15.0) * z / 384.0;
                    let g4 = ((((79.0 * z2 + 776.0) * z2 + 1482.0) * z2 - 1920.0) * z2 - 945.0) * z
                        / 92_160.0;
                    z + (g1 + (g2 + (g3 + g4 / df) / df) / df) / df
                } else {
                    let ln_k = ln_gamma_pos(0.5 * (df + 1.0))
                        - ln_gamma_pos(0.5 * df)
                        - 0.5 * (df * std::f64::consts::PI).ln();
                    ((ln_k + 0.5 * (df - 1.0) * df.ln() - q.ln()) / df).exp()
                }
            }
        };
        if q > 0.25 {
            return self.central_quantile(0.5 - q, guess);
        }
        // Near the root the lower beta tail is 2q; from q ≥ 0.02 on, forming
        // it as 1 − (upper tail) loses at most a factor 24 in relative
        // accuracy of ln sf (about 1e-15 in t), and the faster fraction may
        // be used.
        let upper_ok = q >= 0.02;
        let eval = |u: f64| self.upper_with(u.exp(), upper_ok);
        let u = solve_decreasing(q.ln(), guess.ln(), U_MIN, U_MAX, &eval)?;
        from_log_root(u, q.ln(), U_MIN, U_MAX, &eval)
    }

    /// The t > 0 with P(0 < T ≤ t) = c, 0 < c < ¼, solved with relative
    /// accuracy in c (the central mass is the directly computed beta tail).
    fn central_quantile(&self, c: f64, guess: f64) -> Result<f64, StatsError> {
        let Some(k) = self.kernel else {
            return Ok(-norm_lower_quantile(0.5 - c, 12));
        };
        let df = self.df;
        // v = −ln t; central mass ½ (1 − I_x(ν/2, ½)) decreases in v.
        let eval = |v: f64| -> Result<(f64, f64, f64), StatsError> {
            let (tails, y) = TDist::beta_tails(&k, df, (-v).exp(), false)?;
            let (ln_c, ratio) = tails.upper();
            Ok((ln_c - LN_2, 2.0 * ratio, -(1.0 - (df + 1.0) * y)))
        };
        let v = solve_decreasing(c.ln(), -guess.ln(), -U_MAX, -U_MIN, &eval)?;
        Ok(1.0 / from_log_root(v, c.ln(), -U_MAX, -U_MIN, &eval)?)
    }

    /// Quantile: the t with P(T ≤ t) = p, for validated p in [0, 1].
    pub(crate) fn quantile(&self, p: f64) -> Result<f64, StatsError> {
        if p == 0.0 {
            Ok(f64::NEG_INFINITY)
        } else if p == 1.0 {
            Ok(f64::INFINITY)
        } else if p == 0.5 {
            Ok(0.0)
        } else if p < 0.5 {
            Ok(-self.upper_quantile(p)?)
        } else {
            self.upper_quantile(1.0 - p)
        }
    }
}

/// Starting value for the upper-tail t quantile (0 < q < ½) from Hill's
/// approximation: Hill, G. W. (1970), Algorithm 396: Student's t-quantiles,
/// CACM 13(10). It is exact for ν = 1 and 2; otherwise an inverse expansion
/// about the normal deviate is used in the body of the distribution and an
/// expansion in powers of (d·2q)^{2/ν} in the far tail. For ν ≥ 3 the relative
/// error is below about 1e-5 (about 1e-8 at q = 0.025), so the first
/// Halley step of the solver already lands at full accuracy. `None` outside
/// 1 ≤ ν < 1e6 and where the tail expansion would underflow; the caller then
/// uses its own start.
fn hill_t_start(q: f64, df: f64) -> Option<f64> {
    if !(1.0..1e6).contains(&df) {
        return None;
    }
    let two_q = 2.0 * q;
    let t = if df == 1.0 {
        // t = cot(π q).
        1.0 / (std::f64::consts::PI * q).tan()
    } else if df == 2.0 {
        (2.0 / (two_q * (2.0 - two_q)) - 2.0).sqrt()
    } else {
        let a = 1.0 / (df - 0.5);
        let b = 48.0 / (a * a);
        let c = ((20_700.0 * a / b - 98.0) * a - 16.0) * a + 96.36;
        let d = ((94.5 / (b + c) - 3.0) / b + 1.0) * (a * std::f64::consts::FRAC_PI_2).sqrt() * df;
        let y = (d * two_q).powf(2.0 / df);
        if y > 0.05 + a {
            // Body: correct the normal deviate x (x < 0 here).
            let x = norm_lower_quantile(q, 1);
            let x2 = x * x;
            let mut c = c;
            if df < 5.0 {
                c += 0.3 * (df - 4.5) * (x + 0.6);
            }
            c += (((0.05 * d * x - 5.0) * x - 7.0) * x - 2.0) * x + b;
            let w = (((((0.4 * x2 + 6.3) * x2 + 36.0) * x2 + 94.5) / c - x2 - 3.0) / b + 1.0) * x;
            (df * (a * w * w).exp_m1()).sqrt()
        } else {
            if y <= 1e-250 {
                return None;
            }
            // Far tail: t²/ν ≈ 1/y with a rational correction in y.
            let s = ((1.0 / (((df + 6.0) / (df * y) - 0.089 * d - 0.822) * (df + 2.0) * 3.0)
                + 0.5 / (df + 4.0))
                * y
                - 1.0)
                * (df + 1.0)
                / (df + 2.0)
                + 1.0 / y;
            (df * s).sqrt()
        }
    };
    (t.is_finite() && t > 0.0).then_some(t)
}

/// Student t cdf P(T ≤ x) with `df` degrees of freedom (df > 0, may be +inf).
pub fn t_cdf(x: f64, df: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_df("df", df, true)?;
    Ok(TDist::new(df).ln_cdf(x)?.exp())
}

/// Student t survival function P(T > x), computed directly in the upper tail.
pub fn t_sf(x: f64, df: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_df("df", df, true)?;
    Ok(TDist::new(df).ln_sf(x)?.exp())
}

/// Safeguarded Halley/Newton iteration in u for h(u) = ln T(u) − target,
/// with T decreasing in u, on [u_min, u_max]. `eval(u)` returns
/// (ln T, P / T, d ln P / du) where dT/du = −P. Falls back to bisection when a
/// step leaves the bracket; at most 400 evaluations. Returns u (clamped to the
/// bounds when the root lies outside them).
fn solve_decreasing(
    target: f64,
    u0: f64,
    u_min: f64,
    u_max: f64,
    eval: &dyn Fn(f64) -> Result<(f64, f64, f64), StatsError>,
) -> Result<f64, StatsError> {
    let mut lo = u_min;
    let mut hi = u_max;
    let mut u = if u0.is_finite() {
        u0.clamp(u_min, u_max)
    } else {
        0.0_f64.clamp(u_min, u_max)
    };
    for _ in 0..400 {
        let (lt, g, dlp) = eval(u)?;
        let h = lt - target;
        if h == 0.0 {
            return Ok(u);
        }
        if h > 0.0 {
            lo = u;
        } else {
            hi = u;
        }
        // h' = −g, h'' = −g·dlp − g², with g = P / T.
        let h1 = -g;
        let h2 = -g * dlp - g * g;
        let newton = -h / h1;
        let corr = 1.0 + 0.5 * newton * h2 / h1;
        let halley = corr.is_finite() && corr > 0.5 && corr < 2.0;
        let step = if halley { newton / corr } else { newton };
        let cand = u + step;
        let (next, in_bracket) = if cand.is_finite() && cand > lo && cand < hi {
            (cand, true)
        } else {
            (0.5 * (lo + hi), false)
        };
        let moved = (next - u).abs();
        // Halley converges cubically, Newton quadratically: after a step this
        // small the remaining error (≈ step³ resp. step²) is far below 1e-13.
        let done = in_bracket && ((halley && moved <= 1e-5) || moved <= 1e-8);
        if done || hi - lo <= 4.0 * f64::EPSILON * next.abs().max(1.0) {
            return Ok(next);
        }
        u = next;
    }
    Ok(u)
}

/// Standard normal quantiles at 0.99 and 0.995 (rounded down, so that a t at or below them
/// has an upper tail of at least 0.01 resp. 0.005 for every ν).
const Z_99: f64 = 2.326_347_874;
const Z_995: f64 = 2.575_829_303;

const U_MAX: f64 = 709.0;
const U_MIN: f64 = -744.0;

/// e^u for a root u of `solve_decreasing` on [u_min, u_max]. When u sits at
/// a bound, the bound is checked: if the root lies beyond it the result is
/// +inf (beyond u_max) or 0 (beyond u_min) instead of the clamped value.
fn from_log_root(
    u: f64,
    target: f64,
    u_min: f64,
    u_max: f64,
    eval: &dyn Fn(f64) -> Result<(f64, f64, f64), StatsError>,
) -> Result<f64, StatsError> {
    let near = |b: f64| (u - b).abs() <= 1e-6 * b.abs().max(1.0);
    if near(u_max) && eval(u_max)?.0 > target {
        return Ok(f64::INFINITY);
    }
    if near(u_min) && eval(u_min)?.0 < target {
        return Ok(0.0);
    }
    Ok(u.exp())
}

/// Student t quantile: the x with P(T ≤ x) = p (df > 0, may be +inf).
pub fn t_quantile(p: f64, df: f64) -> Result<f64, StatsError> {
    check_prob("p", p)?;
    check_df("df", df, true)?;
    TDist::new(df).quantile(p)
}

/// Inverse survival function of Student t: the x with P(T > x) = q.
pub fn t_isf(q: f64, df: f64) -> Result<f64, StatsError> {
    check_prob("q", q)?;
    check_df("df", df, true)?;
    Ok(-TDist::new(df).quantile(q)?)
}

// ---------------------------------------------------------------------------
// Fisher F
// ---------------------------------------------------------------------------

/// F distribution with its prefactor constants precomputed.
#[derive(Debug, Clone, Copy)]
pub(crate) struct FDist {
    df1: f64,
    df2: f64,
    kernel: BetaKernel,
}

impl FDist {
    /// Validated finite df1, df2 > 0.
    pub(crate) fn new(df1: f64, df2: f64) -> FDist {
        FDist {
            df1,
            df2,
            kernel: BetaKernel::new(0.5 * df1, 0.5 * df2),
        }
    }

    /// Beta tails at 0 < x < inf and d ln P / d ln x, with d cdf / d ln x = P
    /// the beta prefactor.
    fn tails(&self, x: f64) -> Result<(BetaTails, f64), StatsError> {
        let (df1, df2) = (self.df1, self.df2);
        // With r = df2 / (df1 x): cdf = I_{1/(1+r)}(df1/2, df2/2).
        let sp = split_ratio(df2 / (df1 * x), || df2.ln() - df1.ln() - x.ln());
        let (bx, by) = (sp.x, sp.y);
        let t = self.kernel.tails(&sp)?;
        let dlp = self.kernel.a * by - self.kernel.b * bx;
        Ok((t, dlp))
    }

    /// (cdf, sf) at x.
    pub(crate) fn cdf_sf(&self, x: f64) -> Result<(f64, f64), StatsError> {
        if x <= 0.0 {
            return Ok((0.0, 1.0));
        }
        if x == f64::INFINITY {
            return Ok((1.0, 0.0));
        }
        let (t, _) = self.tails(x)?;
        Ok((t.ln_lower().exp(), t.ln_upper().exp()))
    }

    fn quantile_lower(&self, p: f64) -> Result<f64, StatsError> {
        // Solve ln cdf(e^{-v}) = ln p, decreasing in v.
        let eval = |v: f64| -> Result<(f64, f64, f64), StatsError> {
            let x = (-v).exp();
            if x <= 0.0 {
                return Ok((f64::NEG_INFINITY, f64::NAN, 0.0));
            }
            if x == f64::INFINITY {
                return Ok((0.0, 0.0, 0.0));
            }
            let (t, dlp) = self.tails(x)?;
            let (lc, ratio) = t.lower();
            Ok((lc, ratio, -dlp))
        };
        let v = solve_decreasing(p.ln(), 0.0, -U_MAX, -U_MIN, &eval)?;
        Ok(1.0 / from_log_root(v, p.ln(), -U_MAX, -U_MIN, &eval)?)
    }

    fn quantile_upper(&self, q: f64) -> Result<f64, StatsError> {
        let eval = |u: f64| -> Result<(f64, f64, f64), StatsError> {
            let x = u.exp();
            if x <= 0.0 {
                return Ok((0.0, 0.0, 0.0));
            }
            if x == f64::INFINITY {
                return Ok((f64::NEG_INFINITY, f64::NAN, 0.0));
            }
            let (t, dlp) = self.tails(x)?;
            let (ls, ratio) = t.upper();
            Ok((ls, ratio, dlp))
        };
        let u = solve_decreasing(q.ln(), 0.0, U_MIN, U_MAX, &eval)?;
        from_log_root(u, q.ln(), U_MIN, U_MAX, &eval)
    }

    /// The x with P(F ≤ x) = p, for validated p in [0, 1].
    pub(crate) fn quantile(&self, p: f64) -> Result<f64, StatsError> {
        if p == 0.0 {
            Ok(0.0)
        } else if p == 1.0 {
            Ok(f64::INFINITY)
        } else if p <= 0.5 {
            self.quantile_lower(p)
        } else {
            self.quantile_upper(1.0 - p)
        }
    }

    /// The x with P(F > x) = q, for validated q in [0, 1].
    pub(crate) fn isf(&self, q: f64) -> Result<f64, StatsError> {
        if q == 0.0 {
            Ok(f64::INFINITY)
        } else if q == 1.0 {
            Ok(0.0)
        } else if q <= 0.5 {
            self.quantile_upper(q)
        } else {
            self.quantile_lower(1.0 - q)
        }
    }
}

fn check_f_dfs(df1: f64, df2: f64) -> Result<(), StatsError> {
    check_df("df1", df1, false)?;
    check_df("df2", df2, false)
}

/// F distribution cdf P(F ≤ x) (finite df1, df2 > 0).
pub fn f_cdf(x: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_f_dfs(df1, df2)?;
    Ok(FDist::new(df1, df2).cdf_sf(x)?.0)
}

/// F distribution survival function P(F > x), computed directly.
pub fn f_sf(x: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_x(x)?;
    check_f_dfs(df1, df2)?;
    Ok(FDist::new(df1, df2).cdf_sf(x)?.1)
}

/// F quantile: the x with P(F ≤ x) = p.
pub fn f_quantile(p: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_prob("p", p)?;
    check_f_dfs(df1, df2)?;
    FDist::new(df1, df2).quantile(p)
}

/// Inverse survival function of F: the x with P(F > x) = q.
pub fn f_isf(q: f64, df1: f64, df2: f64) -> Result<f64, StatsError> {
    check_prob("q", q)?;
    check_f_dfs(df1, df2)?;
    FDist::new(df1, df2).isf(q)
}

/// Normal quantile for Shapiro–Wilk plotting positions (0 < p < 1).
pub(crate) fn norm_quantile_for_sw(p: f64) -> f64 {
    norm_quantile_raw(p)
}
