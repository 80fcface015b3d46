//! Process capability: Cpk of a normal process against specification limits, with an
//! approximate confidence interval. Pure; no I/O.
//!
//! Cpk = min(USL − μ, μ − LSL) / (3σ) with one-sided forms when only one limit is given.
//! The interval is Bissell's (1990) normal approximation, "How reliable is your capability
//! index?", Applied Statistics 39:331–340 (from memory):
//! Ĉpk ± z₁₋α/₂ · sqrt(1/(9n) + Ĉpk²/(2(n − 1))).

use super::StatsError;
use super::dist::normal_quantile;

/// Cpk with its interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cpk {
    pub cpk: f64,
    pub low: f64,
    pub high: f64,
}

/// Cpk of a process with mean `mean` and sd `sd` estimated from `n` values, against `lsl`
/// and/or `usl`, with a two-sided interval at `conf_level`.
pub fn cpk(
    mean: f64,
    sd: f64,
    n: u64,
    lsl: Option<f64>,
    usl: Option<f64>,
    conf_level: f64,
) -> Result<Cpk, StatsError> {
    if !(mean.is_finite() && sd.is_finite()) {
        return Err(StatsError::NonFinite);
    }
    if sd <= 0.0 {
        return Err(StatsError::ZeroVariance);
    }
    if n < 2 {
        return Err(StatsError::TooFewValues {
            needed: 2,
            got: n as usize,
        });
    }
    if !(conf_level > 0.0 && conf_level < 1.0) {
        return Err(StatsError::InvalidParameter {
            name: "conf_level",
            value: conf_level,
        });
    }
    let upper = usl.map(|u| (u - mean) / (3.0 * sd));
    let lower = lsl.map(|l| (mean - l) / (3.0 * sd));
    let value = match (lower, upper) {
        (Some(a), Some(b)) => a.min(b),
        (Some(a), None) => a,
        (None, Some(b)) => b,
        (None, None) => {
            return Err(StatsError::InvalidParameter {
                name: "specification limits",
                value: f64::NAN,
            });
        }
    };
    let nf = n as f64;
    let z = -normal_quantile((1.0 - conf_level) / 2.0)?;
    let half = z * (1.0 / (9.0 * nf) + value * value / (2.0 * (nf - 1.0))).sqrt();
    Ok(Cpk {
        cpk: value,
        low: value - half,
        high: value + half,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn textbook_values() {
        // By the definition (common practice): mean 10, sd 1, limits 7 and 14 -> Cpk = 1.
        let c = cpk(10.0, 1.0, 50, Some(7.0), Some(14.0), 0.95).unwrap();
        assert!((c.cpk - 1.0).abs() < 1e-15);
        // Bissell's half width at n = 50: 1.959964 * sqrt(1/450 + 1/98) = 0.217... (computed
        // by hand from the formula above).
        let half = 1.959963984540054 * (1.0f64 / 450.0 + 1.0 / 98.0).sqrt();
        assert!((c.high - c.cpk - half).abs() < 1e-12);
        assert!((c.cpk - c.low - half).abs() < 1e-12);
        // One-sided limits.
        let u = cpk(10.0, 1.0, 50, None, Some(13.0), 0.95).unwrap();
        assert!((u.cpk - 1.0).abs() < 1e-15);
        let l = cpk(10.0, 2.0, 50, Some(4.0), None, 0.95).unwrap();
        assert!((l.cpk - 1.0).abs() < 1e-15);
    }

    #[test]
    fn bad_input_is_an_error() {
        assert!(cpk(10.0, 0.0, 50, Some(7.0), None, 0.95).is_err());
        assert!(cpk(10.0, 1.0, 1, Some(7.0), None, 0.95).is_err());
        assert!(cpk(10.0, 1.0, 50, None, None, 0.95).is_err());
        assert!(cpk(f64::NAN, 1.0, 50, Some(7.0), None, 0.95).is_err());
    }
}
