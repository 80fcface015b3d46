//! Engine: the monitoring policy. Decides, never formats and never delivers.
//!
//! A series is one source × one characteristic. Its lots are ordered by sampling time (the
//! lot's earliest `sampled_at`, else the arrival of its first file), then lot code. The first
//! `monitor.baseline_lots` lots in that order form the baseline, frozen once complete.
//!
//! **Lots are clusters.** The baseline is analysed as a one-way random-effects model (lots as
//! groups): the within-lot variance and the between-lot variance component. A new lot's mean is
//! compared with the mean of the baseline lot means, with a standard error that includes the
//! between-lot component (`stats::monitoring::lot_vs_baseline`); when the baseline shows no
//! between-lot component, this reduces to a comparison on units. The model used is recorded
//! with every decision.
//!
//! **A false-alert budget over time.** The user states at most one false alert per
//! `monitor.false_alert_lots` in-control lots of a series. The per-lot rate 1/L is shared
//! between the mean test, the spread test and the CUSUM (`config::budget`); within one lot, the
//! tests of its characteristics are adjusted together (Holm or Benjamini–Hochberg) at that
//! share, so every series gets at most its share. The mean test's false-alarm probability is
//! exact with the baseline's estimated parameters (a prediction-type t test); the CUSUM's
//! decision interval is calibrated for a baseline of m estimated lot means
//! (`cusum_h_for_rate_estimated`).
//!
//! **Sustained small drifts.** A CUSUM on the standardised lot means, tuned for
//! `monitor.cusum_shift` (k = shift/2), signals drifts no single lot shows; it restarts after
//! each signal and when an alert resolves.
//!
//! **What matters.** Per characteristic: a direction (an improvement is never an alert) and a
//! minimum shift (alert only when the shift is significantly larger). Spread: the lot's
//! variance against the baseline's within-lot variance, one-sided (an increase).
//!
//! An alert is opened per series and kind (mean, spread) by the first significant lot; later
//! significant lots attach to it; `monitor.resolve_after_lots` consecutive in-control lots
//! resolve it. Decisions, alert changes and outbox rows are written in one transaction by
//! `store::write_pass`. A backfill dropped at once gives the same decisions as the files
//! arriving one by one in sampling order; a late lot is tested and recorded, and earlier
//! decisions are never rewritten.

pub mod operating;

use std::collections::BTreeMap;

use crate::config::{Channel, Config, Direction, Family, Monitor, OverTime};
use crate::stats::Summary;
use crate::stats::dist::f_sf;
use crate::stats::monitoring::{self, RandomEffects};
use crate::stats::multiplicity::{self, Method};
use crate::stats::ttest::Alternative;
use crate::store::{
    AlertAction, Decision, Design, EnginePass, NewBaseline, NewEvaluation, PassCounts, SeriesState,
    SeriesWork, Store, StoreError,
};
use crate::time::now_rfc3339;

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// Series decided and written per transaction: bounds the memory of a large backfill. A
/// source is never split, since one lot's characteristics form a family.
const SERIES_PER_PASS: usize = 64;

