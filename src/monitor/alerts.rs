//! Alert rules, evaluated on the recent window (the population the models
//! serve now) after every recompute.
//!
//! - leader changed: the top-ranked model differs from the reported leader,
//!   and either its advantage over the reported leader is significant
//!   (one-sided, level alpha) or it has stayed on top for
//!   [`PERSISTENCE`] consecutive recomputes. Either way the event says which.
//!   A change back needs the same evidence, so noise does not flap the
//!   leader; a near tie shows up as "leader uncertain" instead.
//! - leader uncertain: the best set holds more than one model (raised on
//!   entering the state).
//! - overlap degraded / recovered: a dataset threshold is crossed / no longer
//!   crossed.
//! - no detectable heterogeneity: raised on entering the state.

use serde::{Deserialize, Serialize};
use serde_json::json;

use crate::api::pb;
use crate::estimate::scoreboard::Scoreboard;
use crate::estimate::stats::p_greater;

/// Recomputes a new top model must hold the lead without significance
/// before it is reported as leader.
pub const PERSISTENCE: u32 = 3;

#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct AlertState {
    pub leader: Option<String>,
    /// A model on top that is not yet the reported leader, and for how many
    /// consecutive recomputes.
    pub challenger: Option<(String, u32)>,
    pub uncertain: bool,
    pub overlap_degraded: bool,
    pub no_heterogeneity: bool,
}

/// An event to store and broadcast.
#[derive(Debug, Clone, PartialEq)]
pub struct Raised {
    pub kind: &'static str,
    pub summary: String,
    pub details: serde_json::Value,
}

impl AlertState {
    /// Rebuilds the state from a stored board after a restart, raising nothing.
    pub fn from_board(board: &pb::Scoreboard) -> Self {
        Self {
            leader: (!board.leader.is_empty()).then(|| board.leader.clone()),
            challenger: None,
            uncertain: board.best_set.len() > 1,
            overlap_degraded: board.overlap.as_ref().is_some_and(|o| o.degraded),
            no_heterogeneity: board.no_detectable_heterogeneity,
        }
    }

    /// Evaluates the rules on a fresh scoreboard of `window`.
    pub fn evaluate(
        &mut self,
        dataset: &str,
        window: &str,
        board: &Scoreboard,
        overlap: &pb::OverlapSummary,
    ) -> Vec<Raised> {
        let mut out = Vec::new();
        self.leader_rule(dataset, window, board, &mut out);

        let uncertain = board.best_set.len() > 1;
        if uncertain && !self.uncertain {
            out.push(Raised {
                kind: "leader_uncertain",
                summary: format!(
                    "{dataset}: {} models are statistically tied for best ({window} window): {}",
                    board.best_set.len(),
                    board.best_set.join(", ")
                ),
                details: json!({ "window": window, "best_set": board.best_set }),
            });
        }
        self.uncertain = uncertain;

        if overlap.degraded != self.overlap_degraded {
            let kind = if overlap.degraded {
                "overlap_degraded"
            } else {
                "overlap_recovered"
            };
            out.push(Raised {
                kind,
                summary: format!(
                    "{dataset}: overlap {} ({window} window): {:.1}% of units outside [{}, {}], \
                     effective sample share treated {:.1}%, control {:.1}%",
                    if overlap.degraded {
                        "degraded"
                    } else {
                        "recovered"
                    },
                    100.0 * overlap.extreme_share,
                    overlap.eps,
                    1.0 - overlap.eps,
                    100.0 * overlap.treated_effective_share,
                    100.0 * overlap.control_effective_share
                ),
                details: json!({
                    "window": window,
                    "extreme_share": overlap.extreme_share,
                    "treated_effective_share": overlap.treated_effective_share,
                    "control_effective_share": overlap.control_effective_share,
                    "imbalanced_features": overlap.imbalanced_features,
                }),
            });
            self.overlap_degraded = overlap.degraded;
        }

        if board.no_detectable_heterogeneity && !self.no_heterogeneity {
            out.push(Raised {
                kind: "no_detectable_heterogeneity",
                summary: format!(
                    "{dataset}: no model beats constant-effect significantly ({window} window); \
                     targeting on the models adds nothing measurable"
                ),
                details: json!({ "window": window }),
            });
        }
        self.no_heterogeneity = board.no_detectable_heterogeneity;
        out
    }

    fn leader_rule(
        &mut self,
        dataset: &str,
        window: &str,
        board: &Scoreboard,
        out: &mut Vec<Raised>,
    ) {
        let top = board.leader.clone();
        let Some(reported) = self.leader.clone() else {
            self.leader = Some(top);
            return;
        };
        if top == reported {
            self.challenger = None;
            return;
        }
        // Margin: corrected PEHE of the reported leader minus the new top
        // (positive: the new top has lower error).
        let margin = board.pairwise.iter().find_map(|p| {
            if p.first == reported && p.second == top {
                Some((p.difference.estimate, p.difference.se))
            } else if p.first == top && p.second == reported {
                Some((-p.difference.estimate, p.difference.se))
            } else {
                None
            }
        });
        let Some((margin, se)) = margin else {
            // The old leader is no longer ranked (retired or uncovered).
            self.push_change(dataset, window, &reported, &top, None, false, out);
            return;
        };
        let p = p_greater(crate::estimate::stats::Estimate::new(margin, se));
        let significant = p <= board.alpha;
        let held = match &self.challenger {
            Some((name, n)) if *name == top => n + 1,
            _ => 1,
        };
        if significant || held >= PERSISTENCE {
            self.push_change(
                dataset,
                window,
                &reported,
                &top,
                Some((margin, se, p)),
                significant,
                out,
            );
        } else {
            self.challenger = Some((top, held));
        }
    }

    #[allow(clippy::too_many_arguments)]
    fn push_change(
        &mut self,
        dataset: &str,
        window: &str,
        old: &str,
        new: &str,
        margin: Option<(f64, f64, f64)>,
        significant: bool,
        out: &mut Vec<Raised>,
    ) {
        let (m, se, p) = margin.unwrap_or((0.0, 0.0, 1.0));
        out.push(Raised {
            kind: "leader_changed",
            summary: format!(
                "{dataset}: leader changed from {old} to {new} ({window} window): lower error by \
                 {m:.4} (se {se:.4}), {}",
                if significant {
                    "significant"
                } else {
                    "not significant, held for several recomputes"
                }
            ),
            details: json!({
                "window": window,
                "old": old,
                "new": new,
                "margin": m,
                "se": se,
                "p_value": p,
                "significant": significant,
            }),
        });
        self.leader = Some(new.to_string());
        self.challenger = None;
    }
}
