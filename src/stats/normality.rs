//! Shapiro–Wilk test of normality by Royston's (1995) algorithm AS R94
//! (Applied Statistics 44:547–551), valid for 3 ≤ n ≤ 5000.
//!
//! Owns [`ShapiroWilkResult`] and [`shapiro_wilk`]. The coefficients are
//! Royston's polynomial approximations to the Shapiro–Wilk weights, the
//! p-value his normalising transformation of W (exact for n = 3). Pure
//! computation, no I/O.

use super::StatsError;
use super::dist::{norm_quantile_for_sw, norm_sf_raw};

/// Result of the Shapiro–Wilk test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShapiroWilkResult {
    /// W statistic in (0, 1]; small values indicate non-normality.
    pub statistic: f64,
    /// p-value (upper tail of the normalised statistic).
    pub p_value: f64,
    /// Sample size.
    pub n: usize,
}

/// Evaluates c[0] + c[1] x + c[2] x² + … (Horner).
fn poly(c: &[f64], x: f64) -> f64 {
    c.iter().rev().fold(0.0, |acc, &ci| acc * x + ci)
}

// Royston (1995) polynomial coefficients.
const C1: [f64; 6] = [0.0, 0.221157, -0.147981, -2.071190, 4.434685, -2.706056];
const C2: [f64; 6] = [0.0, 0.042981, -0.293762, -1.752461, 5.682633, -3.582633];
const C3: [f64; 4] = [0.544, -0.39978, 0.025054, -6.714e-4];
const C4: [f64; 4] = [1.3822, -0.77857, 0.062767, -0.0020322];
const C5: [f64; 4] = [-1.5861, -0.31082, -0.083751, 0.0038915];
const C6: [f64; 3] = [-0.4803, -0.082676, 0.0030302];
const G: [f64; 2] = [-2.273, 0.459];

/// Shapiro–Wilk W and p-value for 3 ≤ n ≤ 5000 finite values.
///
/// Errors: fewer than 3 values ([`StatsError::TooFewValues`]), more than 5000
/// ([`StatsError::TooManyValues`]), non-finite values, or all values equal
/// ([`StatsError::ZeroVariance`]).
pub fn shapiro_wilk(x: &[f64]) -> Result<ShapiroWilkResult, StatsError> {
    let n = x.len();
    if n < 3 {
        return Err(StatsError::TooFewValues { needed: 3, got: n });
    }
    if n > 5000 {
        return Err(StatsError::TooManyValues { max: 5000, got: n });
    }
    if x.iter().any(|v| !v.is_finite()) {
        return Err(StatsError::NonFinite);
    }
    let mut xs = x.to_vec();
    xs.sort_unstable_by(f64::total_cmp);
    let range = xs[n - 1] - xs[0];
    if range == 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    if !range.is_finite() {
        return Err(StatsError::NonFinite);
    }
    let nf = n as f64;
    let half = n / 2;
    let a = coefficients(n);
    // W = (Σ a_i (x_(n−i) − x_(i)))² / Σ (x − x̄)², on data scaled by the range.
    let scaled: Vec<f64> = xs.iter().map(|&v| (v - xs[0]) / range).collect();
    let mean = scaled.iter().sum::<f64>() / nf;
    let ss: f64 = scaled.iter().map(|v| (v - mean) * (v - mean)).sum();
    let num: f64 = (0..half)
        .map(|i| a[i] * (scaled[n - 1 - i] - scaled[i]))
        .sum();
    let w = (num * num / ss).min(1.0);
    let p_value = sw_p_value(w, n);
    if !w.is_finite() || !p_value.is_finite() {
        return Err(StatsError::NonFinite);
    }
    Ok(ShapiroWilkResult {
        statistic: w,
        p_value: p_value.clamp(0.0, 1.0),
        n,
    })
}