/// Loads the undecided lots, decides them, and writes the decisions.
pub async fn evaluate(store: &Store, config: &Config) -> Result<PassCounts, EngineError> {
    let mut work = store.pending_work().await?;
    let mut total = PassCounts::default();
    while !work.is_empty() {
        let mut end = SERIES_PER_PASS.min(work.len());
        while end < work.len() && work[end].source == work[end - 1].source {
            end += 1;
        }
        let mut chunk: Vec<SeriesWork> = work.drain(..end).collect();
        // Baselines about to be frozen get their residuals' normality checked; series whose
        // baseline is clearly non-normal without a between-lot component are tested on their
        // unit values, distribution-free.
        for w in &mut chunk {
            let n = config.monitor.baseline_lots;
            let baseline_ids: Option<Vec<i64>> = match &w.baseline {
                Some(b) if distribution_free(&b.design) => {
                    Some(store.baseline_samples(b.id).await?)
                }
                Some(_) => None,
                None if w.pending.len() >= n => {
                    let ids: Vec<i64> = w.pending[..n].iter().map(|s| s.sample_id).collect();
                    let residuals = store.residuals(&ids, 5000).await?;
                    let summaries: Vec<Summary> =
                        w.pending[..n].iter().map(|s| s.summary).collect();
                    let non_normal = crate::stats::normality::shapiro_wilk(&residuals)
                        .is_ok_and(|r| r.p_value < NON_NORMAL_P);
                    let no_between = monitoring::random_effects(&summaries)
                        .is_ok_and(|re| re.var_between == 0.0);
                    w.baseline_residuals = Some(residuals);
                    (non_normal && no_between).then_some(ids)
                }
                None => None,
            };
            if let Some(base_ids) = baseline_ids {
                let lot_ids: Vec<i64> = w
                    .pending
                    .iter()
                    .map(|s| s.sample_id)
                    .filter(|id| !base_ids.contains(id))
                    .collect();
                let base = store.values(&base_ids).await?;
                w.units = Some(crate::store::UnitValues {
                    baseline: base.into_values().flatten().collect(),
                    lots: store.values(&lot_ids).await?,
                });
            }
        }
        let mut pass = decide_at(
            &chunk,
            &config.monitor,
            config.alerts.repeat,
            chrono::Utc::now(),
        );
        pass.recipients = chunk
            .iter()
            .map(|w| {
                (
                    w.series_id,
                    recipients(config, &w.source, &w.characteristic),
                )
            })
            .collect();
        let counts = store.write_pass(&pass, &now_rfc3339()).await?;
        total.baselines += counts.baselines;
        total.evaluations += counts.evaluations;
        total.opened += counts.opened;
        total.resolved += counts.resolved;
    }
    if total.evaluations > 0 || total.baselines > 0 {
        tracing::info!(
            baselines = total.baselines,
            tests = total.evaluations,
            alerts_opened = total.opened,
            alerts_resolved = total.resolved,
            "evaluated"
        );
    }
    Ok(total)
}

/// The (channel, recipient) pairs that announce an alert event of a series: one outbox row
/// each. Email goes to the default list plus the source's and the characteristic's lists.
pub fn recipients(config: &Config, source: &str, characteristic: &str) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for channel in &config.alerts.channels {
        match channel {
            Channel::Log => out.push(("log".to_string(), "log".to_string())),
            Channel::Email => {
                if let Some(email) = &config.alerts.email {
                    for to in email.recipients_for(source, characteristic) {
                        out.push(("email".to_string(), to));
                    }
                }
            }
        }
    }
    out
}

/// Below this Shapiro–Wilk p the baseline residuals count as clearly non-normal (common
/// practice for a screening check).
const NON_NORMAL_P: f64 = 0.001;

/// Whether a series is tested on unit values by Mann–Whitney instead of the lot t test: its
/// baseline residuals are clearly non-normal and lots show no between-lot component (so units
/// are exchangeable across lots and a rank test on units is valid). With a between-lot
/// component, lot means (averages of n units) carry the test.
pub fn distribution_free(design: &Design) -> bool {
    design.normality_p.is_some_and(|p| p < NON_NORMAL_P) && design.re.var_between == 0.0
}

/// CUSUM decision intervals already computed in this pass, by (k, rate, m, df, two-sided):
/// a backfill designs hundreds of series with the same few parameters.
type HCache = std::collections::HashMap<(u64, u64, usize, u64, bool), f64>;

