//! Multiple-testing adjustment of p-values: Bonferroni, Holm (1979),
//! Hochberg (1988), Benjamini–Hochberg (1995) and Benjamini–Yekutieli (2001).
//!
//! Owns [`Method`], [`adjust`] and [`reject`]. Adjusted p-values are returned
//! in input order, are monotone in the order of the raw p-values as each
//! method prescribes, never below the raw value and capped at 1; they match
//! R's `p.adjust` and statsmodels' `multipletests`. Pure computation, no I/O.

use super::StatsError;
use std::fmt;
use std::str::FromStr;

/// A p-value adjustment method.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Method {
    /// Family-wise error: `min(1, m·p)`.
    Bonferroni,
    /// Holm's step-down family-wise procedure.
    Holm,
    /// Hochberg's step-up family-wise procedure (independent or PRDS tests).
    Hochberg,
    /// Benjamini–Hochberg false discovery rate (independent or PRDS tests).
    BenjaminiHochberg,
    /// Benjamini–Yekutieli false discovery rate under arbitrary dependence.
    BenjaminiYekutieli,
}

/// The names accepted by [`Method::from_str`].
pub const METHOD_NAMES: &str = "bonferroni|holm|hochberg|bh|by";

impl Method {
    /// All methods, in the order of [`METHOD_NAMES`].
    pub const ALL: [Method; 5] = [
        Method::Bonferroni,
        Method::Holm,
        Method::Hochberg,
        Method::BenjaminiHochberg,
        Method::BenjaminiYekutieli,
    ];

    /// Short name as accepted by `FromStr`.
    pub fn as_str(self) -> &'static str {
        match self {
            Method::Bonferroni => "bonferroni",
            Method::Holm => "holm",
            Method::Hochberg => "hochberg",
            Method::BenjaminiHochberg => "bh",
            Method::BenjaminiYekutieli => "by",
        }
    }
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for Method {
    type Err = StatsError;

    /// Parses `bonferroni|holm|hochberg|bh|by` (case-insensitive, surrounding
    /// whitespace ignored); anything else is [`StatsError::UnknownMethod`]
    /// carrying the list of allowed names.
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s.trim().to_ascii_lowercase().as_str() {
            "bonferroni" => Ok(Method::Bonferroni),
            "holm" => Ok(Method::Holm),
            "hochberg" => Ok(Method::Hochberg),
            "bh" => Ok(Method::BenjaminiHochberg),
            "by" => Ok(Method::BenjaminiYekutieli),
            _ => Err(StatsError::UnknownMethod {
                name: s.to_string(),
                allowed: METHOD_NAMES,
            }),
        }
    }
}

/// Adjusted p-values, in input order.
///
/// Every p must be finite and in [0, 1] ([`StatsError::InvalidParameter`]
/// otherwise). An empty input gives an empty output.
pub fn adjust(p: &[f64], method: Method) -> Result<Vec<f64>, StatsError> {
    if let Some(&bad) = p.iter().find(|v| !(0.0..=1.0).contains(*v)) {
        return Err(StatsError::InvalidParameter {
            name: "p",
            value: bad,
        });
    }
    let m = p.len();
    if m == 0 {
        return Ok(Vec::new());
    }
    let mf = m as f64;
    // Indices in ascending order of p (stable for ties).
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&i, &j| p[i].total_cmp(&p[j]));
    let mut out = vec![0.0; m];
    match method {
        Method::Bonferroni => {
            for (o, &v) in out.iter_mut().zip(p) {
                *o = (v * mf).min(1.0);
            }
        }
        Method::Holm => {
            // Step-down: running maximum of (m − i)·p_(i), i = 0-based rank.
            let mut run = 0.0_f64;
            for (rank, &idx) in order.iter().enumerate() {
                let v = ((mf - rank as f64) * p[idx]).min(1.0);
                run = run.max(v);
                out[idx] = run;
            }
        }
        Method::Hochberg | Method::BenjaminiHochberg | Method::BenjaminiYekutieli => {
            let c = if method == Method::BenjaminiYekutieli {
                (1..=m).map(|k| 1.0 / k as f64).sum::<f64>()
            } else {
                1.0
            };
            // Step-up: running minimum from the largest p downwards.
            let mut run = 1.0_f64;
            for (rank, &idx) in order.iter().enumerate().rev() {
                let k = rank as f64 + 1.0;
                let factor = if method == Method::Hochberg {
                    mf - k + 1.0
                } else {
                    c * mf / k
                };
                let v = (factor * p[idx]).min(1.0);
                run = run.min(v);
                out[idx] = run;
            }
        }
    }
    Ok(out)
}

/// Rejection decisions `adjusted[i] <= level`, in input order. A NaN level
/// rejects nothing.
pub fn reject(adjusted: &[f64], level: f64) -> Vec<bool> {
    adjusted.iter().map(|&q| q <= level).collect()
}
