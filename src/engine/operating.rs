//! Operating characteristics of the monitoring policy, by simulation.
//!
//! Runs [`super::decide`], the same pure function the daemon uses, on simulated series with
//! real between-lot variation: each lot's mean is the process mean plus a lot effect
//! N(0, τ²), each unit adds an error of sd σ drawn from the scenario's unit distribution
//! (normal, heavy-tailed Student t, skewed log-normal, or normal read on a coarse gauge), and
//! a share of units may be gross outliers (off by 5 to 10 σ, either side). Reports false
//! alerts per 1,000 in-control lots, the number of lots from the start of a shift to its
//! first alert, alerts opened per shifted series, and lots from the end of a shift to the
//! resolution. Used by the operating test suite (`tests/engine_operating.rs`) and the table
//! printer (`benches/operating.rs`); fixed seeds make every figure reproducible.

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, LogNormal, Normal, StudentT};

use crate::config::{Config, Monitor};
use crate::stats::Summary;
use crate::store::{AlertAction, SeriesSample, SeriesWork};

/// The distribution of a unit's deviation from its lot mean (scaled to sd 1 where the sd
/// exists, centred on its mean).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Units {
    Normal,
    /// Student t with this many df (> 2), scaled to sd 1.
    StudentT(f64),
    /// Log-normal with this σ of the log, scaled to sd 1 and centred (right-skewed).
    LogNormal(f64),
    /// Normal units read on a gauge with this resolution (in unit sd).
    Coarse(f64),
    /// Log-normal values (a leakage current): the value is 10 × exp(σ × (the normal model's
    /// value − 10)), so lot effects, shifts and units act on the log scale with log sd σ.
    LogNormalValues(f64),
}

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
    pub unit_dist: Units,
    /// Share of units that are gross outliers (5 to 10 σ off, either side).
    pub outlier_rate: f64,
    /// The shift lasts this many lots, then the process is back (None: it never ends).
    pub shift_lots: Option<usize>,
    /// During the shift the units' deviations are multiplied by this (1 = spread unchanged).
    pub spread_factor: f64,
}

impl Scenario {
    /// Normal units, no outliers, a shift that never ends.
    pub fn normal(
        series: usize,
        lots: usize,
        units: usize,
        between: f64,
        shift: f64,
        seed: u64,
    ) -> Scenario {
        Scenario {
            series,
            lots,
            units,
            between,
            shift,
            seed,
            unit_dist: Units::Normal,
            outlier_rate: 0.0,
            shift_lots: None,
            spread_factor: 1.0,
        }
    }
}

/// Draws unit deviations of a distribution.
struct UnitDraw {
    dist: Units,
    normal: Normal<f64>,
    t: Option<(StudentT<f64>, f64)>,
    lognormal: Option<(LogNormal<f64>, f64, f64)>,
}

impl UnitDraw {
    fn new(dist: Units) -> UnitDraw {
        let t = match dist {
            Units::StudentT(df) => Some((
                StudentT::new(df).expect("valid df"),
                ((df - 2.0) / df).sqrt(),
            )),
            _ => None,
        };
        let lognormal = match dist {
            Units::LogNormal(s) => {
                let mean = (s * s / 2.0).exp();
                let sd = ((s * s).exp_m1() * (s * s).exp()).sqrt();
                Some((LogNormal::new(0.0, s).expect("valid sigma"), mean, sd))
            }
            _ => None,
        };
        UnitDraw {
            dist,
            normal: Normal::new(0.0, 1.0).expect("valid sd"),
            t,
            lognormal,
        }
    }

    /// One deviation (before any gauge rounding).
    fn sample(&self, rng: &mut StdRng) -> f64 {
        match (self.dist, &self.t, &self.lognormal) {
            (Units::StudentT(_), Some((t, scale)), _) => t.sample(rng) * scale,
            (Units::LogNormal(_), _, Some((ln, mean, sd))) => (ln.sample(rng) - mean) / sd,
            _ => self.normal.sample(rng),
        }
    }

    /// A reading of `x` on the gauge.
    fn read(&self, x: f64) -> f64 {
        match self.dist {
            Units::Coarse(r) => (x / r).round() * r,
            _ => x,
        }
    }
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
    /// Per series: mean alerts opened (a reopening is not a new alert).
    pub mean_openings: Vec<usize>,
    /// Spread alerts opened over all series.
    pub spread_alerts: usize,
    /// Per series: lots from the start of the shift to the first spread alert.
    pub spread_delays: Vec<Option<usize>>,
    /// Per series: lots from the end of the shift to the resolution of the mean alert open
    /// then (1 = the first lot after the shift), None when none was open or it never resolved.
    pub resolution_delays: Vec<Option<usize>>,
    /// Per series: whether a mean alert was open when the shift ended.
    pub open_at_end: Vec<bool>,
    /// Units reported as outliers over all lots (baseline lots included).
    pub outliers: usize,
    /// Units simulated as gross outliers.
    pub gross: usize,
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

    /// Mean alerts opened per series that alerted at all.
    pub fn openings_per_alerted_series(&self) -> f64 {
        let alerted: Vec<usize> = self
            .mean_openings
            .iter()
            .copied()
            .filter(|&n| n > 0)
            .collect();
        alerted.iter().sum::<usize>() as f64 / alerted.len().max(1) as f64
    }

