//! Mann–Whitney U test (Wilcoxon rank-sum) and the Hodges–Lehmann estimate of
//! the location shift between two samples.
//!
//! Owns [`MannWhitneyMethod`], [`MannWhitneyResult`], [`mann_whitney`],
//! [`mann_whitney_with`] and [`hodges_lehmann`]. Ranking is O(n log n) (one
//! sort of the pooled sample, average ranks for ties). Pure computation, no I/O.
//!
//! p-value rule of [`MannWhitneyMethod::Auto`]: the exact null distribution is
//! used when there are no ties and both samples have at most
//! [`EXACT_MAX_N`] values; otherwise the normal approximation with tie
//! correction and continuity correction (as R's `wilcox.test` and scipy's
//! `mannwhitneyu(method="asymptotic")`). The exact distribution of U is the
//! coefficient sequence of the Gaussian binomial coefficient
//! [m+n choose m]_q, built by the product ∏ (1 − q^{n+i}) / (1 − q^i) in exact
//! 128-bit integer arithmetic.

use super::StatsError;
use super::dist::norm_sf_raw;
use super::ttest::Alternative;

/// Largest sample size (each sample) for which `Auto` uses the exact p-value.
pub const EXACT_MAX_N: usize = 50;

/// How the Mann–Whitney p-value is computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub enum MannWhitneyMethod {
    /// Exact when there are no ties and both n ≤ [`EXACT_MAX_N`], else asymptotic.
    #[default]
    Auto,
    /// Exact permutation distribution (requires no ties).
    Exact,
    /// Normal approximation with tie and continuity corrections.
    Asymptotic,
}

/// Result of the Mann–Whitney U test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MannWhitneyResult {
    /// U of sample a: the number of pairs with a > b plus half the ties.
    pub statistic: f64,
    /// U of sample b, `n_a·n_b − statistic`.
    pub u_b: f64,
    /// p-value for the alternative (a stochastically less / greater than b).
    pub p_value: f64,
    /// Method actually used (`Exact` or `Asymptotic`, never `Auto`).
    pub method: MannWhitneyMethod,
    /// Standardised statistic of the normal approximation (with continuity
    /// correction, for the U used by the alternative); `None` when exact.
    pub z: Option<f64>,
    /// Whether the pooled sample contains ties.
    pub ties: bool,
    /// Size of sample a.
    pub n_a: usize,
    /// Size of sample b.
    pub n_b: usize,
}

struct Ranked {
    /// Sum of the (average) ranks of sample a.
    rank_sum_a: f64,
    /// Σ (t³ − t) over tie groups.
    tie_term: f64,
}

fn rank_pooled(a: &[f64], b: &[f64]) -> Ranked {
    let mut pooled: Vec<(f64, bool)> = Vec::with_capacity(a.len() + b.len());
    pooled.extend(a.iter().map(|&x| (x, true)));
    pooled.extend(b.iter().map(|&x| (x, false)));
    pooled.sort_unstable_by(|p, q| p.0.total_cmp(&q.0));
    let mut rank_sum_a = 0.0;
    let mut tie_term = 0.0;
    let mut i = 0;
    while i < pooled.len() {
        let mut j = i + 1;
        // -0.0 and 0.0 compare equal as values: treat them as a tie.
        while j < pooled.len() && pooled[j].0 == pooled[i].0 {
            j += 1;
        }
        let t = (j - i) as f64;
        let avg = (i + j + 1) as f64 / 2.0; // mean of ranks i+1 ..= j
        let in_a = pooled[i..j].iter().filter(|p| p.1).count() as f64;
        rank_sum_a += in_a * avg;
        if j - i > 1 {
            tie_term += t * t * t - t;
        }
        i = j;
    }
    Ranked {
        rank_sum_a,
        tie_term,
    }
}

fn validate(a: &[f64], b: &[f64]) -> Result<(), StatsError> {
    if a.is_empty() || b.is_empty() {
        return Err(StatsError::EmptySample);
    }
    if a.iter().chain(b).any(|x| !x.is_finite()) {
        return Err(StatsError::NonFinite);
    }
    Ok(())
}

/// Mann–Whitney U test with the [`MannWhitneyMethod::Auto`] rule.
pub fn mann_whitney(
    a: &[f64],
    b: &[f64],
    alternative: Alternative,
) -> Result<MannWhitneyResult, StatsError> {
    mann_whitney_with(a, b, alternative, MannWhitneyMethod::Auto)
}