/// Designs a series from its baseline lots.
pub fn design(
    lots: &[Summary],
    residuals: Option<&[f64]>,
    monitor: &Monitor,
    characteristic: &str,
    cache: &mut HCache,
) -> Result<Design, String> {
    let re = monitoring::random_effects(lots).map_err(|e| format!("baseline: {e}"))?;
    let policy = monitor.policy(characteristic);
    let (mean_share, spread_share, cusum_share) = monitor.shares(policy.spread);
    let mut level_mean = monitor.level.unwrap_or(mean_share);
    let two_sided = policy.direction == Direction::TwoSided;
    let cusum = if monitor.cusum {
        let k = monitor.cusum_shift / 2.0;
        // The z of a lot mean is standardised by the baseline's estimate of a lot mean's sd:
        // with lot-to-lot variation that rests on the m lot means (m - 1 df), otherwise on the
        // within-lot variance (N - m df).
        let df_sd = if re.var_between > 0.0 {
            re.df_between
        } else {
            re.df_within
        };
        // df rounded to a whole number: the calibration changes far less than its own
        // tolerance between neighbouring df.
        let df_sd = df_sd.round().max(1.0);
        let key = (
            k.to_bits(),
            cusum_share.to_bits(),
            re.m,
            df_sd as u64,
            two_sided,
        );
        let h = match cache.get(&key) {
            Some(h) => Some(*h),
            None => {
                let h = monitoring::cusum_h_for_rate_estimated(
                    k,
                    cusum_share,
                    re.m as f64,
                    df_sd,
                    two_sided,
                )
                .ok();
                if let Some(h) = h {
                    cache.insert(key, h);
                }
                h
            }
        };
        // Too few baseline lots for any CUSUM to keep the budget: the lot test gets its share.
        if h.is_none() && monitor.level.is_none() {
            level_mean += cusum_share;
        }
        h.map(|h| (k, h))
    } else {
        None
    };
    let normality_p = residuals
        .filter(|r| r.len() >= 3)
        .and_then(|r| crate::stats::normality::shapiro_wilk(r).ok())
        .map(|w| w.p_value);
    Ok(Design {
        re,
        level_mean,
        level_spread: spread_share,
        cusum,
        normality_p,
    })
}

/// The alternative and the hypothesised difference (lot − baseline) of a characteristic's
/// mean test.
fn mean_hypothesis(direction: Direction, min_shift: f64) -> (Alternative, f64) {
    match direction {
        Direction::TwoSided => (Alternative::TwoSided, 0.0),
        Direction::HigherIsBetter => (Alternative::Less, -min_shift),
        Direction::LowerIsBetter => (Alternative::Greater, min_shift),
    }
}

/// The decisions for one lot of one series before the family adjustment.
struct Tested {
    series: usize,
    sample: usize,
    lot_id: i64,
    mean: Result<monitoring::LotTest, String>,
    /// Two-sided tests with a minimum shift: p of |d| > min_shift.
    mean_p: Option<f64>,
    spread: Option<(f64, f64, f64, f64)>,
    /// The lot mean standardised by the baseline: (mean − baseline mean) / sd of a lot mean.
    z: Option<f64>,
    /// Mann–Whitney (U, p) when the series is tested distribution-free.
    rank: Option<(f64, f64)>,
}

/// The decisions for `work`, a pure function of the stored state and the policy (without
/// repeated announcements of open alerts).
pub fn decide(work: &[SeriesWork], monitor: &Monitor) -> EnginePass {
    decide_at(work, monitor, None, chrono::Utc::now())
}

/// A shift counts as grown, for a repeated announcement, when it is half again as large as the
/// one last announced (common practice is to re-notify on a material change; the factor is
/// our choice).
const GROWN: f64 = 1.5;

