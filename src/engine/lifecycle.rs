//! The alert lifecycle of one kind (mean or spread) of a series: one problem, one alert.
//!
//! - The first significant lot opens an alert; later significant lots attach to it.
//! - A lot that merely fails to reach significance does not count as evidence that the series
//!   is back. The open alert resolves only when the last `resolve_after_lots` lots since its
//!   last significant lot show, together, that the shift has shrunk: the one-sided 95 % upper
//!   confidence bound of their mean standardised shift (signed in the alert's direction;
//!   each lot's shift has sd 1 in control) is below the alert's margin, half the standardised
//!   shift of the lot that opened it and at least [`MIN_MARGIN`].
//! - A signal of the same kind within `reopen_within_lots` lots after a resolution opens that
//!   same alert again (an intermittent problem is still one problem).
//!
//! Pure: the state lives in `store::KindLifecycle` and is written with the pass.

use crate::store::{AlertAction, KindLifecycle};

/// The smallest resolution margin, in sd of a lot's standardised shift (our choice: a lot
/// mean one sd from the baseline is still a shift worth keeping an alert open for).
pub const MIN_MARGIN: f64 = 1.0;

/// z(0.95): the one-sided 95 % bound used for resolution.
const Z95: f64 = 1.644_853_626_951_472_2;

/// The rules of the lifecycle, from the config.
#[derive(Debug, Clone, Copy)]
pub struct Rules {
    pub resolve_after: usize,
    pub reopen_within: usize,
}

/// One kind's alert lifecycle while a series' lots are decided in order.
#[derive(Debug, Clone)]
pub struct Tracker {
    pub state: KindLifecycle,
    pub open: bool,
    rules: Rules,
}

impl Tracker {
    /// Starts from the stored state; `open_shift` is the reported shift of the open alert
    /// (None when no alert is open). An alert opened before the state was kept gets the
    /// smallest margin and the direction of its reported shift.
    pub fn new(state: KindLifecycle, open: Option<Option<f64>>, rules: Rules) -> Tracker {
        let mut state = state;
        if let Some(shift) = open
            && state.direction == 0.0
        {
            state.direction = if shift.unwrap_or(1.0) < 0.0 {
                -1.0
            } else {
                1.0
            };
            state.margin = MIN_MARGIN;
        }
        Tracker {
            state,
            open: open.is_some(),
            rules,
        }
    }

    /// The alert change for a lot: `signal` is whether the lot is significant (None: not
    /// tested), `z` its standardised shift (lot − baseline).
    pub fn step(&mut self, signal: Option<bool>, z: Option<f64>) -> AlertAction {
        let s = &mut self.state;
        match (signal, self.open) {
            (None, _) => AlertAction::None,
            (Some(true), true) => {
                s.recent.clear();
                AlertAction::Attach
            }
            (Some(true), false) => {
                let z = z.unwrap_or(0.0);
                self.open = true;
                s.recent.clear();
                s.direction = if z < 0.0 { -1.0 } else { 1.0 };
                s.margin = (0.5 * z.abs()).max(MIN_MARGIN);
                let reopen = s
                    .since_resolved
                    .is_some_and(|k| k < self.rules.reopen_within as u64);
                s.since_resolved = None;
                if reopen {
                    AlertAction::Reopen
                } else {
                    AlertAction::Open
                }
            }
            (Some(false), false) => {
                if let Some(k) = s.since_resolved.as_mut() {
                    *k += 1;
                }
                AlertAction::None
            }
            (Some(false), true) => {
                if let Some(z) = z {
                    s.recent.push(z * s.direction);
                    if s.recent.len() > self.rules.resolve_after {
                        s.recent.remove(0);
                    }
                }
                let w = s.recent.len();
                let back = w >= self.rules.resolve_after
                    && s.recent.iter().sum::<f64>() / w as f64 + Z95 / (w as f64).sqrt() < s.margin;
                if back {
                    self.open = false;
                    s.recent.clear();
                    s.since_resolved = Some(0);
                    AlertAction::Resolve
                } else {
                    AlertAction::InControl { run: w as i64 }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const RULES: Rules = Rules {
        resolve_after: 5,
        reopen_within: 20,
    };

    fn tracker() -> Tracker {
        Tracker::new(KindLifecycle::default(), None, RULES)
    }

    #[test]
    fn quiet_lots_during_a_sustained_shift_do_not_resolve() {
        let mut t = tracker();
        assert_eq!(t.step(Some(true), Some(4.0)), AlertAction::Open);
        // Shift still about 2.5 sd, lots not significant on their own.
        for _ in 0..30 {
            assert!(matches!(
                t.step(Some(false), Some(2.5)),
                AlertAction::InControl { .. }
            ));
        }
        assert!(t.open);
    }

    #[test]
    fn back_at_the_baseline_resolves_after_the_window() {
        let mut t = tracker();
        t.step(Some(true), Some(4.0));
        let actions: Vec<AlertAction> = (0..5).map(|_| t.step(Some(false), Some(0.0))).collect();
        assert_eq!(actions[4], AlertAction::Resolve);
        assert!(!t.open);
    }

    #[test]
    fn a_signal_soon_after_resolution_reopens_the_same_alert() {
        let mut t = tracker();
        t.step(Some(true), Some(4.0));
        for _ in 0..5 {
            t.step(Some(false), Some(0.0));
        }
        for _ in 0..3 {
            assert_eq!(t.step(Some(false), Some(0.0)), AlertAction::None);
        }
        assert_eq!(t.step(Some(true), Some(-4.0)), AlertAction::Reopen);
        for _ in 0..5 {
            t.step(Some(false), Some(0.0));
        }
        for _ in 0..20 {
            t.step(Some(false), Some(0.0));
        }
        assert_eq!(t.step(Some(true), Some(4.0)), AlertAction::Open);
    }

    #[test]
    fn opposite_sign_counts_against_the_direction() {
        let mut t = tracker();
        t.step(Some(true), Some(-4.0));
        // Lots at -2.5: still shifted downwards; no resolution.
        for _ in 0..10 {
            t.step(Some(false), Some(-2.5));
        }
        assert!(t.open);
    }
}
