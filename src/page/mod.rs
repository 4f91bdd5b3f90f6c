//! The status page on the HTTP listener: `/` lists the datasets, and
//! `/datasets/<name>` shows one: its board (each ranked model's error
//! difference from constant-effect with its interval, on one axis), the
//! history of those differences with their bands, the propensities of
//! both arms against the overlap thresholds, the events on a timeline, and
//! which alert conditions hold now.
//!
//! Everything is drawn on the server as HTML with inline SVG and one
//! embedded style sheet: no script, nothing fetched from anywhere else,
//! so the page works wherever the listener can be reached. It reloads
//! itself every [`REFRESH_SECONDS`] (a meta refresh) and says when it was
//! drawn.
//!
//! The drawing (`html.rs`, `svg.rs`, with `scale.rs` for axes and
//! `conditions.rs` for the alerts' state) is pure functions from domain
//! records to strings; `gather.rs` reads those records from the monitor
//! and the store, and `handlers.rs` holds the HTTP handlers, which apply
//! the same token rule as `/metrics` (`metrics::http::admit`). A dataset
//! with arms shows one board per contrast, each arm's generalized
//! propensity against the overlap threshold and the arm-choice policy
//! table instead of the binary board and histograms. Every
//! element a test looks for carries a `data-kind` attribute (and
//! `data-model`, `data-arm`, ... where it belongs to one).

pub mod conditions;
pub mod gather;
pub mod handlers;
pub mod html;
pub mod scale;
pub mod svg;

use std::fmt;

use crate::domain::{Board, EventRecord, HistoryRow};
use conditions::Condition;

/// Seconds between the page's reloads.
pub const REFRESH_SECONDS: u32 = 60;
/// How far back the history chart reaches from the latest board.
pub const HISTORY_SPAN_MS: i64 = 7 * 24 * 3600 * 1000;
/// Most points drawn per history line (a longer history is thinned
/// evenly, keeping its last point).
pub const HISTORY_POINTS: usize = 400;
/// Most models drawn in the history chart, by rank.
pub const HISTORY_LINES: usize = 10;
/// Most rows drawn on the board chart, by rank.
pub const BOARD_ROWS: usize = 60;
/// Events listed (the latest).
pub const EVENTS_SHOWN: usize = 40;
/// The window the page shows.
pub const WINDOW: &str = "cumulative";
/// The history key the page draws: a model's corrected PEHE minus
/// constant-effect's, the board's own axis.
pub const HISTORY_KEY: &str = "vs_constant";

/// Text made safe for HTML (and SVG) text and quoted attribute values.
pub struct Esc<'a>(pub &'a str);

impl fmt::Display for Esc<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut rest = self.0;
        while let Some(i) = rest.find(['&', '<', '>', '"', '\'']) {
            f.write_str(&rest[..i])?;
            f.write_str(match rest.as_bytes()[i] {
                b'&' => "&amp;",
                b'<' => "&lt;",
                b'>' => "&gt;",
                b'"' => "&quot;",
                _ => "&#39;",
            })?;
            rest = &rest[i + 1..];
        }
        f.write_str(rest)
    }
}

/// A path segment made safe for a URL (RFC 3986 unreserved characters
/// kept, everything else percent-encoded).
pub fn url_segment(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for b in s.bytes() {
        if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_' | b'~') {
            out.push(b as char);
        } else {
            out.push_str(&format!("%{b:02X}"));
        }
    }
    out
}

/// The overlap limits a dataset was created with.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Thresholds {
    /// Propensities outside [eps, 1 - eps] are extreme.
    pub eps: f64,
    pub max_extreme_share: f64,
    pub min_effective_share: f64,
}

/// Counts of each arm's propensities in equal bins over [0, 1].
#[derive(Debug, Clone, PartialEq)]
pub struct Propensities {
    pub treated: Vec<u64>,
    pub control: Vec<u64>,
}

/// The propensity histograms in a board's detail document (the overlap
/// report that `GetOverlap` serves); None when it has none.
pub fn propensities(detail_json: &str) -> Option<Propensities> {
    let doc: serde_json::Value = serde_json::from_str(detail_json).ok()?;
    let arm = |name: &str| -> Option<Vec<u64>> {
        doc.get("overlap")?
            .get(name)?
            .get("histogram")?
            .as_array()?
            .iter()
            .map(serde_json::Value::as_u64)
            .collect()
    };
    let (treated, control) = (arm("treated")?, arm("control")?);
    (!treated.is_empty() && treated.len() == control.len())
        .then_some(Propensities { treated, control })
}