/// [`decide`] at time `now`, announcing a still-significant open alert again when `repeat`
/// has passed since its last message or its shift has grown, unless it is acknowledged.
pub fn decide_at(
    work: &[SeriesWork],
    monitor: &Monitor,
    repeat: Option<std::time::Duration>,
    now: chrono::DateTime<chrono::Utc>,
) -> EnginePass {
    let mut pass = EnginePass::default();
    let mut cache = HCache::new();
    let mut designs: Vec<Option<(Design, Summary)>> = vec![None; work.len()];
    let mut tested: Vec<Tested> = Vec::new();
    for (i, w) in work.iter().enumerate() {
        if !monitor.monitors(&w.source, &w.characteristic) {
            continue;
        }
        let policy = monitor.policy(&w.characteristic);
        let (design, merged, first) = match &w.baseline {
            Some(b) => (b.design, b.summary, 0),
            None => {
                if w.pending.len() < monitor.baseline_lots {
                    continue;
                }
                let lots = &w.pending[..monitor.baseline_lots];
                let summaries: Vec<Summary> = lots.iter().map(|l| l.summary).collect();
                let merged = summaries[1..]
                    .iter()
                    .fold(summaries[0], |acc, s| acc.merge(s));
                let d = match design(
                    &summaries,
                    w.baseline_residuals.as_deref(),
                    monitor,
                    &w.characteristic,
                    &mut cache,
                ) {
                    Ok(d) => d,
                    Err(e) => {
                        tracing::warn!(source = %w.source, characteristic = %w.characteristic, error = %e, "cannot build a baseline yet");
                        continue;
                    }
                };
                pass.baselines.push(NewBaseline {
                    series_id: w.series_id,
                    definition: format!("first {} lots", monitor.baseline_lots),
                    sample_ids: lots.iter().map(|l| l.sample_id).collect(),
                    summary: merged,
                    last_order_time: lots[lots.len() - 1].order_time.clone(),
                    design: d,
                    note: design_note(&d, monitor),
                });
                (d, merged, monitor.baseline_lots)
            }
        };
        designs[i] = Some((design, merged));
        let (alternative, delta) = mean_hypothesis(policy.direction, policy.min_shift);
        for (j, s) in w.pending.iter().enumerate().skip(first) {
            let mean =
                monitoring::lot_vs_baseline(&design.re, &s.summary, alternative, delta, 0.95)
                    .map_err(|e| e.to_string());
            // A minimum shift in both directions: the smaller of the two one-sided p-values,
            // doubled.
            let mean_p = match (&mean, policy.direction) {
                (Ok(_), Direction::TwoSided) if policy.min_shift > 0.0 => {
                    let lo = monitoring::lot_vs_baseline(
                        &design.re,
                        &s.summary,
                        Alternative::Less,
                        -policy.min_shift,
                        0.95,
                    );
                    let hi = monitoring::lot_vs_baseline(
                        &design.re,
                        &s.summary,
                        Alternative::Greater,
                        policy.min_shift,
                        0.95,
                    );
                    match (lo, hi) {
                        (Ok(a), Ok(b)) => Some((2.0 * a.p_value.min(b.p_value)).min(1.0)),
                        _ => None,
                    }
                }
                (Ok(m), _) => Some(m.p_value),
                _ => None,
            };
            // Distribution-free: Mann–Whitney of the lot's units against the baseline's units,
            // with the lot shifted by the hypothesised difference.
            let rank = match (&w.units, distribution_free(&design)) {
                (Some(u), true) => u.lots.get(&s.sample_id).and_then(|lot| {
                    let test = |shift: f64, alt: Alternative| {
                        let shifted: Vec<f64> = lot.iter().map(|v| v - shift).collect();
                        crate::stats::rank::mann_whitney(&shifted, &u.baseline, alt).ok()
                    };
                    match (policy.direction, policy.min_shift > 0.0) {
                        (Direction::TwoSided, true) => {
                            let lo = test(-policy.min_shift, Alternative::Less)?;
                            let hi = test(policy.min_shift, Alternative::Greater)?;
                            let r = if lo.p_value < hi.p_value { lo } else { hi };
                            Some((r.statistic, (2.0 * r.p_value).min(1.0)))
                        }
                        _ => test(delta, alternative).map(|r| (r.statistic, r.p_value)),
                    }
                }),
                _ => None,
            };
            let mean_p = match rank {
                Some((_, p)) => Some(p),
                None => mean_p,
            };
            let spread = if policy.spread {
                spread_test(&design.re, &s.summary)
            } else {
                None
            };
            // CUSUM on z = (lot mean − baseline mean) / sd of a lot mean.
            let z = mean.as_ref().ok().and_then(|_| {
                let sd =
                    (design.re.var_between + design.re.var_within / s.summary.n() as f64).sqrt();
                (sd > 0.0).then(|| (s.summary.mean() - design.re.mean_of_means) / sd)
            });
            tested.push(Tested {
                series: i,
                sample: j,
                lot_id: s.lot_id,
                mean,
                mean_p,
                spread,
                z,
                rank,
            });
        }
    }

    // Families: the mean tests of one lot, and the spread tests of one lot.
    let method = match monitor.family {
        Family::Holm => Method::Holm,
        Family::BenjaminiHochberg => Method::BenjaminiHochberg,
    };
    let adjust = |members: &[(usize, f64)]| -> Vec<(usize, f64, usize)> {
        let p: Vec<f64> = members.iter().map(|m| m.1).collect();
        let adj = multiplicity::adjust(&p, method).unwrap_or(p);
        members
            .iter()
            .zip(adj)
            .map(|(m, a)| (m.0, a, members.len()))
            .collect()
    };
    let mut mean_family: BTreeMap<i64, Vec<(usize, f64)>> = BTreeMap::new();
    let mut spread_family: BTreeMap<i64, Vec<(usize, f64)>> = BTreeMap::new();
    for (k, t) in tested.iter().enumerate() {
        if let Some(p) = t.mean_p {
            mean_family.entry(t.lot_id).or_default().push((k, p));
        }
        if let Some((_, _, _, p)) = t.spread {
            spread_family.entry(t.lot_id).or_default().push((k, p));
        }
    }
    let mut mean_adj: Vec<Option<(f64, usize)>> = vec![None; tested.len()];
    let mut spread_adj: Vec<Option<(f64, usize)>> = vec![None; tested.len()];
    for members in mean_family.values() {
        for (k, a, size) in adjust(members) {
            mean_adj[k] = Some((a, size));
        }
    }
    for members in spread_family.values() {
        for (k, a, size) in adjust(members) {
            spread_adj[k] = Some((a, size));
        }
    }

    // Alert lifecycle, series by series in lot order, per kind.
    let mut by_series: BTreeMap<usize, Vec<usize>> = BTreeMap::new();
    for (k, t) in tested.iter().enumerate() {
        by_series.entry(t.series).or_default().push(k);
    }
    for (i, ks) in by_series {
        let w = &work[i];
        let (design, merged) = designs[i].expect("tested series have a design");
        let policy = monitor.policy(&w.characteristic);
        let (alternative, delta) = mean_hypothesis(policy.direction, policy.min_shift);
        let mut mean_run = w.open_mean.map(|a| a.in_control_run);
        // Last announcement of the open mean alert: (when, shift, acknowledged).
        let mut notified = w
            .open_mean
            .map(|a| (a.notified_at, a.notified_estimate, a.acknowledged));
        let mut spread_run = w.open_spread.map(|a| a.in_control_run);
        let (mut upper, mut lower) = w.cusum;
        let mut online = OnlineFdr::new(monitor, &w.online);
        for k in ks {
            let t = &tested[k];
            let s = &w.pending[t.sample];
            // CUSUM sums after this lot and whether they crossed h; they restart after a
            // signal and when the mean alert resolves.
            let cusum = match (design.cusum, t.z) {
                (Some((k, h)), Some(z)) => {
                    // A minimum shift moves both reference values outwards by its z size.
                    let dz = policy.min_shift
                        / (design.re.var_between + design.re.var_within / s.summary.n() as f64)
                            .sqrt();
                    let (mut up, mut lo) = (upper, lower);
                    // Only the side that matters accumulates.
                    if policy.direction != Direction::HigherIsBetter {
                        up = (up + z - dz - k).max(0.0);
                    }
                    if policy.direction != Direction::LowerIsBetter {
                        lo = (lo - z - dz - k).max(0.0);
                    }
                    let signal = up > h || lo > h;
                    (upper, lower) = if signal { (0.0, 0.0) } else { (up, lo) };
                    Some((up, lo, signal))
                }
                _ => None,
            };
            let base = NewEvaluation {
                sample_id: s.sample_id,
                series_id: w.series_id,
                kind: "mean",
                test: "lot-mean-t",
                model: None,
                alternative: alternative.as_str(),
                delta,
                statistic: None,
                df: None,
                df2: None,
                p_value: None,
                p_adjusted: None,
                method: monitor.family.as_str(),
                family_size: 0,
                level: design.level_mean,
                significant: false,
                baseline: merged,
                baseline_mean: design.re.mean_of_means,
                lot: s.summary,
                estimate: None,
                ci: None,
                std_error: None,
                cusum: None,
                cusum_signal: false,
                cpk: lot_cpk(&policy, &s.summary),
                note: None,
            };
            // Mean (the lot test and the CUSUM).
            let mut ev = base.clone();
            let mean_signal = match (&t.mean, mean_adj[k]) {
                (Ok(r), Some((p_adj, size))) => {
                    ev.model = Some(r.method.as_str());
                    ev.statistic = Some(r.statistic);
                    ev.df = Some(r.df);
                    ev.p_value = t.mean_p;
                    ev.p_adjusted = Some(p_adj);
                    ev.family_size = size as i64;
                    ev.estimate = Some(r.estimate);
                    ev.ci = Some(r.ci);
                    ev.std_error = Some(r.std_error);
                    let lot_significant = match online.as_mut() {
                        // Online FDR: the raw lot p-value against the stream's current level.
                        Some(o) => {
                            let p = t.mean_p.unwrap_or(1.0);
                            let (level, rejected) = o.test(p);
                            ev.level = level;
                            ev.method = monitor.over_time.as_str();
                            ev.p_adjusted = None;
                            rejected
                        }
                        None => p_adj <= design.level_mean,
                    };
                    let cusum_signal = cusum.is_some_and(|c| c.2);
                    if let (Some((up, lo, sig)), Some((_, h))) = (cusum, design.cusum) {
                        ev.cusum = Some((up, lo, h));
                        ev.cusum_signal = sig;
                    }
                    ev.significant = lot_significant || cusum_signal;
                    if cusum_signal && !lot_significant {
                        ev.test = "cusum";
                    }
                    if let Some((u, _)) = t.rank {
                        ev.test = "mann-whitney";
                        ev.model = Some("units, distribution-free");
                        ev.statistic = Some(u);
                        ev.df = None;
                        ev.note = Some(format!(
                            "baseline residuals fail the normality check (Shapiro–Wilk p = \
                             {:.2e}): the lot's units were ranked against the baseline's units \
                             (Mann–Whitney); statistic is U of the lot",
                            design.normality_p.unwrap_or(0.0)
                        ));
                    } else if design.normality_p.is_some_and(|p| p < NON_NORMAL_P) {
                        ev.note = Some(format!(
                            "baseline residuals fail the normality check (Shapiro–Wilk p = \
                             {:.2e}); the test rests on lot means of {} units being close to \
                             normal",
                            design.normality_p.unwrap_or(0.0),
                            s.summary.n()
                        ));
                    }
                    Some(ev.significant)
                }
                (result, _) => {
                    ev.note = Some(format!(
                        "not tested: {}",
                        result.as_ref().err().cloned().unwrap_or_default()
                    ));
                    None
                }
            };
            let mut action = lifecycle(mean_signal, &mut mean_run, monitor.resolve_after_lots);
            match action {
                AlertAction::Resolve => {
                    (upper, lower) = (0.0, 0.0);
                    notified = None;
                }
                AlertAction::Open => notified = Some((Some(now), ev.estimate, false)),
                AlertAction::Attach => {
                    if let (Some(every), Some((at, shift, acked))) = (repeat, notified)
                        && !acked
                    {
                        let due =
                            at.is_none_or(|t| (now - t).to_std().unwrap_or_default() >= every);
                        // Not twice in one pass: a backfill whose later lots show a larger
                        // shift sends one message, not an opening and a repeat at once.
                        let grown = at != Some(now)
                            && match (shift, ev.estimate) {
                                (Some(old), Some(new)) => new.abs() >= GROWN * old.abs(),
                                _ => false,
                            };
                        if due || grown {
                            action = AlertAction::Repeat;
                            notified = Some((Some(now), ev.estimate, false));
                        }
                    }
                }
                _ => {}
            }
            pass.decisions.push(Decision {
                evaluation: ev,
                action,
            });

            // Spread.
            if let Some((f, df1, df2, p)) = t.spread {
                let (p_adj, size) = spread_adj[k].unwrap_or((p, 1));
                let mut ev = base.clone();
                ev.kind = "spread";
                ev.test = "f-variance";
                ev.model = Some("within-lot");
                ev.alternative = "greater";
                ev.delta = 0.0;
                ev.statistic = Some(f);
                ev.df = Some(df1);
                ev.df2 = Some(df2);
                ev.p_value = Some(p);
                ev.p_adjusted = Some(p_adj);
                ev.family_size = size as i64;
                ev.level = design.level_spread;
                ev.significant = p_adj <= design.level_spread;
                ev.estimate = Some(f);
                let action = lifecycle(
                    Some(ev.significant),
                    &mut spread_run,
                    monitor.resolve_after_lots,
                );
                pass.decisions.push(Decision {
                    evaluation: ev,
                    action,
                });
            }
        }
        let (online_tests, online_rejected) = match online {
            Some(o) => o.state(),
            None => w.online.clone(),
        };
        pass.states.push(SeriesState {
            series_id: w.series_id,
            cusum_upper: upper,
            cusum_lower: lower,
            online_tests,
            online_rejected,
        });
    }
    pass
}

