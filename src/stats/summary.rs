//! Numerically stable summaries (count, mean, sum of squared
//! deviations, minimum, maximum) and their exact pairwise merge.
//!
//! Owns [`Summary`]. Slices are summarised by a compensated two-pass method,
//! single values are added with Welford's (1962) update, and two
//! summaries are combined with the pairwise formula of Chan, Golub & LeVeque
//! (1979), so a baseline built by merging stored per-lot summaries equals (up to
//! rounding) the summary of the pooled raw values. No I/O.

use super::StatsError;

/// Summary of a non-empty sample of finite values.
///
/// A `Summary` always has `n >= 1`, finite fields and `m2 >= 0`; the
/// constructors reject anything else, so code holding a `Summary` never has to
/// check for an empty sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Summary {
    n: u64,
    mean: f64,
    m2: f64,
    min: f64,
    max: f64,
}

impl Summary {
    /// Summary of a single finite value.
    pub fn single(x: f64) -> Result<Summary, StatsError> {
        if !x.is_finite() {
            return Err(StatsError::NonFinite);
        }
        Ok(Summary {
            n: 1,
            mean: x,
            m2: 0.0,
            min: x,
            max: x,
        })
    }

    /// Summary of a slice.
    ///
    /// Uses a compensated two-pass computation (Neumaier-summed mean, then the
    /// corrected sum of squares `Σd² − (Σd)²/n` of Chan, Golub & LeVeque), which
    /// keeps full accuracy even for data with a huge offset relative to their
    /// spread (e.g. values near 1e7 with spread 1e-3), where a one-pass update
    /// loses about log10(|mean|/sd) digits. [`Summary::push`] is the one-pass
    /// (Welford) update for streaming use.
    ///
    /// Errors: [`StatsError::EmptySample`] for an empty slice,
    /// [`StatsError::NonFinite`] if a value is NaN/infinite or a sum overflows.
    pub fn from_slice(xs: &[f64]) -> Result<Summary, StatsError> {
        if xs.is_empty() {
            return Err(StatsError::EmptySample);
        }
        let mut min = f64::INFINITY;
        let mut max = f64::NEG_INFINITY;
        let mut sum = 0.0_f64;
        let mut comp = 0.0_f64;
        for &x in xs {
            if !x.is_finite() {
                return Err(StatsError::NonFinite);
            }
            min = min.min(x);
            max = max.max(x);
            let t = sum + x;
            if sum.abs() >= x.abs() {
                comp += (sum - t) + x;
            } else {
                comp += (x - t) + sum;
            }
            sum = t;
        }
        let nf = xs.len() as f64;
        let total = sum + comp;
        let mut mean = if total.is_finite() {
            total / nf
        } else {
            // Sum overflowed: average scaled values instead.
            xs.iter().map(|&x| x / nf).sum::<f64>()
        };
        if !mean.is_finite() {
            return Err(StatsError::NonFinite);
        }
        let mut s1 = 0.0_f64;
        let mut s2 = 0.0_f64;
        for &x in xs {
            let d = x - mean;
            s1 += d;
            s2 += d * d;
        }
        if !s2.is_finite() {
            return Err(StatsError::NonFinite);
        }
        let m2 = (s2 - s1 * s1 / nf).max(0.0);
        mean += s1 / nf;
        Ok(Summary {
            n: xs.len() as u64,
            mean: mean.clamp(min, max),
            m2: if xs.len() == 1 { 0.0 } else { m2 },
            min,
            max,
        })
    }