/// One arm's generalized propensity (P(arm | features) with every arm
/// modelled), as the top board of a dataset with arms carries it.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmPropensity {
    pub arm: String,
    /// Units that got the arm.
    pub units: u64,
    /// (probability, quantile) pairs of the arm's propensity over every
    /// unit, by probability.
    pub quantiles: Vec<(f64, f64)>,
    pub effective_share: f64,
    /// Share of every unit whose propensity of the arm is below eps.
    pub extreme_share: f64,
    pub clipped: u64,
}

impl ArmPropensity {
    /// The quantile at probability `p`, when the report has it.
    pub fn quantile(&self, p: f64) -> Option<f64> {
        self.quantiles
            .iter()
            .find(|(q, _)| (q - p).abs() < 1e-9)
            .map(|&(_, v)| v)
    }
}

/// Each arm's generalized propensity in a top board's detail document
/// (`propensity`, the reference first); empty when it has none.
pub fn arm_propensities(detail_json: &str) -> Vec<ArmPropensity> {
    let Ok(doc) = serde_json::from_str::<serde_json::Value>(detail_json) else {
        return Vec::new();
    };
    let Some(arms) = doc.get("propensity").and_then(|p| p.as_array()) else {
        return Vec::new();
    };
    arms.iter()
        .filter_map(|a| {
            Some(ArmPropensity {
                arm: a.get("arm")?.as_str()?.to_string(),
                units: a.get("units")?.as_u64()?,
                quantiles: a
                    .get("quantiles")?
                    .as_array()?
                    .iter()
                    .filter_map(|pair| Some((pair.get(0)?.as_f64()?, pair.get(1)?.as_f64()?)))
                    .collect(),
                effective_share: a.get("effective_share")?.as_f64()?,
                extreme_share: a.get("extreme_share")?.as_f64()?,
                clipped: a.get("clipped")?.as_u64()?,
            })
        })
        .collect()
}

/// One model's history of [`HISTORY_KEY`], oldest first.
#[derive(Debug, Clone)]
pub struct ModelHistory {
    pub model: String,
    pub points: Vec<HistoryRow>,
}

/// At most `most` of `points`, evenly spread, the last always kept.
pub fn thin<T: Clone>(points: &[T], most: usize) -> Vec<T> {
    if points.len() <= most || most < 2 {
        return points.to_vec();
    }
    let last = points.len() - 1;
    (0..most)
        .map(|i| points[i * last / (most - 1)].clone())
        .collect()
}

/// Everything one dataset's page shows.
#[derive(Debug, Clone)]
pub struct DatasetView {
    pub name: String,
    pub thresholds: Thresholds,
    /// The window's latest board; None before the first recompute.
    pub board: Option<Board>,
    pub propensities: Option<Propensities>,
    /// The ranked models' histories, by rank, baselines left out (the
    /// chart's zero line is constant-effect).
    pub history: Vec<ModelHistory>,
    /// On a dataset with arms, each contrast's arm with its models'
    /// histories on that contrast's board, as `history` is for a binary
    /// dataset (which leaves this empty).
    pub contrast_history: Vec<(String, Vec<ModelHistory>)>,
    /// The latest events, oldest first.
    pub events: Vec<EventRecord>,
    pub conditions: Vec<Condition>,
    /// Recomputes of the dataset that failed on this server since it
    /// started.
    pub recompute_failures: u64,
}

/// One line of the index.
#[derive(Debug, Clone)]
pub struct DatasetSummary {
    pub name: String,
    /// Units, front-runner, time and degenerate state of the latest board.
    pub board: Option<BoardFacts>,
    pub conditions: Vec<Condition>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct BoardFacts {
    pub units: u64,
    pub front_runner: String,
    pub computed_at_ms: i64,
    pub degenerate: String,
    /// On a dataset with arms, each contrast's arm and front-runner (the
    /// top board has none of its own); empty otherwise.
    pub contrast_front_runners: Vec<(String, String)>,
}

impl BoardFacts {
    pub fn of(b: &Board) -> Self {
        Self {
            units: b.units,
            front_runner: b.front_runner.clone(),
            computed_at_ms: b.computed_at_ms,
            degenerate: b.degenerate.clone(),
            contrast_front_runners: b
                .contrasts
                .iter()
                .map(|c| (c.arm.clone(), c.front_runner.clone()))
                .collect(),
        }
    }
}

/// What every page says around its content.
#[derive(Debug, Clone, Copy)]
pub struct Frame {
    pub drawn_at_ms: i64,
    /// The caller came with the page's cookie (offer to forget it).
    pub signed_in: bool,
    pub refresh_seconds: u32,
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::domain::{BoardModel, Difference, Window};
    use crate::estimate::stats::Estimate;