/// The online FDR procedure of a series, when `monitor.over_time` asks for one.
enum OnlineFdr {
    /// LOND and the 1-based indices of its rejections (LOND itself needs only their count).
    Lond(monitoring::Lond, Vec<u64>),
    Lord(monitoring::LordPlusPlus),
}

impl OnlineFdr {
    fn new(monitor: &Monitor, state: &(u64, Vec<u64>)) -> Option<OnlineFdr> {
        let alpha = monitor.fdr_level;
        match monitor.over_time {
            OverTime::Budget => None,
            OverTime::Lond => monitoring::Lond::from_state(monitoring::LondState {
                alpha,
                tests: state.0,
                discoveries: state.1.len() as u64,
            })
            .ok()
            .map(|l| OnlineFdr::Lond(l, state.1.clone())),
            OverTime::Lord => {
                // The default initial wealth of the reference implementation: alpha / 10.
                monitoring::LordPlusPlus::from_state(monitoring::LordState {
                    alpha,
                    w0: alpha / 10.0,
                    tests: state.0,
                    rejections: state.1.clone(),
                })
                .ok()
                .map(OnlineFdr::Lord)
            }
        }
    }

    /// Tests the next p-value of the stream: (the level used, rejected).
    fn test(&mut self, p: f64) -> (f64, bool) {
        match self {
            OnlineFdr::Lond(l, rejected) => {
                let level = l.level();
                let r = l.record(p).unwrap_or(false);
                if r {
                    rejected.push(l.state().tests);
                }
                (level, r)
            }
            OnlineFdr::Lord(l) => (l.level(), l.record(p).unwrap_or(false)),
        }
    }

