//! Engine: the monitoring policy. Decides, never formats and never delivers.
//!
//! A series is one source × one characteristic. Its lots are ordered by sampling time (the
//! lot's earliest `sampled_at`, else the arrival of its first file), then lot code. The first
//! `monitor.baseline_lots` lots in that order form the baseline, frozen once complete; every
//! later lot is tested against it with Welch's t (two-sided) on the unit values, and the tests
//! of one lot's characteristics form a family adjusted by Holm at `monitor.level`. A
//! significant lot opens an alert (one open alert per series; later significant lots attach to
//! it); `monitor.resolve_after_lots` consecutive in-control lots resolve it. Decisions, alert
//! changes and outbox rows are written in one transaction by `store::write_pass`.
//!
//! Because decisions follow lot order and a baseline is frozen once, a backfill dropped at once
//! gives the same baseline and decisions as the same files arriving one by one in sampling
//! order. A lot that arrives late is tested and recorded; earlier decisions are not rewritten.

use std::collections::BTreeMap;

use crate::config::{Channel, Config, Monitor};
use crate::stats::Summary;
use crate::stats::multiplicity::{self, Method};
use crate::stats::ttest::{self, Alternative, TTestOptions};
use crate::store::{
    AlertAction, Decision, EnginePass, NewBaseline, NewEvaluation, PassCounts, SeriesWork, Store,
    StoreError,
};
use crate::time::now_rfc3339;

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// Loads the undecided lots, decides them, and writes the decisions.
pub async fn evaluate(store: &Store, config: &Config) -> Result<PassCounts, EngineError> {
    let work = store.pending_work().await?;
    let mut pass = decide(&work, &config.monitor);
    pass.recipients = recipients(config);
    let counts = store.write_pass(&pass, &now_rfc3339()).await?;
    if counts.evaluations > 0 || counts.baselines > 0 {
        tracing::info!(
            baselines = counts.baselines,
            lots_tested = counts.evaluations,
            alerts_opened = counts.opened,
            alerts_resolved = counts.resolved,
            "evaluated"
        );
    }
    Ok(counts)
}

/// One outbox row per channel and recipient for every alert event that is announced.
pub fn recipients(config: &Config) -> Vec<(String, String)> {
    let mut out = Vec::new();
    for channel in &config.alerts.channels {
        match channel {
            Channel::Log => out.push(("log".to_string(), "log".to_string())),
            Channel::Email => {
                if let Some(email) = &config.alerts.email {
                    for to in &email.to {
                        out.push(("email".to_string(), to.clone()));
                    }
                }
            }
        }
    }
    out
}

/// A test computed for one pending lot of one series, before the family adjustment.
struct Tested {
    series: usize,
    sample: usize,
    lot_id: i64,
    result: Result<ttest::TTestResult, String>,
}

