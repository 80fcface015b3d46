//! Operating characteristics of the monitoring policy, by simulation.
//!
//! Runs [`super::decide`], the same pure function the daemon uses, on simulated series with
//! real between-lot variation: each lot's mean is the process mean plus a lot effect
//! N(0, τ²), each unit adds N(0, σ²). Reports false alerts per 1,000 in-control lots and the
//! number of lots from the start of a shift to its first alert. Used by the operating test
//! suite (`tests/engine_operating.rs`) and the table printer (`benches/operating.rs`); fixed
//! seeds make every figure reproducible.

use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, Normal};

use crate::config::{Config, Monitor};
use crate::stats::Summary;
use crate::store::{AlertAction, SeriesSample, SeriesWork};

/// One simulated scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub series: usize,
    /// Lots after the baseline.
    pub lots: usize,
    pub units: usize,
    /// Between-lot sd as a fraction of the within-lot (unit) sd.
    pub between: f64,
    /// Shift of the process mean, in sd of a lot mean (sqrt(τ² + σ²/n)), from the first lot
    /// after the baseline on; 0 = in control.
    pub shift: f64,
    pub seed: u64,
}

/// What the policy did on a scenario.
#[derive(Debug, Clone, PartialEq)]
pub struct Outcome {
    /// Alerts opened (mean and spread) over all series.
    pub alerts: usize,
    /// Lots tested over all series.
    pub lots_tested: usize,
    /// Per series: lots from the start of the shift to the first mean alert (1 = the first
    /// lot after the baseline), None when it never alerted.
    pub delays: Vec<Option<usize>>,
}

impl Outcome {
    pub fn alerts_per_1000_lots(&self) -> f64 {
        1000.0 * self.alerts as f64 / self.lots_tested.max(1) as f64
    }

    /// Median delay over all series, counting series that never alerted as longer than any.
    pub fn median_delay(&self) -> Option<usize> {
        let mut d: Vec<usize> = self
            .delays
            .iter()
            .map(|d| d.unwrap_or(usize::MAX))
            .collect();
        d.sort_unstable();
        let m = d[d.len() / 2];
        (m != usize::MAX).then_some(m)
    }

    /// Share of series that alerted within `lots` lots of the shift.
    pub fn detected_within(&self, lots: usize) -> f64 {
        self.delays
            .iter()
            .filter(|d| d.is_some_and(|d| d <= lots))
            .count() as f64
            / self.delays.len().max(1) as f64
    }
}

/// The monitoring settings of a fresh config (defaults).
pub fn default_monitor() -> Monitor {
    Config::defaults_in(std::path::Path::new(".")).monitor
}

/// Simulates `scenario` under `monitor` (all series in one decision pass, as a backfill).
pub fn run(scenario: &Scenario, monitor: &Monitor) -> Outcome {
    let mut rng = StdRng::seed_from_u64(scenario.seed);
    let sigma = 1.0;
    let tau = scenario.between * sigma;
    let lot_effect = Normal::new(0.0, tau.max(1e-300)).expect("valid sd");
    let unit = Normal::new(0.0, sigma).expect("valid sd");
    let lot_sd = (tau * tau + sigma * sigma / scenario.units as f64).sqrt();
    let m = monitor.baseline_lots;
    let mut work = Vec::with_capacity(scenario.series);
    let mut values = vec![0.0; scenario.units];
    for s in 0..scenario.series {
        let mut pending = Vec::with_capacity(m + scenario.lots);
        for l in 0..m + scenario.lots {
            let shift = if l >= m { scenario.shift * lot_sd } else { 0.0 };
            let effect = if tau > 0.0 {
                lot_effect.sample(&mut rng)
            } else {
                0.0
            };
            for v in values.iter_mut() {
                *v = 10.0 + shift + effect + unit.sample(&mut rng);
            }
            pending.push(SeriesSample {
                sample_id: (s * 100_000 + l) as i64,
                lot_id: (s * 100_000 + l) as i64,
                lot: format!("L{l:05}"),
                order_time: format!("{l:08}"),
                summary: Summary::from_slice(&values).expect("finite values"),
                evaluated: false,
            });
        }
        work.push(SeriesWork {
            series_id: s as i64,
            source: format!("sim-{s:04}"),
            characteristic: "x".into(),
            baseline: None,
            pending,
            open_mean: None,
            open_spread: None,
            cusum: (0.0, 0.0),
            online: (0, Vec::new()),
            baseline_residuals: None,
            units: None,
            values: Default::default(),
            lifecycle: Default::default(),
        });
    }
    let pass = super::decide(&work, monitor);
    let mut alerts = 0;
    let mut lots_tested = 0;
    let mut delays = vec![None; scenario.series];
    for d in &pass.decisions {
        let e = &d.evaluation;
        if e.kind == "mean" {
            lots_tested += 1;
        }
        if d.action == AlertAction::Open {
            alerts += 1;
            if e.kind == "mean" {
                let series = e.series_id as usize;
                let lot = (e.sample_id as usize) % 100_000;
                if delays[series].is_none() {
                    delays[series] = Some(lot + 1 - m);
                }
            }
        }
    }
    Outcome {
        alerts,
        lots_tested,
        delays,
    }
}