    /// (tests so far, 1-based indices of the rejected tests) for the store.
    fn state(&self) -> (u64, Vec<u64>) {
        match self {
            OnlineFdr::Lond(l, rejected) => (l.state().tests, rejected.clone()),
            OnlineFdr::Lord(l) => {
                let s = l.state();
                (s.tests, s.rejections.clone())
            }
        }
    }
}

/// Cpk of a lot against the characteristic's specification limits, when it has any.
fn lot_cpk(policy: &crate::config::CharacteristicPolicy, lot: &Summary) -> Option<(f64, f64, f64)> {
    if policy.lsl.is_none() && policy.usl.is_none() {
        return None;
    }
    let c =
        crate::stats::capability::cpk(lot.mean(), lot.sd()?, lot.n(), policy.lsl, policy.usl, 0.95)
            .ok()?;
    Some((c.cpk, c.low, c.high))
}

/// Cpk of a baseline (mean of lot means, total sd including the between-lot component, all
/// its units), when the characteristic has specification limits.
pub fn baseline_cpk(
    design: &Design,
    monitor: &Monitor,
    characteristic: &str,
) -> Option<crate::stats::capability::Cpk> {
    let policy = monitor.policy(characteristic);
    if policy.lsl.is_none() && policy.usl.is_none() {
        return None;
    }
    let re = &design.re;
    crate::stats::capability::cpk(
        re.mean_of_means,
        (re.var_between + re.var_within).sqrt(),
        re.n_total,
        policy.lsl,
        policy.usl,
        0.95,
    )
    .ok()
}

