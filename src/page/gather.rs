//! What a page shows, read from the monitor (published boards, which no
//! recompute or intake batch holds up), the store (history, events, the
//! datasets' settings; all async queries) and this server's gauges (the
//! last outcome's time, failed recomputes).

use super::conditions::conditions;
use super::{
    propensities, thin, BoardFacts, DatasetSummary, DatasetView, ModelHistory, Thresholds,
    EVENTS_SHOWN, HISTORY_KEY, HISTORY_LINES, HISTORY_POINTS, HISTORY_SPAN_MS, WINDOW,
};
use crate::domain::{spec, Board, EventRecord};
use crate::metrics::{DatasetLabels, Metrics};
use crate::monitor::{Monitor, MonitorResult};
use crate::store::{HistoryQuery, Store, StoreResult};

/// Events read for the index, enough to see a recent front-runner change.
const SUMMARY_EVENTS: usize = 20;

/// The latest `n` events of a dataset, oldest first. Event ids are shared
/// by every dataset, so it reads back from the dataset's last id over a
/// span that widens until it holds `n` of them or reaches the start.
pub async fn latest_events(
    store: &Store,
    dataset_id: i64,
    n: usize,
) -> StoreResult<Vec<EventRecord>> {
    let last = store.last_event_id(dataset_id).await?;
    if last <= 0 || n == 0 {
        return Ok(Vec::new());
    }
    let mut span = (4 * n as i64).max(64);
    loop {
        let after = last.saturating_sub(span).max(0);
        let mut got = store.events(Some(dataset_id), after, span).await?;
        if got.len() >= n || after == 0 {
            let surplus = got.len().saturating_sub(n);
            got.drain(..surplus);
            return Ok(got);
        }
        span = span.saturating_mul(8);
    }
}

/// When the dataset's last outcome was accepted, from this server's gauge
/// (the one `PlumblineNoOutcomes` reads).
fn last_outcome_ms(metrics: &Metrics, dataset: &str) -> Option<i64> {
    metrics
        .last_outcome_seconds
        .get(&DatasetLabels {
            dataset: dataset.into(),
        })
        .map(|g| (g.get() * 1000.0) as i64)
}

fn recompute_failures(metrics: &Metrics, dataset: &str) -> u64 {
    metrics
        .recompute_failures
        .get(&DatasetLabels {
            dataset: dataset.into(),
        })
        .map(|c| c.get())
        .unwrap_or(0)
}

/// The index: every dataset with its latest board's facts and its alert
/// conditions.
pub async fn summaries(
    monitor: &Monitor,
    metrics: &Metrics,
    now_ms: i64,
) -> MonitorResult<Vec<DatasetSummary>> {
    let mut out = Vec::new();
    for name in monitor.dataset_names() {
        // A dataset created or dropped between the listing and here is
        // simply left out.
        let (Ok(id), Ok(board)) = (
            monitor.dataset_id(&name),
            monitor.published_board(&name, WINDOW),
        ) else {
            continue;
        };
        let events = latest_events(monitor.store(), id, SUMMARY_EVENTS).await?;
        out.push(DatasetSummary {
            conditions: conditions(
                board.as_ref(),
                &events,
                last_outcome_ms(metrics, &name),
                now_ms,
            ),
            board: board.as_ref().map(BoardFacts::of),
            name,
        });
    }
    Ok(out)
}

/// One dataset's page.
pub async fn dataset(
    monitor: &Monitor,
    metrics: &Metrics,
    name: &str,
    now_ms: i64,
) -> MonitorResult<DatasetView> {
    let id = monitor.dataset_id(name)?;
    let board = monitor.published_board(name, WINDOW)?;
    let store = monitor.store();
    let thresholds = store
        .datasets()
        .await?
        .into_iter()
        .find(|d| d.id == id)
        .map(|d| Thresholds {
            eps: d.spec.overlap_eps,
            max_extreme_share: d.spec.overlap_max_extreme_share,
            min_effective_share: d.spec.overlap_min_effective_share,
        })
        .unwrap_or(Thresholds {
            eps: spec::DEFAULT_EPS,
            max_extreme_share: spec::DEFAULT_MAX_EXTREME_SHARE,
            min_effective_share: spec::DEFAULT_MIN_EFFECTIVE_SHARE,
        });
    let history = match &board {
        Some(b) => histories(store, id, b, "").await?,
        None => Vec::new(),
    };
    let mut contrast_history = Vec::new();
    for c in board.iter().flat_map(|b| &b.contrasts) {
        contrast_history.push((c.arm.clone(), histories(store, id, c, &c.arm).await?));
    }
    let events = latest_events(store, id, EVENTS_SHOWN).await?;
    Ok(DatasetView {
        name: name.into(),
        thresholds: Thresholds {
            // The board's own eps, when it has one, is the one it applied.
            eps: board
                .as_ref()
                .and_then(|b| b.overlap.as_ref())
                .map(|o| o.eps)
                .unwrap_or(thresholds.eps),
            ..thresholds
        },
        propensities: board.as_ref().and_then(|b| propensities(&b.detail_json)),
        conditions: conditions(
            board.as_ref(),
            &events,
            last_outcome_ms(metrics, name),
            now_ms,
        ),
        recompute_failures: recompute_failures(metrics, name),
        board,
        history,
        contrast_history,
        events,
    })
}

/// The history of the board's registered models (by rank, at most
/// [`HISTORY_LINES`]) over [`HISTORY_SPAN_MS`] before the board, each
/// thinned to [`HISTORY_POINTS`]. `arm` names a contrast's board of a
/// dataset with arms (its history rows carry the arm), empty otherwise.
async fn histories(
    store: &Store,
    dataset_id: i64,
    board: &Board,
    arm: &str,
) -> StoreResult<Vec<ModelHistory>> {
    let mut models: Vec<_> = board.models.iter().filter(|m| !m.baseline).collect();
    models.sort_by_key(|m| m.rank);
    let mut out = Vec::new();
    for m in models.into_iter().take(HISTORY_LINES) {
        let rows = store
            .history(&HistoryQuery {
                dataset_id,
                model: &m.name,
                key: HISTORY_KEY,
                window: WINDOW,
                arm,
                from_ms: board.computed_at_ms.saturating_sub(HISTORY_SPAN_MS),
                to_ms: i64::MAX,
            })
            .await?;
        out.push(ModelHistory {
            model: m.name.clone(),
            points: thin(&rows, HISTORY_POINTS),
        });
    }
    Ok(out)
}