/// The decisions for `work`, a pure function of the stored state and the policy.
pub fn decide(work: &[SeriesWork], monitor: &Monitor) -> EnginePass {
    let mut pass = EnginePass::default();
    // Baselines (frozen now or earlier) by series index.
    let mut baselines: Vec<Option<Summary>> = vec![None; work.len()];
    // Index into `pending` of the first lot to test, per series.
    let mut first_tested = vec![0usize; work.len()];
    let mut tested: Vec<Tested> = Vec::new();
    for (i, w) in work.iter().enumerate() {
        if !monitor.monitors(&w.source, &w.characteristic) {
            continue;
        }
        let baseline = match &w.baseline {
            Some(b) => b.summary,
            None => {
                if w.pending.len() < monitor.baseline_lots {
                    continue;
                }
                let lots = &w.pending[..monitor.baseline_lots];
                let mut summary = lots[0].summary;
                for l in &lots[1..] {
                    summary = summary.merge(&l.summary);
                }
                pass.baselines.push(NewBaseline {
                    series_id: w.series_id,
                    definition: format!("first {} lots", monitor.baseline_lots),
                    sample_ids: lots.iter().map(|l| l.sample_id).collect(),
                    summary,
                    last_order_time: lots[lots.len() - 1].order_time.clone(),
                });
                first_tested[i] = monitor.baseline_lots;
                summary
            }
        };
        baselines[i] = Some(baseline);
        let opts = TTestOptions {
            delta: 0.0,
            alternative: Alternative::TwoSided,
            conf_level: 0.95,
        };
        for (j, s) in w.pending.iter().enumerate().skip(first_tested[i]) {
            tested.push(Tested {
                series: i,
                sample: j,
                lot_id: s.lot_id,
                result: ttest::welch(&s.summary, &baseline, &opts).map_err(|e| e.to_string()),
            });
        }
    }

    // Families: the tests of one lot (all its characteristics decided in this pass).
    let mut families: BTreeMap<i64, Vec<usize>> = BTreeMap::new();
    for (k, t) in tested.iter().enumerate() {
        if t.result.is_ok() {
            families.entry(t.lot_id).or_default().push(k);
        }
    }
    let mut adjusted: Vec<Option<(f64, usize)>> = vec![None; tested.len()];
    for members in families.values() {
        let p: Vec<f64> = members
            .iter()
            .map(|k| tested[*k].result.as_ref().map(|r| r.p_value).unwrap_or(1.0))
            .collect();
        let adj = multiplicity::adjust(&p, Method::Holm).unwrap_or(p);
        for (m, k) in members.iter().enumerate() {
            adjusted[*k] = Some((adj[m], members.len()));
        }
    }

    // Alert lifecycle, series by series in lot order.
    let mut by_series: BTreeMap<usize, Vec<usize>> = BTreeMap::new();
    for (k, t) in tested.iter().enumerate() {
        by_series.entry(t.series).or_default().push(k);
    }
    for (i, ks) in by_series {
        let w = &work[i];
        let baseline = baselines[i].expect("tested series have a baseline");
        // Consecutive in-control lots of the open alert, None when no alert is open.
        let mut open_run = w.open_alert.as_ref().map(|a| a.in_control_run);
        for k in ks {
            let t = &tested[k];
            let s = &w.pending[t.sample];
            let (evaluation, significant) = match (&t.result, adjusted[k]) {
                (Ok(r), Some((p_adj, family))) => {
                    let significant = p_adj <= monitor.level;
                    (
                        NewEvaluation {
                            sample_id: s.sample_id,
                            series_id: w.series_id,
                            test: "welch".into(),
                            alternative: "two-sided".into(),
                            statistic: Some(r.statistic),
                            df: Some(r.df),
                            p_value: Some(r.p_value),
                            p_adjusted: Some(p_adj),
                            method: "holm".into(),
                            family_size: family as i64,
                            level: monitor.level,
                            significant,
                            baseline,
                            lot: s.summary,
                            estimate: Some(r.estimate),
                            ci: Some(r.ci),
                            note: None,
                        },
                        Some(significant),
                    )
                }
                (result, _) => (
                    NewEvaluation {
                        sample_id: s.sample_id,
                        series_id: w.series_id,
                        test: "welch".into(),
                        alternative: "two-sided".into(),
                        statistic: None,
                        df: None,
                        p_value: None,
                        p_adjusted: None,
                        method: "holm".into(),
                        family_size: 0,
                        level: monitor.level,
                        significant: false,
                        baseline,
                        lot: s.summary,
                        estimate: None,
                        ci: None,
                        note: Some(format!(
                            "not tested: {}",
                            result.as_ref().err().cloned().unwrap_or_default()
                        )),
                    },
                    None,
                ),
            };
            let action = match (significant, open_run) {
                (None, _) | (Some(false), None) => AlertAction::None,
                (Some(true), None) => {
                    open_run = Some(0);
                    AlertAction::Open
                }
                (Some(true), Some(_)) => {
                    open_run = Some(0);
                    AlertAction::Attach
                }
                (Some(false), Some(run)) => {
                    let run = run + 1;
                    if run as usize >= monitor.resolve_after_lots {
                        open_run = None;
                        AlertAction::Resolve
                    } else {
                        open_run = Some(run);
                        AlertAction::InControl { run }
                    }
                }
            };
            pass.decisions.push(Decision { evaluation, action });
        }
    }
    pass
}