/// One-sided F test of the lot's variance against the baseline's within-lot variance:
/// (F, df1, df2, p). None when the lot has a single unit.
fn spread_test(re: &RandomEffects, lot: &Summary) -> Option<(f64, f64, f64, f64)> {
    let var = lot.variance()?;
    let df1 = (lot.n() - 1) as f64;
    let f = var / re.var_within;
    let p = f_sf(f, df1, re.df_within).ok()?;
    Some((f, df1, re.df_within, p.clamp(0.0, 1.0)))
}

/// The alert change for one decision of a kind, updating the open alert's in-control run
/// (`None` = no alert open).
fn lifecycle(signal: Option<bool>, run: &mut Option<i64>, resolve_after: usize) -> AlertAction {
    match (signal, *run) {
        (None, _) | (Some(false), None) => AlertAction::None,
        (Some(true), None) => {
            *run = Some(0);
            AlertAction::Open
        }
        (Some(true), Some(_)) => {
            *run = Some(0);
            AlertAction::Attach
        }
        (Some(false), Some(r)) => {
            let r = r + 1;
            if r as usize >= resolve_after {
                *run = None;
                AlertAction::Resolve
            } else {
                *run = Some(r);
                AlertAction::InControl { run: r }
            }
        }
    }
}

/// The smallest shift of a lot mean (in the characteristic's unit, beyond any minimum shift)
/// that a single lot of typical size is flagged for with 90 % power by the lot test at its
/// per-lot level (the CUSUM detects smaller sustained shifts over several lots).
pub fn detectable_shift(design: &Design, monitor: &Monitor, characteristic: &str) -> Option<f64> {
    let re = &design.re;
    let policy = monitor.policy(characteristic);
    let m = re.m as f64;
    let n = re.n_harmonic;
    let var = re.var_between * (1.0 + 1.0 / m) + re.var_within * (1.0 / n + 1.0 / (m * n));
    let df = if re.var_between > 0.0 {
        re.df_between
    } else {
        re.df_within
    };
    monitoring::min_detectable_shift(
        design.level_mean,
        0.9,
        var.sqrt(),
        df,
        policy.direction == Direction::TwoSided,
    )
    .ok()
    .map(|d| d + policy.min_shift)
}