/// The Shapiro–Wilk coefficients for `n` values, from a process-wide memo: they depend on
/// `n` alone, and a backfill tests hundreds of baselines of the same size (computing them is
/// `n / 2` normal quantiles, most of the cost of a test). At most [`MEMO_SIZES`] sizes are
/// kept: a daemon that meets more starts the memo afresh.
fn coefficients(n: usize) -> std::sync::Arc<[f64]> {
    let mut memo = MEMO
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    if memo.len() >= MEMO_SIZES && !memo.contains_key(&n) {
        memo.clear();
    }
    memo.entry(n)
        .or_insert_with(|| compute_coefficients(n).into())
        .clone()
}

/// Sample sizes whose coefficients [`coefficients`] keeps (at most 20 KB each).
const MEMO_SIZES: usize = 64;

type Memo = std::collections::HashMap<usize, std::sync::Arc<[f64]>>;
static MEMO: std::sync::LazyLock<std::sync::Mutex<Memo>> =
    std::sync::LazyLock::new(Default::default);

/// Coefficients a[0..n/2] for the pairs (x_(n−1−i), x_(i)), 3 ≤ n.
fn compute_coefficients(n: usize) -> Vec<f64> {
    let nf = n as f64;
    let half = n / 2;
    let mut a = vec![0.0; half];
    if n == 3 {
        a[0] = std::f64::consts::FRAC_1_SQRT_2;
        return a;
    }
    let m: Vec<f64> = (1..=half)
        .map(|i| norm_quantile_for_sw((i as f64 - 0.375) / (nf + 0.25)))
        .collect();
    let summ2 = 2.0 * m.iter().map(|v| v * v).sum::<f64>();
    let ssumm2 = summ2.sqrt();
    let rsn = 1.0 / nf.sqrt();
    let a1 = poly(&C1, rsn) - m[0] / ssumm2;
    let (first, fac) = if n > 5 {
        let a2 = -m[1] / ssumm2 + poly(&C2, rsn);
        let fac = ((summ2 - 2.0 * m[0] * m[0] - 2.0 * m[1] * m[1])
            / (1.0 - 2.0 * a1 * a1 - 2.0 * a2 * a2))
            .sqrt();
        a[1] = a2;
        (2, fac)
    } else {
        let fac = ((summ2 - 2.0 * m[0] * m[0]) / (1.0 - 2.0 * a1 * a1)).sqrt();
        (1, fac)
    };
    a[0] = a1;
    for i in first..half {
        a[i] = -m[i] / fac;
    }
    a
}

/// Royston's p-value for W.
fn sw_p_value(w: f64, n: usize) -> f64 {
    if n == 3 {
        // Exact: p = 6/π (asin √W − asin √¾), zero below W = ¾.
        let p = 6.0 / std::f64::consts::PI * (w.sqrt().asin() - 0.75f64.sqrt().asin());
        return p.max(0.0);
    }
    let nf = n as f64;
    let w1 = (1.0 - w).ln();
    let (y, m, s) = if n <= 11 {
        let gamma = poly(&G, nf);
        if w1 >= gamma {
            // W so small that the transformation breaks down: p is tiny.
            return 1e-99;
        }
        (-(gamma - w1).ln(), poly(&C3, nf), poly(&C4, nf).exp())
    } else {
        let ln_n = nf.ln();
        (w1, poly(&C5, ln_n), poly(&C6, ln_n).exp())
    };
    norm_sf_raw((y - m) / s)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The memo hands out the coefficients it would compute, stays bounded when more sizes
    /// come than it keeps, and leaves the statistic bit for bit as before.
    #[test]
    fn memo_gives_the_computed_coefficients_and_stays_bounded() {
        for n in 3..(3 + MEMO_SIZES + 10) {
            assert_eq!(*coefficients(n), *compute_coefficients(n), "n = {n}");
        }
        assert!(MEMO.lock().unwrap().len() <= MEMO_SIZES);
        let x: Vec<f64> = (0..40)
            .map(|i| ((i * 37) % 23) as f64 + 0.5 * i as f64)
            .collect();
        let first = shapiro_wilk(&x).unwrap();
        for n in 100..(100 + MEMO_SIZES + 1) {
            coefficients(n);
        }
        assert!(MEMO.lock().unwrap().len() <= MEMO_SIZES);
        assert_eq!(shapiro_wilk(&x).unwrap(), first);
    }
}