    /// Rebuilds a summary from stored parts, validating them.
    ///
    /// Requires `n >= 1`, all fields finite, `m2 >= 0`, `min <= max`,
    /// `min <= mean <= max` up to a few units of rounding (a mean slightly
    /// outside is clamped into `[min, max]`), and, for `n == 1`, `m2 == 0` and
    /// `min == max`.
    pub fn from_parts(
        n: u64,
        mean: f64,
        m2: f64,
        min: f64,
        max: f64,
    ) -> Result<Summary, StatsError> {
        if n == 0 {
            return Err(StatsError::EmptySample);
        }
        for v in [mean, m2, min, max] {
            if !v.is_finite() {
                return Err(StatsError::NonFinite);
            }
        }
        if m2 < 0.0 {
            return Err(StatsError::InvalidParameter {
                name: "m2",
                value: m2,
            });
        }
        if min > max {
            return Err(StatsError::InvalidParameter {
                name: "min",
                value: min,
            });
        }
        let scale = mean.abs().max(min.abs()).max(max.abs());
        let tol = 8.0 * f64::EPSILON * scale;
        if mean < min - tol || mean > max + tol {
            return Err(StatsError::InvalidParameter {
                name: "mean",
                value: mean,
            });
        }
        if n == 1 && (m2 != 0.0 || min != max) {
            return Err(StatsError::InvalidParameter {
                name: "m2",
                value: m2,
            });
        }
        Ok(Summary {
            n,
            mean: mean.clamp(min, max),
            m2,
            min,
            max,
        })
    }

    /// Adds one value (Welford's update). On error the summary is unchanged.
    pub fn push(&mut self, x: f64) -> Result<(), StatsError> {
        if !x.is_finite() {
            return Err(StatsError::NonFinite);
        }
        let n = self.n + 1;
        let nf = n as f64;
        let d = x - self.mean;
        let mean = self.mean + d / nf;
        let m2 = self.m2 + d * (x - mean);
        if !d.is_finite() || !mean.is_finite() || !m2.is_finite() {
            return Err(StatsError::NonFinite);
        }
        self.n = n;
        self.min = self.min.min(x);
        self.max = self.max.max(x);
        self.mean = mean.clamp(self.min, self.max);
        self.m2 = m2.max(0.0);
        Ok(())
    }

    /// Exact pairwise merge (Chan et al.): the summary of the union of both
    /// samples. If the combined sum of squares would overflow it saturates at
    /// `f64::MAX` (only possible with values near the f64 range limit).
    pub fn merge(&self, other: &Summary) -> Summary {
        let n = self.n.saturating_add(other.n);
        let nf = n as f64;
        let (na, nb) = (self.n as f64, other.n as f64);
        let min = self.min.min(other.min);
        let max = self.max.max(other.max);
        let delta = other.mean - self.mean;
        let (mean, m2) = if delta.is_finite() {
            let mean = self.mean + delta * (nb / nf);
            let m2 = self.m2 + other.m2 + delta * delta * (na / nf) * nb;
            (mean, m2)
        } else {
            // Means of opposite sign near the f64 limit: weight without the
            // difference (the cross term then overflows anyway).
            (self.mean * (na / nf) + other.mean * (nb / nf), f64::MAX)
        };
        let m2 = if m2.is_finite() { m2 } else { f64::MAX };
        Summary {
            n,
            mean: mean.clamp(min, max),
            m2,
            min,
            max,
        }
    }

    /// Number of values (always at least 1).
    pub fn n(&self) -> u64 {
        self.n
    }

    /// Arithmetic mean.
    pub fn mean(&self) -> f64 {
        self.mean
    }

    /// Sum of squared deviations from the mean.
    pub fn m2(&self) -> f64 {
        self.m2
    }

    /// Smallest value.
    pub fn min(&self) -> f64 {
        self.min
    }

    /// Largest value.
    pub fn max(&self) -> f64 {
        self.max
    }

    /// Sample variance with the `n - 1` denominator; `None` for `n == 1`.
    pub fn variance(&self) -> Option<f64> {
        if self.n < 2 {
            None
        } else {
            Some(self.m2 / (self.n - 1) as f64)
        }
    }

    /// Sample standard deviation (`n - 1` denominator); `None` for `n == 1`.
    pub fn sd(&self) -> Option<f64> {
        self.variance().map(f64::sqrt)
    }

    /// Standard error of the mean, `sd / sqrt(n)`; `None` for `n == 1`.
    pub fn std_error(&self) -> Option<f64> {
        self.sd().map(|s| s / (self.n as f64).sqrt())
    }
}