/// Human-readable summary of a design, stored with the baseline.
pub fn design_note(d: &Design, monitor: &Monitor) -> String {
    let model = if d.re.var_between > 0.0 {
        "lot means (between-lot variance material)"
    } else {
        "units (no between-lot variance component)"
    };
    let mut s = format!(
        "{model}; between-lot sd {:.4e}, within-lot sd {:.4e} (F = {:.3}, p = {:.3e}); \
         per-lot level {:.2e} (mean) / {:.2e} (spread) for one false alert per {} lots",
        d.re.var_between.sqrt(),
        d.re.var_within.sqrt(),
        d.re.f_statistic,
        d.re.p_value,
        d.level_mean,
        d.level_spread,
        monitor.false_alert_lots
    );
    match d.cusum {
        Some((k, h)) => s.push_str(&format!(
            "; CUSUM k = {k:.3}, h = {h:.3} (calibrated for {} estimated lot means)",
            d.re.m
        )),
        None if monitor.cusum => s.push_str(&format!(
            "; no CUSUM: {} baseline lots are too few to calibrate one within the budget",
            d.re.m
        )),
        None => {}
    }
    if let Some(p) = d.normality_p {
        s.push_str(&format!("; Shapiro–Wilk p of residuals {p:.3e}"));
    }
    s
}
