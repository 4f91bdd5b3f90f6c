//! Which alert conditions hold now, read from what the page already has:
//! the stream watch's states that every board carries (the same values as
//! the `window="stream"` gauges the shipped Prometheus rules fire from),
//! the recent events, and the time of the last accepted outcome (the
//! `plumbline_last_outcome_timestamp_seconds` gauge).
//!
//! The Prometheus rules add durations (`for: 6h`, `for: 5m`); the page
//! shows the state as it is now, and says so.

use crate::domain::{AlertView, Board, EventRecord};

/// The event kind of a front-runner change (`monitor::alerts`).
pub const FRONT_RUNNER_CHANGED: &str = "front_runner_changed";
/// How long a front-runner change counts as news (the rule's 30 minutes).
pub const CHANGE_NEWS_MS: i64 = 30 * 60 * 1000;
/// Outcomes older than this make the dataset stale (the rule's 24 hours).
pub const STALE_OUTCOMES_MS: i64 = 24 * 3600 * 1000;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum State {
    Active,
    Clear,
    /// Not decided yet (no board, or the watch has not looked).
    Unknown,
}

impl State {
    pub fn word(self) -> &'static str {
        match self {
            State::Active => "active",
            State::Clear => "clear",
            State::Unknown => "unknown",
        }
    }
}

/// One alert condition as it stands.
#[derive(Debug, Clone, PartialEq)]
pub struct Condition {
    /// Stable key, used in the page's `data-alert` attributes.
    pub key: &'static str,
    pub title: &'static str,
    /// On a dataset with arms, the contrast's arm the condition is about
    /// (empty: the dataset's).
    pub arm: String,
    pub state: State,
    pub detail: String,
}

/// The conditions of one dataset, in a fixed order. `events` are the
/// dataset's recent events (any order); `last_outcome_ms` is when the last
/// outcome was accepted, if this server knows. On a dataset with arms the
/// watch's conditions (front-runner, heterogeneity, overlap) come once per
/// contrast, from that contrast's board.
pub fn conditions(
    board: Option<&Board>,
    events: &[EventRecord],
    last_outcome_ms: Option<i64>,
    now_ms: i64,
) -> Vec<Condition> {
    let mut out = Vec::with_capacity(5);

    let change = events
        .iter()
        .filter(|e| e.kind == FRONT_RUNNER_CHANGED && now_ms - e.at_ms <= CHANGE_NEWS_MS)
        .max_by_key(|e| e.id);
    out.push(Condition {
        key: "front-runner-changed",
        title: "Front-runner changed in the last 30 minutes",
        arm: String::new(),
        state: if change.is_some() {
            State::Active
        } else {
            State::Clear
        },
        detail: match change {
            Some(e) => e.summary.clone(),
            None => "no change of front-runner in the last 30 minutes".into(),
        },
    });

    match board.filter(|b| !b.contrasts.is_empty()) {
        Some(b) => {
            for c in &b.contrasts {
                watch_conditions(c.alerts.as_ref(), &c.arm, &mut out);
            }
        }
        None => watch_conditions(board.and_then(|b| b.alerts.as_ref()), "", &mut out),
    }

    let (state, detail) = match last_outcome_ms {
        None => (
            State::Unknown,
            "no outcome accepted since this server started".into(),
        ),
        Some(t) if now_ms - t > STALE_OUTCOMES_MS => (
            State::Active,
            format!(
                "the last outcome arrived {} ago",
                super::scale::ago(now_ms - t)
            ),
        ),
        Some(t) => (
            State::Clear,
            format!(
                "the last outcome arrived {} ago",
                super::scale::ago(now_ms - t)
            ),
        ),
    };
    out.push(Condition {
        key: "no-outcomes",
        title: "No outcomes for 24 hours",
        arm: String::new(),
        state,
        detail,
    });
    out
}

/// The watch's conditions from one alert view (a contrast's, when `arm`
/// is set).
fn watch_conditions(view: Option<&AlertView>, arm: &str, out: &mut Vec<Condition>) {
    let (state, detail) = match view {
        None => (
            State::Unknown,
            "the alerts' watch has not looked yet".into(),
        ),
        Some(v) if v.front_runner.is_empty() => (
            State::Unknown,
            "the alerts' watch has not named a front-runner yet".into(),
        ),
        Some(v) if v.front_runner_settled => (
            State::Clear,
            format!("{} errs less than every other model", v.front_runner),
        ),
        Some(v) => (
            State::Active,
            format!(
                "{} is not yet shown to err less than every other model",
                v.front_runner
            ),
        ),
    };
    out.push(Condition {
        key: "front-runner-not-separated",
        title: "Front-runner not yet separated from the others",
        arm: arm.into(),
        state,
        detail,
    });

    let (state, detail) = match view.map(|v| v.heterogeneity.as_str()) {
        None => (
            State::Unknown,
            "the alerts' watch has not looked yet".into(),
        ),
        Some("detected") => (
            State::Clear,
            "a model is shown to estimate effects better than constant-effect".into(),
        ),
        Some("absent") => (
            State::Active,
            "no model is shown to beat constant-effect: targeting on the models adds nothing \
             measurable now"
                .into(),
        ),
        Some(_) => (
            State::Active,
            "not yet decided: no model has been shown to beat constant-effect so far".into(),
        ),
    };
    out.push(Condition {
        key: "no-heterogeneity",
        title: "No model shown to beat constant-effect",
        arm: arm.into(),
        state,
        detail,
    });

    let (state, detail) = match view {
        None => (
            State::Unknown,
            "the alerts' watch has not looked yet".into(),
        ),
        Some(v) if v.overlap_degraded => (
            State::Active,
            "too many arriving units have an extreme propensity".into(),
        ),
        Some(_) => (
            State::Clear,
            "arriving units are within the dataset's overlap limits".into(),
        ),
    };
    out.push(Condition {
        key: "overlap-degraded",
        title: "Overlap degraded",
        arm: arm.into(),
        state,
        detail,
    });
}