    /// A board of `models` ranked in order, then constant-effect.
    pub fn board(dataset: &str, models: &[&str]) -> Board {
        let mut rows: Vec<BoardModel> = models
            .iter()
            .enumerate()
            .map(|(i, name)| {
                let estimate = -0.5 + 0.2 * i as f64;
                BoardModel {
                    name: (*name).into(),
                    baseline: false,
                    rank: i as u32 + 1,
                    scores: vec![],
                    vs_constant: Difference {
                        estimate,
                        se: 0.1,
                        ci_low: estimate - 0.196,
                        ci_high: estimate + 0.196,
                        p_value: 0.01,
                        joint: Some((estimate - 0.25, estimate + 0.25)),
                    },
                    draw_share: 0.0,
                    chance_lowest: Some(1.0 / (i as f64 + 2.0)),
                    in_best_set: i == 0,
                    policy_gain: Estimate::new(0.0, 0.0),
                    treated_share: 0.5,
                    policy_vs_front_runner: None,
                    autoc: Estimate::new(0.0, 0.0),
                    qini: Estimate::new(0.0, 0.0),
                    blp_slope: None,
                    top_minus_bottom: None,
                    rmse_lower_bound: None,
                    registered_blend: false,
                }
            })
            .collect();
        let mut constant = rows[0].clone();
        constant.name = crate::estimate::data::CONSTANT_EFFECT.into();
        constant.baseline = true;
        constant.rank = rows.len() as u32 + 1;
        constant.vs_constant = Difference::default();
        constant.chance_lowest = Some(0.0);
        constant.in_best_set = false;
        rows.push(constant);
        Board {
            dataset: dataset.into(),
            window: Window::Cumulative,
            snapshot_id: 7,
            computed_at_ms: 1_709_210_096_000,
            units: 1200,
            ate: Some(Estimate::new(1.5, 0.2)),
            front_runner: models[0].into(),
            front_runner_vs_constant: None,
            joint_critical_value: Some(2.4),
            best_set: vec![models[0].into()],
            no_detectable_heterogeneity: false,
            models: rows,
            incomplete: vec![],
            overlap: None,
            nuisance: vec![],
            pairwise: vec![],
            degenerate: String::new(),
            caveat: String::new(),
            detail_json: String::new(),
            rank_metrics_units: 1200,
            plugin_error_projection: None,
            blend: None,
            alerts: None,
            arm: String::new(),
            reference_arm: String::new(),
            contrasts: Vec::new(),
            arm_policy: None,
        }
    }

    #[test]
    fn escaping_leaves_no_markup() {
        let s = Esc("<script>alert('x') & \"y\"</script>").to_string();
        assert_eq!(
            s,
            "&lt;script&gt;alert(&#39;x&#39;) &amp; &quot;y&quot;&lt;/script&gt;"
        );
        assert_eq!(Esc("plain-name_1.0").to_string(), "plain-name_1.0");
        assert_eq!(url_segment("a b/<c>"), "a%20b%2F%3Cc%3E");
        assert_eq!(url_segment("ride-credits_2.0"), "ride-credits_2.0");
    }

    #[test]
    fn histograms_come_from_the_overlap_report() {
        let json =
            r#"{"overlap":{"treated":{"histogram":[0,2,5]},"control":{"histogram":[4,1,0]}}}"#;
        assert_eq!(
            propensities(json),
            Some(Propensities {
                treated: vec![0, 2, 5],
                control: vec![4, 1, 0]
            })
        );
        assert_eq!(propensities(""), None);
        assert_eq!(
            propensities(r#"{"overlap":{"treated":{"histogram":[1]}}}"#),
            None
        );
    }

    #[test]
    fn thinning_keeps_the_ends() {
        let v: Vec<usize> = (0..1000).collect();
        let t = thin(&v, 10);
        assert_eq!(t.len(), 10);
        assert_eq!((t[0], t[9]), (0, 999));
        assert_eq!(thin(&v[..5], 10), vec![0, 1, 2, 3, 4]);
    }
}
