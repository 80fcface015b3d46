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

pub mod lifecycle;
pub mod limits;
pub mod operating;
pub mod screen;

use std::collections::BTreeMap;

use crate::config::{Channel, CharacteristicPolicy, Config, Direction, Family, Monitor, OverTime};
use crate::stats::Summary;
use crate::stats::dist::f_sf;
use crate::stats::monitoring::{self, RandomEffects};
use crate::stats::multiplicity::{self, Method};
use crate::stats::robust::{self, OutlierFence, SpreadBaseline};
use crate::stats::ttest::Alternative;
use crate::store::{
    AlertAction, Decision, Design, EnginePass, Lifecycle, NewBaseline, NewEvaluation, PassCounts,
    SeriesState, SeriesWork, Store, StoreError,
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

/// Undecided lots per transaction, roughly: the unit values of every lot of a chunk are read
/// at once, so a year's export (a thousand lots per series) is decided a few series at a time.
/// A chunk still holds at least one whole source.
const LOTS_PER_PASS: usize = 4096;

/// Where the next chunk of `work` (sorted by source) ends.
fn chunk_end(work: &[SeriesWork]) -> usize {
    let (mut end, mut lots) = (0, 0);
    while end < work.len() && end < SERIES_PER_PASS && (end == 0 || lots < LOTS_PER_PASS) {
        lots += work[end].pending.len();
        end += 1;
    }
    while end < work.len() && work[end].source == work[end - 1].source {
        end += 1;
    }
    end
}

/// Loads the undecided lots, decides them, and writes the decisions, as the only daemon
/// deciding meanwhile (several daemons may share a PostgreSQL history).
pub async fn evaluate(store: &Store, config: &Config) -> Result<PassCounts, EngineError> {
    let lock = store.lock_engine().await?;
    let result = evaluate_locked(store, config).await;
    store.unlock_engine(lock).await?;
    result
}

/// The chunks are pipelined: while one chunk is decided on a blocking thread (pure
/// computation), the next chunk's unit values are read and the previous chunk's decisions are
/// written. Chunks never share a series, and the state every decision starts from was read
/// before the first chunk, so no chunk's reads depend on another's writes.
async fn evaluate_locked(store: &Store, config: &Config) -> Result<PassCounts, EngineError> {
    let mut work = store.pending_work().await?;
    let mut total = PassCounts::default();
    let mut deciding: Option<tokio::task::JoinHandle<(Vec<SeriesWork>, EnginePass)>> = None;
    loop {
        let next = if work.is_empty() {
            None
        } else {
            let end = chunk_end(&work);
            Some(read_chunk(store, work.drain(..end).collect()).await?)
        };
        let decided = match deciding.take() {
            // A panic while deciding is the engine's own bug: it surfaces here as it was.
            Some(handle) => Some(
                handle
                    .await
                    .unwrap_or_else(|e| std::panic::resume_unwind(e.into_panic())),
            ),
            None => None,
        };
        deciding = next.map(|chunk| {
            let (monitor, repeat) = (config.monitor.clone(), config.alerts.repeat);
            tokio::task::spawn_blocking(move || {
                let mut chunk = chunk;
                for w in &mut chunk {
                    about_to_freeze(w, monitor.baseline_lots);
                }
                let pass = decide_at(&chunk, &monitor, repeat, chrono::Utc::now());
                (chunk, pass)
            })
        });
        if let Some((chunk, pass)) = decided {
            write_chunk(store, config, &chunk, pass, &mut total).await?;
        }
        if deciding.is_none() {
            break;
        }
    }
    if total.evaluations > 0 || total.baselines > 0 {
        tracing::info!(
            baselines = total.baselines,
            tests = total.evaluations,
            alerts_opened = total.opened,
            alerts_resolved = total.resolved,
            alerts_reopened = total.reopened,
            outliers = total.outliers,
            "evaluated"
        );
    }
    Ok(total)
}

/// Reads what deciding `chunk` needs beyond the pending work: the unit values of its lots and,
/// for series tested distribution-free, their baseline's.
async fn read_chunk(
    store: &Store,
    mut chunk: Vec<SeriesWork>,
) -> Result<Vec<SeriesWork>, EngineError> {
    // Unit values of every lot to be screened: the pending lots (a baseline about to be
    // frozen is among them). Read once; the deciding step's normality check uses them too.
    for w in &mut chunk {
        w.values = store.pending_values(&w.pending).await?;
    }
    // Series on a frozen distribution-free baseline are tested on unit values: their
    // baseline's too. (A baseline about to be frozen is checked by `about_to_freeze`, in the
    // deciding step: its lots are among the pending ones.)
    for w in &mut chunk {
        let Some(b) = w.baseline.as_ref().filter(|b| distribution_free(&b.design)) else {
            continue;
        };
        let base_ids = store.baseline_samples(b.id).await?;
        let base = store.values(&base_ids).await?;
        w.units = Some(unit_values_beside(
            &w.values,
            &base_ids,
            base.into_values().flatten(),
        ));
    }
    Ok(chunk)
}

/// Unit values for the distribution-free tests: the baseline's, and those of every other lot
/// of `values` by sample id.
fn unit_values_beside(
    values: &std::collections::HashMap<i64, Vec<(i64, f64)>>,
    base_ids: &[i64],
    baseline: impl Iterator<Item = f64>,
) -> crate::store::UnitValues {
    let lots = values
        .iter()
        .filter(|(id, _)| !base_ids.contains(id))
        .map(|(id, units)| (*id, units.iter().map(|u| u.1).collect()))
        .collect();
    crate::store::UnitValues {
        baseline: baseline.collect(),
        lots,
    }
}

/// For a series whose baseline is about to be frozen (`n` lots pending, no baseline yet):
/// the within-lot residuals of those lots for the normality check, and, when they are clearly
/// non-normal and the lots show no between-lot component, the unit values to test it on
/// distribution-free. Pure computation on values already read, so it runs in the deciding
/// step, off the writer's thread.
fn about_to_freeze(w: &mut SeriesWork, n: usize) {
    if w.baseline.is_some() || w.pending.len() < n {
        return;
    }
    let lots = &w.pending[..n];
    let residuals = residuals_of(&w.values, lots, RESIDUALS_LIMIT);
    let summaries: Vec<Summary> = lots.iter().map(|s| s.summary).collect();
    let non_normal =
        crate::stats::normality::shapiro_wilk(&residuals).is_ok_and(|r| r.p_value < NON_NORMAL_P);
    let no_between = monitoring::random_effects(&summaries).is_ok_and(|re| re.var_between == 0.0);
    if non_normal && no_between {
        let ids: Vec<i64> = lots.iter().map(|s| s.sample_id).collect();
        let baseline = ids
            .iter()
            .filter_map(|id| w.values.get(id))
            .flatten()
            .map(|u| u.1);
        let units = unit_values_beside(&w.values, &ids, baseline);
        w.units = Some(units);
    }
    w.baseline_residuals = Some(residuals);
}

/// Writes the decisions of `chunk` and adds their counts to `total`.
async fn write_chunk(
    store: &Store,
    config: &Config,
    chunk: &[SeriesWork],
    mut pass: EnginePass,
    total: &mut PassCounts,
) -> Result<(), EngineError> {
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
    log_outliers(chunk, &pass);
    total.baselines += counts.baselines;
    total.evaluations += counts.evaluations;
    total.opened += counts.opened;
    total.resolved += counts.resolved;
    total.reopened += counts.reopened;
    total.outliers += counts.outliers;
    Ok(())
}

/// Most baseline residuals given to the normality check.
const RESIDUALS_LIMIT: usize = 5000;

/// Within-lot residuals (value − its lot's mean) of `samples`, in sample id and unit order as
/// `Store::residuals` gives them, at most `limit` (taken evenly through them when more).
fn residuals_of(
    values: &std::collections::HashMap<i64, Vec<(i64, f64)>>,
    samples: &[crate::store::SeriesSample],
    limit: usize,
) -> Vec<f64> {
    let mut sorted: Vec<&crate::store::SeriesSample> = samples.iter().collect();
    sorted.sort_by_key(|s| s.sample_id);
    let out: Vec<f64> = sorted
        .iter()
        .flat_map(|s| {
            let mean = s.summary.mean();
            values
                .get(&s.sample_id)
                .into_iter()
                .flatten()
                .map(move |u| u.1 - mean)
        })
        .collect();
    if out.len() <= limit {
        return out;
    }
    let step = out.len() as f64 / limit as f64;
    (0..limit)
        .map(|i| out[(i as f64 * step) as usize])
        .collect()
}

/// Logs each outlier found in a pass (they are stored; this makes them visible as they come).
fn log_outliers(chunk: &[SeriesWork], pass: &EnginePass) {
    if pass.outliers.is_empty() {
        return;
    }
    let mut lots: std::collections::HashMap<i64, (&str, &str, &str)> = Default::default();
    for w in chunk {
        for s in &w.pending {
            lots.insert(s.sample_id, (&w.source, &w.characteristic, &s.lot));
        }
    }
    for o in &pass.outliers {
        let (source, characteristic, lot) = lots.get(&o.sample_id).copied().unwrap_or_default();
        tracing::info!(
            %source, %characteristic, %lot, seq = o.seq, value = o.value,
            distance = format!("{:.1}", o.distance), fence = format!("{:.2}", o.fence),
            rule = o.rule, set_aside = o.set_aside,
            "outlier: {source} / {characteristic} lot {lot} unit #{} = {} ({:.1} robust sd from \
             the lot median; fence {:.2})",
            o.seq, o.value, o.distance, o.fence
        );
    }
}

/// The (channel, recipient) pairs that announce an alert event of a series: one outbox row
/// each. Email goes to the default list plus the source's and the characteristic's lists.
pub fn recipients(config: &Config, source: &str, characteristic: &str) -> Vec<(String, String)> {
    channel_recipients(config, |email| email.recipients_for(source, characteristic))
}

/// One (channel, recipient) pair for the log channel when configured, and one per address
/// that `emails` picks from the email settings.
pub fn channel_recipients(
    config: &Config,
    emails: impl Fn(&crate::config::Email) -> Vec<String>,
) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for channel in &config.alerts.channels {
        match channel {
            Channel::Log => out.push(("log".to_string(), "log".to_string())),
            Channel::Email => {
                if let Some(email) = &config.alerts.email {
                    for to in emails(email) {
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

/// Calibrated CUSUM intervals by design key, for the life of the process: one calibration
/// costs about as much as deciding a thousand lots, and a backfill freezes hundreds of
/// baselines with the same few keys. The interval is a pure function of its key.
static H_CACHE: std::sync::LazyLock<std::sync::Mutex<HCache>> =
    std::sync::LazyLock::new(Default::default);

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
        outliers: None,
        spread_base: None,
        log_scale: false,
        natural: None,
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

/// A series ready to be decided: its design, the merged summary of its baseline lots, and
/// the index of its first pending lot that is not a baseline lot.
#[derive(Clone, Copy)]
struct Plan {
    design: Design,
    merged: Summary,
    first: usize,
}

/// The spread test of one lot: which test, statistic, df, p and the lot's standardised
/// spread shift (the normal quantile of p, for the lifecycle).
#[derive(Clone, Copy)]
struct SpreadResult {
    test: &'static str,
    model: &'static str,
    statistic: f64,
    df1: f64,
    df2: Option<f64>,
    p: f64,
    estimate: f64,
    z: f64,
}

/// The decisions for one lot of one series before the family adjustment.
struct Tested {
    series: usize,
    sample: usize,
    lot_id: i64,
    /// The summary tested: the lot's units less any set aside as outliers.
    summary: Summary,
    mean: Result<monitoring::LotTest, String>,
    /// The p-value of the mean test (two-sided tests with a minimum shift: p of |d| >
    /// min_shift; distribution-free series: Mann–Whitney's p).
    mean_p: Option<f64>,
    spread: Option<SpreadResult>,
    /// The lot mean standardised by the baseline: (mean − baseline mean) / sd of a lot mean.
    z: Option<f64>,
    /// Mann–Whitney (U, p) when the series is tested distribution-free.
    rank: Option<(f64, f64)>,
    /// What outlier screening did to the lot.
    screen_note: Option<String>,
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
///
/// The steps: plan each series (freeze its baseline when due: screen the baseline lots, learn
/// the outlier fence and the spread distribution, design the tests), test each pending lot
/// (screen, mean, spread), adjust each lot's family of characteristics, then follow each
/// series in lot order (CUSUM, alert lifecycle, repeats).
pub fn decide_at(
    work: &[SeriesWork],
    monitor: &Monitor,
    repeat: Option<std::time::Duration>,
    now: chrono::DateTime<chrono::Utc>,
) -> EnginePass {
    let mut pass = EnginePass::default();
    let mut cache = H_CACHE.lock().unwrap_or_else(|e| e.into_inner());
    let mut plans: Vec<Option<Plan>> = vec![None; work.len()];
    let mut tested: Vec<Tested> = Vec::new();
    for (i, w) in work.iter().enumerate() {
        if !monitor.monitors(&w.source, &w.characteristic) {
            continue;
        }
        let Some(plan) = plan_series(w, monitor, &mut cache, &mut pass) else {
            continue;
        };
        for (j, s) in w.pending.iter().enumerate().skip(plan.first) {
            tested.push(test_lot(w, &plan, monitor, i, j, s, &mut pass));
        }
        plans[i] = Some(plan);
    }
    let (mean_adj, spread_adj) = adjust_families(&tested, monitor.family);
    let mut by_series: BTreeMap<usize, Vec<usize>> = BTreeMap::new();
    for (k, t) in tested.iter().enumerate() {
        by_series.entry(t.series).or_default().push(k);
    }
    let adjusted = Adjusted {
        mean: &mean_adj,
        spread: &spread_adj,
    };
    for (i, ks) in by_series {
        let plan = plans[i].expect("tested series have a plan");
        follow_series(
            &work[i], &plan, &tested, &ks, adjusted, monitor, repeat, now, &mut pass,
        );
    }
    pass
}

/// The plan of a series: its frozen baseline, or a baseline frozen now from its first
/// `baseline_lots` lots (pushed onto `pass`). None while the series has too few lots.
fn plan_series(
    w: &SeriesWork,
    monitor: &Monitor,
    cache: &mut HCache,
    pass: &mut EnginePass,
) -> Option<Plan> {
    if let Some(b) = &w.baseline {
        return Some(Plan {
            design: b.design,
            merged: b.summary,
            first: 0,
        });
    }
    let m = monitor.baseline_lots;
    if w.pending.len() < m {
        return None;
    }
    let lots = &w.pending[..m];
    let raw: Vec<Summary> = lots.iter().map(|l| l.summary).collect();
    let merged = raw[1..].iter().fold(raw[0], |acc, s| acc.merge(s));
    let policy = monitor.policy(&w.characteristic);
    let units: Option<Vec<&[(i64, f64)]>> = lots
        .iter()
        .map(|l| w.values.get(&l.sample_id).map(Vec::as_slice))
        .collect();
    // A minimum shift is in the characteristic's unit: such a series stays on that scale.
    let log = policy.min_shift == 0.0 && units.as_deref().is_some_and(screen::choose_log_scale);
    let fence = units
        .as_deref()
        .filter(|_| policy.outliers)
        .and_then(|u| screen::learn_fence(u, monitor.outlier_share(), log));
    let screened: Option<Vec<screen::Screened>> = units.as_ref().map(|u| {
        lots.iter()
            .zip(u)
            .filter_map(|(l, u)| screen::screen(l.sample_id, u, fence.as_ref(), log))
            .collect()
    });
    let summaries: Vec<Summary> = match &screened {
        Some(s) => s.iter().map(|x| x.summary).collect(),
        None => raw,
    };
    let mut d = match design(
        &summaries,
        w.baseline_residuals.as_deref(),
        monitor,
        &w.characteristic,
        cache,
    ) {
        Ok(d) => d,
        Err(e) => {
            tracing::warn!(source = %w.source, characteristic = %w.characteristic, error = %e, "cannot build a baseline yet");
            return None;
        }
    };
    d.outliers = fence;
    d.log_scale = log;
    d.natural = merged.sd().map(|sd| (merged.mean(), sd, merged.n()));
    if let Some(s) = &screened {
        d.spread_base = spread_baseline(s, fence.as_ref());
        pass.outliers
            .extend(s.iter().flat_map(|x| x.outliers.iter().cloned()));
    }
    pass.baselines.push(NewBaseline {
        series_id: w.series_id,
        definition: format!("first {m} lots"),
        sample_ids: lots.iter().map(|l| l.sample_id).collect(),
        summary: merged,
        last_order_time: lots[m - 1].order_time.clone(),
        design: d,
        note: design_note(&d, monitor),
    });
    Some(Plan {
        design: d,
        merged,
        first: m,
    })
}

/// The floor of a lot's spread: a millionth of the baseline's robust sd (a coarse gauge can
/// give a lot whose units are all equal).
fn spread_floor(fence: Option<&OutlierFence>, lot: &Summary) -> f64 {
    match fence {
        Some(f) => 1e-6 * f.scale,
        None => 1e-12 * lot.mean().abs().max(1e-300),
    }
}

/// The baseline distribution of the spread statistic, from the screened baseline lots.
fn spread_baseline(
    lots: &[screen::Screened],
    fence: Option<&OutlierFence>,
) -> Option<SpreadBaseline> {
    let mut stats = Vec::new();
    let mut sizes = Vec::new();
    for l in lots.iter().filter(|l| l.kept.len() >= 2) {
        stats.push(robust::spread_statistic(&l.kept, spread_floor(fence, &l.summary)).ok()?);
        sizes.push(l.kept.len() as f64);
    }
    let kept: Vec<&[f64]> = lots.iter().map(|l| l.kept.as_slice()).collect();
    let kurtosis = robust::pooled_excess_kurtosis(&kept).ok();
    SpreadBaseline::new(&stats, &sizes, kurtosis).ok()
}

/// Screens and tests one pending lot of a series (outliers found are pushed onto `pass`).
fn test_lot(
    w: &SeriesWork,
    plan: &Plan,
    monitor: &Monitor,
    series: usize,
    sample: usize,
    s: &crate::store::SeriesSample,
    pass: &mut EnginePass,
) -> Tested {
    let design = &plan.design;
    let policy = monitor.policy(&w.characteristic);
    let screened = w
        .values
        .get(&s.sample_id)
        .and_then(|u| screen::screen(s.sample_id, u, design.outliers.as_ref(), design.log_scale));
    let summary = screened.as_ref().map_or(s.summary, |x| x.summary);
    let (alternative, delta) = mean_hypothesis(policy.direction, policy.min_shift);
    let mean = if design.log_scale && screened.is_none() {
        Err("the series is tested on the log scale and the lot has no unit above 0".to_string())
    } else {
        monitoring::lot_vs_baseline(&design.re, &summary, alternative, delta, 0.95)
            .map_err(|e| e.to_string())
    };
    let rank = rank_test(w, design, &policy, s.sample_id, alternative, delta);
    let mean_p = match rank {
        Some((_, p)) => Some(p),
        None => mean_p(design, &policy, &summary, &mean),
    };
    let spread = if !policy.spread {
        None
    } else {
        match (&design.spread_base, &screened) {
            (Some(b), Some(x)) => robust_spread_test(b, x, design.outliers.as_ref()),
            _ => spread_test(&design.re, &summary),
        }
    };
    // CUSUM and lifecycle on z = (lot mean − baseline mean) / sd of a lot mean.
    let z = mean.as_ref().ok().and_then(|_| {
        let sd = (design.re.var_between + design.re.var_within / summary.n() as f64).sqrt();
        (sd > 0.0).then(|| (summary.mean() - design.re.mean_of_means) / sd)
    });
    let screen_note = screened.as_ref().and_then(|x| x.note.clone());
    if let Some(x) = screened {
        pass.outliers.extend(x.outliers);
    }
    Tested {
        series,
        sample,
        lot_id: s.lot_id,
        summary,
        mean,
        mean_p,
        spread,
        z,
        rank,
        screen_note,
    }
}

/// The mean test's p-value; with a minimum shift in both directions the smaller of the two
/// one-sided p-values, doubled.
fn mean_p(
    design: &Design,
    policy: &CharacteristicPolicy,
    lot: &Summary,
    mean: &Result<monitoring::LotTest, String>,
) -> Option<f64> {
    match (mean, policy.direction) {
        (Ok(_), Direction::TwoSided) if policy.min_shift > 0.0 => {
            let one = |alt, d| monitoring::lot_vs_baseline(&design.re, lot, alt, d, 0.95);
            let lo = one(Alternative::Less, -policy.min_shift);
            let hi = one(Alternative::Greater, policy.min_shift);
            match (lo, hi) {
                (Ok(a), Ok(b)) => Some((2.0 * a.p_value.min(b.p_value)).min(1.0)),
                _ => None,
            }
        }
        (Ok(m), _) => Some(m.p_value),
        _ => None,
    }
}

/// Distribution-free series: Mann–Whitney of the lot's units against the baseline's units,
/// with the lot shifted by the hypothesised difference: (U, p).
fn rank_test(
    w: &SeriesWork,
    design: &Design,
    policy: &CharacteristicPolicy,
    sample_id: i64,
    alternative: Alternative,
    delta: f64,
) -> Option<(f64, f64)> {
    let u = w.units.as_ref().filter(|_| distribution_free(design))?;
    let lot = u.lots.get(&sample_id)?;
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
}

/// The lot's spread statistic against the baseline lots' (a prediction t test, one-sided).
fn robust_spread_test(
    base: &SpreadBaseline,
    lot: &screen::Screened,
    fence: Option<&OutlierFence>,
) -> Option<SpreadResult> {
    let stat = robust::spread_statistic(&lot.kept, spread_floor(fence, &lot.summary)).ok()?;
    let t = base.test(stat, lot.kept.len()).ok()?;
    let (test, model) = if base.kurtosis.is_some() {
        ("log-spread-z", "within-lot sampling, normal tails")
    } else {
        ("log-spread-t", "lot spreads of the baseline")
    };
    Some(SpreadResult {
        test,
        model,
        statistic: t.statistic,
        df1: t.df,
        df2: None,
        p: t.p_value,
        estimate: t.ratio,
        z: z_of_p(t.p_value),
    })
}

/// The standard normal quantile with upper tail p: a p-value as a standardised shift.
fn z_of_p(p: f64) -> f64 {
    crate::stats::dist::normal_isf(p.clamp(1e-300, 1.0 - 1e-16)).unwrap_or(0.0)
}

/// Adjusted p-values (and family sizes) of the mean tests and of the spread tests, each
/// family being the tests of one lot's characteristics.
type Adjustments = Vec<Option<(f64, usize)>>;

fn adjust_families(tested: &[Tested], family: Family) -> (Adjustments, Adjustments) {
    let method = match family {
        Family::Holm => Method::Holm,
        Family::BenjaminiHochberg => Method::BenjaminiHochberg,
    };
    let mut mean_family: BTreeMap<i64, Vec<(usize, f64)>> = BTreeMap::new();
    let mut spread_family: BTreeMap<i64, Vec<(usize, f64)>> = BTreeMap::new();
    for (k, t) in tested.iter().enumerate() {
        if let Some(p) = t.mean_p {
            mean_family.entry(t.lot_id).or_default().push((k, p));
        }
        if let Some(s) = t.spread {
            spread_family.entry(t.lot_id).or_default().push((k, s.p));
        }
    }
    let apply = |families: BTreeMap<i64, Vec<(usize, f64)>>| {
        let mut out: Adjustments = vec![None; tested.len()];
        for members in families.values() {
            let p: Vec<f64> = members.iter().map(|m| m.1).collect();
            let adj = multiplicity::adjust(&p, method).unwrap_or(p);
            for (m, a) in members.iter().zip(adj) {
                out[m.0] = Some((a, members.len()));
            }
        }
        out
    };
    (apply(mean_family), apply(spread_family))
}

/// The adjusted p-values of a pass, by index into its tested lots.
#[derive(Clone, Copy)]
struct Adjusted<'a> {
    mean: &'a Adjustments,
    spread: &'a Adjustments,
}

/// Last announcement of an open mean alert: (when, shift, acknowledged).
type Notified = (Option<chrono::DateTime<chrono::Utc>>, Option<f64>, bool);

/// The running state of one series while its lots are followed in order.
struct Follow {
    upper: f64,
    lower: f64,
    mean: lifecycle::Tracker,
    spread: lifecycle::Tracker,
    notified: Option<Notified>,
    online: Option<OnlineFdr>,
}

/// Follows one series through its tested lots in order: CUSUM, the evaluations, the alert
/// lifecycle of each kind, repeated announcements; then records its running state.
#[allow(clippy::too_many_arguments)]
fn follow_series(
    w: &SeriesWork,
    plan: &Plan,
    tested: &[Tested],
    ks: &[usize],
    adjusted: Adjusted,
    monitor: &Monitor,
    repeat: Option<std::time::Duration>,
    now: chrono::DateTime<chrono::Utc>,
    pass: &mut EnginePass,
) {
    let policy = monitor.policy(&w.characteristic);
    let rules = lifecycle::Rules {
        resolve_after: monitor.resolve_after_lots,
        reopen_within: monitor.reopen_within_lots,
    };
    let mut f = Follow {
        upper: w.cusum.0,
        lower: w.cusum.1,
        mean: lifecycle::Tracker::new(
            w.lifecycle.mean.clone(),
            w.open_mean.map(|a| a.notified_estimate),
            rules,
        ),
        spread: lifecycle::Tracker::new(
            w.lifecycle.spread.clone(),
            w.open_spread.map(|_| Some(1.0)),
            rules,
        ),
        notified: w
            .open_mean
            .map(|a| (a.notified_at, a.notified_estimate, a.acknowledged)),
        online: OnlineFdr::new(monitor, &w.online),
    };
    for &k in ks {
        let t = &tested[k];
        let s = &w.pending[t.sample];
        let base = base_evaluation(w, plan, monitor, t, s);
        let (ev, signal) =
            mean_evaluation(&base, plan, monitor, &policy, t, adjusted.mean[k], &mut f);
        let mut action = f.mean.step(signal, t.z);
        match action {
            AlertAction::Resolve => {
                (f.upper, f.lower) = (0.0, 0.0);
                f.notified = None;
            }
            AlertAction::Open | AlertAction::Reopen => {
                f.notified = Some((Some(now), ev.estimate, false));
            }
            AlertAction::Attach if repeat_due(&mut f.notified, repeat, now, ev.estimate) => {
                action = AlertAction::Repeat;
            }
            _ => {}
        }
        pass.decisions.push(Decision {
            evaluation: ev,
            action,
        });
        if let Some(sp) = t.spread {
            let ev = spread_evaluation(&base, plan, sp, adjusted.spread[k]);
            let action = f.spread.step(Some(ev.significant), Some(sp.z));
            pass.decisions.push(Decision {
                evaluation: ev,
                action,
            });
        }
    }
    let (online_tests, online_rejected) = match &f.online {
        Some(o) => o.state(),
        None => w.online.clone(),
    };
    pass.states.push(SeriesState {
        series_id: w.series_id,
        cusum_upper: f.upper,
        cusum_lower: f.lower,
        online_tests,
        online_rejected,
        lifecycle: Lifecycle {
            mean: f.mean.state,
            spread: f.spread.state,
        },
    });
}

/// Whether an attached significant lot announces its open alert again: `repeat` has passed
/// since the last message, or the shift grew by half (not twice in one pass: a backfill whose
/// later lots show a larger shift sends one message, not an opening and a repeat at once);
/// never when acknowledged. Updates the last announcement when it does.
fn repeat_due(
    notified: &mut Option<Notified>,
    repeat: Option<std::time::Duration>,
    now: chrono::DateTime<chrono::Utc>,
    estimate: Option<f64>,
) -> bool {
    let (Some(every), Some((at, shift, acked))) = (repeat, *notified) else {
        return false;
    };
    if acked {
        return false;
    }
    let due = at.is_none_or(|t| (now - t).to_std().unwrap_or_default() >= every);
    let grown = at != Some(now)
        && match (shift, estimate) {
            (Some(old), Some(new)) => new.abs() >= GROWN * old.abs(),
            _ => false,
        };
    if due || grown {
        *notified = Some((Some(now), estimate, false));
    }
    due || grown
}

/// The parts of a lot's evaluations that both kinds share.
fn base_evaluation(
    w: &SeriesWork,
    plan: &Plan,
    monitor: &Monitor,
    t: &Tested,
    s: &crate::store::SeriesSample,
) -> NewEvaluation {
    let policy = monitor.policy(&w.characteristic);
    let (alternative, delta) = mean_hypothesis(policy.direction, policy.min_shift);
    NewEvaluation {
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
        level: plan.design.level_mean,
        significant: false,
        baseline: plan.merged,
        baseline_mean: plan.design.re.mean_of_means,
        lot: t.summary,
        estimate: None,
        ci: None,
        std_error: None,
        cusum: None,
        cusum_signal: false,
        // Capability is of the stored values, whatever the test's scale.
        cpk: lot_cpk(
            &policy,
            if plan.design.log_scale {
                &s.summary
            } else {
                &t.summary
            },
        ),
        note: match (plan.design.log_scale, t.screen_note.clone()) {
            (false, note) => note,
            (true, note) => Some(join_notes(note, LOG_SCALE_NOTE.to_string())),
        },
    }
}

/// One CUSUM step on the lot's z: the sums after it and whether they crossed h (they restart
/// after a signal). A minimum shift moves both reference values outwards by its z size; only
/// the side that matters accumulates.
fn cusum_step(
    plan: &Plan,
    policy: &CharacteristicPolicy,
    t: &Tested,
    f: &mut Follow,
) -> Option<(f64, f64, bool)> {
    let (k, h) = plan.design.cusum?;
    let z = t.z?;
    let re = &plan.design.re;
    let dz = policy.min_shift / (re.var_between + re.var_within / t.summary.n() as f64).sqrt();
    let (mut up, mut lo) = (f.upper, f.lower);
    if policy.direction != Direction::HigherIsBetter {
        up = (up + z - dz - k).max(0.0);
    }
    if policy.direction != Direction::LowerIsBetter {
        lo = (lo - z - dz - k).max(0.0);
    }
    let signal = up > h || lo > h;
    (f.upper, f.lower) = if signal { (0.0, 0.0) } else { (up, lo) };
    Some((up, lo, signal))
}

/// The mean evaluation of a lot (the lot test and the CUSUM) and whether it signals (None:
/// not tested).
fn mean_evaluation(
    base: &NewEvaluation,
    plan: &Plan,
    monitor: &Monitor,
    policy: &CharacteristicPolicy,
    t: &Tested,
    adjusted: Option<(f64, usize)>,
    f: &mut Follow,
) -> (NewEvaluation, Option<bool>) {
    let design = &plan.design;
    let cusum = cusum_step(plan, policy, t, f);
    let mut ev = base.clone();
    let (Ok(r), Some((p_adj, size))) = (&t.mean, adjusted) else {
        let why = t.mean.as_ref().err().cloned().unwrap_or_default();
        ev.note = Some(join_notes(ev.note.take(), format!("not tested: {why}")));
        return (ev, None);
    };
    ev.model = Some(r.method.as_str());
    ev.statistic = Some(r.statistic);
    ev.df = Some(r.df);
    ev.p_value = t.mean_p;
    ev.p_adjusted = Some(p_adj);
    ev.family_size = size as i64;
    ev.estimate = Some(r.estimate);
    ev.ci = Some(r.ci);
    ev.std_error = Some(r.std_error);
    let lot_significant = match f.online.as_mut() {
        // Online FDR: the raw lot p-value against the stream's current level.
        Some(o) => {
            let (level, rejected) = o.test(t.mean_p.unwrap_or(1.0));
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
    let normality = design.normality_p.unwrap_or(0.0);
    if let Some((u, _)) = t.rank {
        ev.test = "mann-whitney";
        ev.model = Some("units, distribution-free");
        ev.statistic = Some(u);
        ev.df = None;
        let note = format!(
            "baseline residuals fail the normality check (Shapiro–Wilk p = {normality:.2e}): \
             the lot's units were ranked against the baseline's units (Mann–Whitney); \
             statistic is U of the lot"
        );
        ev.note = Some(join_notes(ev.note.take(), note));
    } else if design.normality_p.is_some_and(|p| p < NON_NORMAL_P) {
        let note = format!(
            "baseline residuals fail the normality check (Shapiro–Wilk p = {normality:.2e}); \
             the test rests on lot means of {} units being close to normal",
            t.summary.n()
        );
        ev.note = Some(join_notes(ev.note.take(), note));
    }
    let significant = ev.significant;
    (ev, Some(significant))
}

/// The spread evaluation of a lot.
fn spread_evaluation(
    base: &NewEvaluation,
    plan: &Plan,
    sp: SpreadResult,
    adjusted: Option<(f64, usize)>,
) -> NewEvaluation {
    let (p_adj, size) = adjusted.unwrap_or((sp.p, 1));
    let mut ev = base.clone();
    ev.kind = "spread";
    ev.test = sp.test;
    ev.model = Some(sp.model);
    ev.alternative = "greater";
    ev.delta = 0.0;
    ev.statistic = Some(sp.statistic);
    ev.df = Some(sp.df1).filter(|d| d.is_finite());
    ev.df2 = sp.df2;
    ev.p_value = Some(sp.p);
    ev.p_adjusted = Some(p_adj);
    ev.family_size = size as i64;
    ev.level = plan.design.level_spread;
    ev.significant = p_adj <= plan.design.level_spread;
    ev.estimate = Some(sp.estimate);
    ev
}

/// The note of every decision of a log-scale series.
const LOG_SCALE_NOTE: &str = "tested on the log scale: means, estimate and interval are of \
     ln(value); exp(estimate) is the lot's geometric mean over the baseline's";

/// Whether a decision's note says it was made on the log scale (its means, estimate and
/// interval are then of ln(value) and carry no unit of measure).
pub fn on_log_scale(note: Option<&str>) -> bool {
    note.is_some_and(|n| n.contains(LOG_SCALE_NOTE))
}

/// The note a log-scale decision carries (for tests of what reads it).
#[cfg(test)]
pub fn log_scale_note() -> &'static str {
    LOG_SCALE_NOTE
}

/// Two notes as one.
fn join_notes(first: Option<String>, second: String) -> String {
    match first {
        Some(f) => format!("{f}; {second}"),
        None => second,
    }
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
fn lot_cpk(policy: &CharacteristicPolicy, lot: &Summary) -> Option<(f64, f64, f64)> {
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
    // A log-scale series' analysis is of ln(value): its capability comes from the stored
    // values of its baseline lots instead.
    let (mean, sd, n) = match design.natural {
        Some(natural) if design.log_scale => natural,
        _ => (
            re.mean_of_means,
            (re.var_between + re.var_within).sqrt(),
            re.n_total,
        ),
    };
    crate::stats::capability::cpk(mean, sd, n, policy.lsl, policy.usl, 0.95).ok()
}

/// One-sided F test of the lot's variance against the baseline's within-lot variance, for
/// baselines frozen without unit values (exact only for normal units).
fn spread_test(re: &RandomEffects, lot: &Summary) -> Option<SpreadResult> {
    let var = lot.variance()?;
    let df1 = (lot.n() - 1) as f64;
    let f = var / re.var_within;
    let p = f_sf(f, df1, re.df_within).ok()?.clamp(0.0, 1.0);
    Some(SpreadResult {
        test: "f-variance",
        model: "within-lot",
        statistic: f,
        df1,
        df2: Some(re.df_within),
        p,
        estimate: f,
        z: z_of_p(p),
    })
}

/// The smallest shift of a lot mean (in the characteristic's unit, beyond any minimum shift)
/// that a single lot of typical size is flagged for with 90 % power by the lot test at its
/// per-lot level (the CUSUM detects smaller sustained shifts over several lots).
pub fn detectable_shift(design: &Design, monitor: &Monitor, characteristic: &str) -> Option<f64> {
    if design.log_scale {
        return None;
    }
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
    use crate::numbers::{p_value, two_digits};
    let model = if d.re.var_between > 0.0 {
        "lot means (between-lot variance material)"
    } else {
        "units (no between-lot variance component)"
    };
    let mut s = format!(
        "{model}; between-lot sd {}, within-lot sd {} (F = {:.3}, p = {}); \
         per-lot level {} (mean) / {} (spread) for one false alert per {} lots",
        two_digits(Some(d.re.var_between.sqrt())),
        two_digits(Some(d.re.var_within.sqrt())),
        d.re.f_statistic,
        p_value(Some(d.re.p_value)),
        p_value(Some(d.level_mean)),
        p_value(Some(d.level_spread)),
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
        s.push_str(&format!(
            "; Shapiro–Wilk p of residuals {}",
            p_value(Some(p))
        ));
    }
    if d.log_scale {
        s.push_str("; tested on the log scale (positive, right-skewed units)");
    }
    if let Some(f) = d.outliers {
        s.push_str(&format!(
            "; outlier fence {:.2} robust sd (robust sd {}{})",
            f.fence,
            two_digits(Some(f.scale)),
            if f.heavy_tailed { ", heavy tails" } else { "" }
        ));
    }
    s
}

#[cfg(test)]
mod chunk_tests {
    use super::*;
    use crate::store::SeriesSample;

    fn work(source: &str, lots: usize) -> SeriesWork {
        let mut w = operating::empty_work(0);
        w.source = source.to_owned();
        let summary = Summary::from_slice(&[1.0, 2.0]).unwrap();
        w.pending = (0..lots)
            .map(|i| SeriesSample {
                sample_id: i as i64,
                lot_id: i as i64,
                lot: format!("L{i}"),
                order_time: String::new(),
                summary,
                evaluated: false,
                file_id: 0,
            })
            .collect();
        w
    }

    /// A series of `lots` lots, lot `l` with the units `units(l)`, in the chunk's `values`.
    fn lots_of(lots: usize, units: impl Fn(usize) -> Vec<f64>) -> SeriesWork {
        let mut w = work("s", lots);
        for (l, s) in w.pending.iter_mut().enumerate() {
            let v = units(l);
            s.summary = Summary::from_slice(&v).unwrap();
            w.values.insert(s.sample_id, (0..).zip(v).collect());
        }
        w
    }

    #[test]
    fn a_clearly_skewed_baseline_about_to_be_frozen_gets_its_unit_values() {
        // Every lot holds the fourth powers of 1 to 10 (in turn rotated): strongly skewed
        // units, and lots with equal means, so no between-lot component.
        let skewed = |l: usize| {
            let mut v: Vec<f64> = (1..=10).map(|i| (i as f64).powi(4)).collect();
            v.rotate_left(l % 10);
            v
        };
        let mut w = lots_of(21, skewed);
        about_to_freeze(&mut w, 20);
        assert_eq!(w.baseline_residuals.as_ref().map(Vec::len), Some(200));
        let units = w.units.expect("tested on unit values");
        assert_eq!(units.baseline.len(), 200);
        assert_eq!(units.lots.len(), 1, "the one lot after the baseline");

        // Normal scores of 200 points dealt out to 20 lots: not clearly non-normal.
        let normal = |l: usize| {
            (0..10)
                .map(|k| {
                    let p = ((k * 20 + l % 20) as f64 + 0.5) / 200.0;
                    crate::stats::dist::normal_quantile(p).unwrap()
                })
                .collect()
        };
        let mut w = lots_of(21, normal);
        about_to_freeze(&mut w, 20);
        assert!(w.baseline_residuals.is_some());
        assert!(w.units.is_none());

        // Too few lots for a baseline: nothing to check.
        let mut w = lots_of(19, skewed);
        about_to_freeze(&mut w, 20);
        assert!(w.baseline_residuals.is_none() && w.units.is_none());
    }

    #[test]
    fn chunks_end_at_the_lot_budget_but_never_inside_a_source() {
        // Three characteristics of a year's export per source: one source fills the budget.
        let many: Vec<SeriesWork> = ["a", "a", "a", "b", "b", "b"]
            .iter()
            .map(|s| work(s, 1500))
            .collect();
        assert_eq!(chunk_end(&many), 3);
        assert_eq!(chunk_end(&many[3..]), 3);
        // Small backlogs: the series bound applies, extended to the end of the source.
        let few: Vec<SeriesWork> = (0..100).map(|i| work(&format!("s{}", i / 3), 2)).collect();
        assert_eq!(chunk_end(&few), 66);
        // One huge series still forms a chunk.
        assert_eq!(chunk_end(&[work("a", 50_000)]), 1);
        assert_eq!(chunk_end(&[]), 0);
    }
}