#[cfg(test)]
mod tests {
    use super::*;

    fn event(id: i64, kind: &str, at_ms: i64) -> EventRecord {
        EventRecord {
            id,
            dataset: "d".into(),
            kind: kind.into(),
            at_ms,
            snapshot_id: 1,
            summary: format!("{kind} {id}"),
            details_json: "{}".into(),
        }
    }

    /// On a dataset with arms the watch's conditions come once per
    /// contrast, each from its contrast's alert view, and the top board's
    /// view (which judges nothing) is not read.
    #[test]
    fn a_dataset_with_arms_has_the_watch_conditions_per_contrast() {
        let mut top = crate::page::tests::board("d", &["good"]);
        let view = |front_runner: &str, settled: bool| AlertView {
            front_runner: front_runner.into(),
            front_runner_settled: settled,
            heterogeneity: "detected".into(),
            looks: 2,
            units: 900,
            ..AlertView::default()
        };
        for (arm, settled) in [("text", true), ("mail", false)] {
            let mut c = crate::page::tests::board("d", &["good"]);
            c.arm = arm.into();
            c.alerts = Some(view("good", settled));
            top.contrasts.push(c);
        }
        top.alerts = Some(AlertView::default());
        let c = conditions(Some(&top), &[], Some(0), 1);
        let of = |key: &str, arm: &str| {
            c.iter()
                .find(|x| x.key == key && x.arm == arm)
                .map(|x| x.state)
        };
        assert_eq!(c.len(), 2 + 3 * 2);
        assert_eq!(of("front-runner-not-separated", "text"), Some(State::Clear));
        assert_eq!(
            of("front-runner-not-separated", "mail"),
            Some(State::Active)
        );
        assert_eq!(of("no-heterogeneity", "mail"), Some(State::Clear));
        assert_eq!(of("front-runner-not-separated", ""), None);
        assert_eq!(of("no-outcomes", ""), Some(State::Clear));
    }

    fn state(c: &[Condition], key: &str) -> State {
        c.iter().find(|c| c.key == key).map(|c| c.state).expect(key)
    }

    #[test]
    fn nothing_known_before_the_first_look() {
        let c = conditions(None, &[], None, 1_000);
        assert_eq!(c.len(), 5);
        assert_eq!(state(&c, "front-runner-changed"), State::Clear);
        for key in [
            "front-runner-not-separated",
            "no-heterogeneity",
            "overlap-degraded",
        ] {
            assert_eq!(state(&c, key), State::Unknown, "{key}");
        }
        assert_eq!(state(&c, "no-outcomes"), State::Unknown);
    }

    #[test]
    fn the_watch_states_and_recent_events_decide() {
        let mut board = crate::page::tests::board("d", &["a", "b"]);
        board.alerts = Some(AlertView {
            front_runner: "a".into(),
            front_runner_settled: false,
            heterogeneity: "absent".into(),
            overlap_degraded: true,
            looks: 3,
            units: 100,
            drift: vec![],
        });
        let now = 10 * CHANGE_NEWS_MS;
        let events = [
            event(1, FRONT_RUNNER_CHANGED, now - 2 * CHANGE_NEWS_MS),
            event(2, "nuisance_refit", now - 1000),
        ];
        let c = conditions(Some(&board), &events, Some(now - 1000), now);
        assert_eq!(state(&c, "front-runner-changed"), State::Clear, "too old");
        assert_eq!(state(&c, "front-runner-not-separated"), State::Active);
        assert_eq!(state(&c, "no-heterogeneity"), State::Active);
        assert_eq!(state(&c, "overlap-degraded"), State::Active);
        assert_eq!(state(&c, "no-outcomes"), State::Clear);

        let events = [event(3, FRONT_RUNNER_CHANGED, now - 60_000)];
        if let Some(v) = board.alerts.as_mut() {
            v.front_runner_settled = true;
            v.heterogeneity = "detected".into();
            v.overlap_degraded = false;
        }
        let c = conditions(
            Some(&board),
            &events,
            Some(now - STALE_OUTCOMES_MS - 1),
            now,
        );
        assert_eq!(state(&c, "front-runner-changed"), State::Active);
        assert!(c[0].detail.contains(FRONT_RUNNER_CHANGED), "{:?}", c[0]);
        assert_eq!(state(&c, "front-runner-not-separated"), State::Clear);
        assert_eq!(state(&c, "no-heterogeneity"), State::Clear);
        assert_eq!(state(&c, "overlap-degraded"), State::Clear);
        assert_eq!(state(&c, "no-outcomes"), State::Active);
    }
}