    /// Share of the series with an alert open at the end of the shift that resolved within
    /// `lots` lots after it.
    pub fn resolved_within(&self, lots: usize) -> f64 {
        let open = self.open_at_end.iter().filter(|o| **o).count();
        let done = self
            .resolution_delays
            .iter()
            .zip(&self.open_at_end)
            .filter(|(d, o)| **o && d.is_some_and(|d| d <= lots))
            .count();
        done as f64 / open.max(1) as f64
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
    let draw = UnitDraw::new(scenario.unit_dist);
    let tau = scenario.between;
    let lot_effect = Normal::new(0.0, tau.max(1e-300)).expect("valid sd");
    let lot_sd = (tau * tau + 1.0 / scenario.units as f64).sqrt();
    let m = monitor.baseline_lots;
    let end = scenario.shift_lots.map_or(usize::MAX, |l| m + l);
    let mut work = Vec::with_capacity(scenario.series);
    let mut gross = 0;
    for s in 0..scenario.series {
        let mut w = empty_work(s);
        for l in 0..m + scenario.lots {
            let shifted = l >= m && l < end;
            let shift = if shifted {
                scenario.shift * lot_sd
            } else {
                0.0
            };
            let spread = if shifted { scenario.spread_factor } else { 1.0 };
            let effect = if tau > 0.0 {
                lot_effect.sample(&mut rng)
            } else {
                0.0
            };
            let mut units = Vec::with_capacity(scenario.units);
            for u in 0..scenario.units {
                let mut x = 10.0 + shift + effect + spread * draw.sample(&mut rng);
                if scenario.outlier_rate > 0.0 && rng.random::<f64>() < scenario.outlier_rate {
                    let off = rng.random_range(5.0..10.0);
                    x += if rng.random::<bool>() { off } else { -off };
                    gross += 1;
                }
                if let Units::LogNormalValues(sigma) = scenario.unit_dist {
                    x = 10.0 * (sigma * (x - 10.0)).exp();
                }
                units.push((u as i64 + 1, draw.read(x)));
            }
            let values: Vec<f64> = units.iter().map(|u| u.1).collect();
            let id = (s * 100_000 + l) as i64;
            w.pending.push(SeriesSample {
                sample_id: id,
                lot_id: id,
                lot: format!("L{l:05}"),
                order_time: format!("{l:08}"),
                summary: Summary::from_slice(&values).expect("finite values"),
                evaluated: false,
                file_id: id,
            });
            w.values.insert(id, units);
        }
        work.push(w);
    }
    let pass = super::decide(&work, monitor);
    let mut out = tally(&pass, scenario, m, end);
    out.gross = gross;
    out
}

pub(super) fn empty_work(s: usize) -> SeriesWork {
    SeriesWork {
        series_id: s as i64,
        source: format!("sim-{s:04}"),
        characteristic: "x".into(),
        baseline: None,
        pending: Vec::new(),
        open_mean: None,
        open_spread: None,
        cusum: (0.0, 0.0),
        online: (0, Vec::new()),
        baseline_residuals: None,
        units: None,
        values: Default::default(),
        lifecycle: Default::default(),
    }
}

/// Counts what a pass did on a scenario whose shift covers lots [m, end).
fn tally(pass: &crate::store::EnginePass, scenario: &Scenario, m: usize, end: usize) -> Outcome {
    let n = scenario.series;
    let mut out = Outcome {
        alerts: 0,
        lots_tested: 0,
        delays: vec![None; n],
        mean_openings: vec![0; n],
        spread_alerts: 0,
        spread_delays: vec![None; n],
        resolution_delays: vec![None; n],
        open_at_end: vec![false; n],
        outliers: pass.outliers.len(),
        gross: 0,
    };
    let mut open = vec![false; n];
    for d in &pass.decisions {
        let e = &d.evaluation;
        let series = e.series_id as usize;
        let lot = (e.sample_id as usize) % 100_000;
        if e.kind == "mean" {
            out.lots_tested += 1;
            if lot == end {
                out.open_at_end[series] = open[series];
            }
        }
        match (d.action, e.kind) {
            (AlertAction::Open, kind) => {
                out.alerts += 1;
                if kind == "mean" {
                    out.mean_openings[series] += 1;
                    open[series] = true;
                    if out.delays[series].is_none() {
                        out.delays[series] = Some(lot + 1 - m);
                    }
                } else {
                    out.spread_alerts += 1;
                    if out.spread_delays[series].is_none() && lot >= m {
                        out.spread_delays[series] = Some(lot + 1 - m);
                    }
                }
            }
            (AlertAction::Reopen, kind) => {
                // Announced like an opening: counted as an alert, not as a new one per series.
                out.alerts += 1;
                if kind == "mean" {
                    open[series] = true;
                }
            }
            (AlertAction::Resolve, "mean") => {
                open[series] = false;
                if lot >= end && out.open_at_end[series] && out.resolution_delays[series].is_none()
                {
                    out.resolution_delays[series] = Some(lot + 1 - end);
                }
            }
            _ => {}
        }
    }
    out
}