/// Mann–Whitney U test with an explicit p-value method.
///
/// Errors: empty samples, non-finite values; `Exact` with ties or with
/// samples too large for exact 128-bit counting
/// ([`StatsError::InvalidParameter`] named `method`); asymptotic with all
/// values tied ([`StatsError::ZeroVariance`]).
pub fn mann_whitney_with(
    a: &[f64],
    b: &[f64],
    alternative: Alternative,
    method: MannWhitneyMethod,
) -> Result<MannWhitneyResult, StatsError> {
    validate(a, b)?;
    let (na, nb) = (a.len(), b.len());
    let (naf, nbf) = (na as f64, nb as f64);
    let ranked = rank_pooled(a, b);
    let u_a = ranked.rank_sum_a - naf * (naf + 1.0) / 2.0;
    let u_b = naf * nbf - u_a;
    let ties = ranked.tie_term > 0.0;
    let use_exact = match method {
        MannWhitneyMethod::Auto => !ties && na <= EXACT_MAX_N && nb <= EXACT_MAX_N,
        MannWhitneyMethod::Exact => {
            if ties {
                return Err(StatsError::InvalidParameter {
                    name: "method",
                    value: ranked.tie_term,
                });
            }
            true
        }
        MannWhitneyMethod::Asymptotic => false,
    };
    let (p_value, z, used) = if use_exact {
        let counts = exact_counts(na, nb)?;
        // P(U ≥ u) for integer u.
        let upper = |u: f64| -> f64 {
            let start = u.ceil().max(0.0) as usize;
            let total: i128 = counts.iter().sum();
            let tail: i128 = counts.iter().skip(start).sum();
            tail as f64 / total as f64
        };
        let p = match alternative {
            Alternative::TwoSided => 2.0 * upper(u_a.max(u_b)),
            Alternative::Greater => upper(u_a),
            Alternative::Less => upper(u_b),
        };
        (p.min(1.0), None, MannWhitneyMethod::Exact)
    } else {
        let n = naf + nbf;
        let var = naf * nbf / 12.0 * ((n + 1.0) - ranked.tie_term / (n * (n - 1.0)));
        if var <= 0.0 || !var.is_finite() {
            return Err(StatsError::ZeroVariance);
        }
        let u = match alternative {
            Alternative::TwoSided => u_a.max(u_b),
            Alternative::Greater => u_a,
            Alternative::Less => u_b,
        };
        let z = (u - naf * nbf / 2.0 - 0.5) / var.sqrt();
        let p = norm_sf_raw(z);
        let p = if alternative == Alternative::TwoSided {
            2.0 * p
        } else {
            p
        };
        (p.min(1.0), Some(z), MannWhitneyMethod::Asymptotic)
    };
    Ok(MannWhitneyResult {
        statistic: u_a,
        u_b,
        p_value: p_value.clamp(0.0, 1.0),
        method: used,
        z,
        ties,
        n_a: na,
        n_b: nb,
    })
}

/// Counts of the arrangements giving U = 0, 1, …, m·n under the null
/// (coefficients of the Gaussian binomial [m+n choose m]_q).
fn exact_counts(na: usize, nb: usize) -> Result<Vec<i128>, StatsError> {
    let (m, n) = (na.min(nb), na.max(nb));
    // C(m+n, m) must fit comfortably in i128 (< 2^126).
    let ln_total = (1..=m)
        .map(|i| ((n + i) as f64).ln() - (i as f64).ln())
        .sum::<f64>();
    if ln_total > 126.0 * std::f64::consts::LN_2 {
        return Err(StatsError::InvalidParameter {
            name: "method",
            value: (m + n) as f64,
        });
    }
    let len = m * n + 1;
    let mut poly = vec![0i128; len];
    poly[0] = 1;
    let mut deg = 0usize;
    for i in 1..=m {
        // Multiply by (1 − q^{n+i}).
        let k = n + i;
        let new_deg = deg + k;
        for d in (k..=new_deg.min(len - 1)).rev() {
            poly[d] -= poly[d - k];
        }
        // Divide by (1 − q^i): exact, the quotient has degree new_deg − i.
        deg = new_deg - i;
        for d in i..=deg {
            poly[d] += poly[d - i];
        }
        for v in poly.iter_mut().take(new_deg.min(len - 1) + 1).skip(deg + 1) {
            *v = 0;
        }
    }
    Ok(poly)
}

/// Hodges–Lehmann estimate of the shift a − b: the median of the n_a·n_b
/// pairwise differences a_i − b_j, found without forming them (bisection on
/// the ordered bit pattern of f64 with an O(n_a + n_b) pair count per step).
pub fn hodges_lehmann(a: &[f64], b: &[f64]) -> Result<f64, StatsError> {
    validate(a, b)?;
    let mut xs = a.to_vec();
    let mut ys = b.to_vec();
    xs.sort_unstable_by(f64::total_cmp);
    ys.sort_unstable_by(f64::total_cmp);
    let total = (xs.len() as u128) * (ys.len() as u128);
    let kth = |k: u128| kth_difference(&xs, &ys, k);
    let est = if total % 2 == 1 {
        kth(total / 2 + 1)
    } else {
        let lo = kth(total / 2);
        let hi = kth(total / 2 + 1);
        lo + 0.5 * (hi - lo)
    };
    if est.is_finite() {
        Ok(est)
    } else {
        Err(StatsError::NonFinite)
    }
}

/// Number of pairs with fl(x_i − y_j) ≤ d (x, y sorted ascending).
fn count_le(xs: &[f64], ys: &[f64], d: f64) -> u128 {
    let mut j = 0usize;
    let mut count = 0u128;
    for &x in xs {
        while j < ys.len() && x - ys[j] > d {
            j += 1;
        }
        count += (ys.len() - j) as u128;
    }
    count
}

fn order_key(x: f64) -> i64 {
    let bits = x.to_bits() as i64;
    bits ^ ((((bits >> 63) as u64) >> 1) as i64)
}

fn from_key(k: i64) -> f64 {
    f64::from_bits((k ^ ((((k >> 63) as u64) >> 1) as i64)) as u64)
}

/// k-th smallest (1-based) pairwise difference.
fn kth_difference(xs: &[f64], ys: &[f64], k: u128) -> f64 {
    let lo_val = xs[0] - ys[ys.len() - 1];
    let hi_val = xs[xs.len() - 1] - ys[0];
    let (mut lo, mut hi) = (order_key(lo_val), order_key(hi_val));
    // Invariant: count(from_key(hi)) ≥ k; find the smallest such key.
    while lo < hi {
        // Floor of the midpoint, in i128 so the span of keys cannot overflow.
        let mid = ((i128::from(lo) + i128::from(hi)) >> 1) as i64;
        if count_le(xs, ys, from_key(mid)) >= k {
            hi = mid;
        } else {
            lo = mid + 1;
        }
    }
    from_key(hi)
}
