//! The storage contract (`src/store/mod.rs`), checked the same way against
//! every backend: refused re-sends and conflicts, batches that are written
//! whole or not at all, the order of the rebuild streams, snapshots and the
//! latest board of each window, history, events and tokens. A backend joins
//! by adding itself to `backends()`.

mod common;

use common::service::TempDir;
use plumbline::domain::{
    Board, DatasetSpec, OutcomeRecord, PredictionRecord, ScoreRow, UnitRecord, Window,
};
use plumbline::estimate::OutcomeKind;
use plumbline::store::{
    self, Durability, HistoryQuery, NewSnapshot, Store, StoreConfig, StoreError, TokenRecord,
};
use tokio_stream::StreamExt;

/// Every backend this build can open, each on a fresh empty store.
async fn backends(tag: &str) -> Vec<(String, Store, TempDir)> {
    let dir = TempDir::new(&format!("contract-{tag}"));
    let sqlite = store::open(&StoreConfig {
        path: dir.0.join("plumbline.sqlite"),
        durability: Durability::Normal,
        claim: true,
    })
    .await
    .expect("open sqlite");
    vec![("sqlite".into(), sqlite, dir)]
}

fn spec(name: &str) -> DatasetSpec {
    DatasetSpec {
        seed: 3,
        ..DatasetSpec::new(
            name,
            vec!["x1".into(), "x2".into()],
            OutcomeKind::Continuous,
        )
    }
    .normalized()
    .expect("a valid spec")
}

fn unit(seq: i64, key: &str) -> UnitRecord {
    UnitRecord {
        seq,
        key: key.into(),
        features: vec![seq as f64 * 0.5, -1.25e-3],
        treatment: (seq % 2) as u8,
        propensity: if seq % 3 == 0 { Some(0.25) } else { None },
        cohort: format!("c{}", seq / 10),
        assigned_at_ms: 1_000 + seq,
    }
}

fn board(dataset: &str, window: Window, snapshot_id: u64, units: u64) -> Board {
    Board {
        dataset: dataset.into(),
        window,
        snapshot_id,
        computed_at_ms: snapshot_id as i64 * 10,
        units,
        ate: None,
        leader: String::new(),
        best_set: vec![],
        no_detectable_heterogeneity: false,
        models: vec![],
        incomplete: vec![],
        overlap: None,
        nuisance: vec![],
        pairwise: vec![],
        degenerate: "not enough units".into(),
        caveat: String::new(),
        detail_json: String::new(),
        rank_metrics_units: 0,
        alerts: None,
    }
}

#[tokio::test]
async fn datasets_models_and_rows_keep_their_identity() {
    for (name, s, _dir) in backends("rows").await {
        let d = s.create_dataset(&spec("a"), 5).await.expect("create");
        assert!(
            matches!(
                s.create_dataset(&spec("a"), 6).await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a dataset name is stored once"
        );
        let listed = s.datasets().await.expect("datasets");
        assert_eq!(listed.len(), 1, "{name}");
        assert_eq!(
            listed[0].spec,
            spec("a"),
            "{name}: the spec reads back whole"
        );

        let m = s
            .register_model(d.id, "m", "1", "first", 7)
            .await
            .expect("model");
        assert!(
            matches!(
                s.register_model(d.id, "m", "2", "", 8).await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a model name is stored once per dataset"
        );
        s.retire_model(m.id, 9).await.expect("retire");
        s.retire_model(m.id, 10).await.expect("retire again");
        let models = s.models(d.id).await.expect("models");
        assert_eq!(models[0].retired_at_ms, 9, "{name}: retired stays retired");

        let units: Vec<UnitRecord> = (0..1_200).map(|i| unit(i, &format!("k{i}"))).collect();
        s.insert_units(d.id, &units, 11).await.expect("units");
        // A batch that repeats one stored unit is refused whole.
        let again = vec![unit(1_200, "new"), unit(5, "k5")];
        assert!(
            matches!(
                s.insert_units(d.id, &again, 12).await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a stored unit is refused"
        );
        let outcomes: Vec<OutcomeRecord> = (0..1_200)
            .rev()
            .enumerate()
            .map(|(seq, u)| OutcomeRecord {
                unit_seq: u,
                seq: seq as i64,
                value: u as f64 / 7.0,
                observed_at_ms: 20,
            })
            .collect();
        s.insert_outcomes(d.id, &outcomes[..600], 13)
            .await
            .expect("outcomes");
        assert!(
            matches!(
                s.insert_outcomes(d.id, &outcomes[599..], 14).await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a unit's outcome is stored once"
        );
        s.insert_outcomes(d.id, &outcomes[600..], 15)
            .await
            .expect("rest");
        let predictions: Vec<PredictionRecord> = (0..1_200)
            .map(|u| PredictionRecord {
                model_id: m.id,
                unit_seq: u,
                effect: -(u as f64),
                predicted_at_ms: 3,
            })
            .collect();
        s.insert_predictions(d.id, &predictions, 16)
            .await
            .expect("predictions");
        assert!(
            matches!(
                s.insert_predictions(d.id, &predictions[..1], 17).await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a model's prediction for a unit is stored once"
        );
        assert_eq!(
            s.counts(d.id).await.expect("counts"),
            (1_200, 1_200, 1_200),
            "{name}: refused batches left nothing behind"
        );
        assert_eq!(
            s.last_outcome_received_ms(d.id).await.expect("last"),
            Some(15)
        );

        // The rebuild streams: units by sequence, outcomes by arrival.
        let read: Vec<UnitRecord> = s
            .units(d.id)
            .collect::<Result<Vec<_>, _>>()
            .await
            .expect("unit stream");
        assert_eq!(read, units, "{name}: units read back in order, bit for bit");
        let read: Vec<OutcomeRecord> = s
            .outcomes(d.id)
            .collect::<Result<Vec<_>, _>>()
            .await
            .expect("outcome stream");
        assert_eq!(read, outcomes, "{name}: outcomes in arrival order");
        let mut read: Vec<PredictionRecord> = s
            .predictions(d.id)
            .collect::<Result<Vec<_>, _>>()
            .await
            .expect("prediction stream");
        read.sort_by_key(|p| p.unit_seq);
        assert_eq!(read, predictions, "{name}");
        s.close().await;
    }
}

#[tokio::test]
async fn snapshots_keep_each_windows_latest_board_and_the_history() {
    for (name, s, _dir) in backends("snapshots").await {
        let d = s.create_dataset(&spec("a"), 1).await.expect("create");
        let other = s.create_dataset(&spec("b"), 1).await.expect("create");
        assert_eq!(s.max_snapshot_id().await.expect("max"), 0);
        assert!(s.latest_fit(d.id).await.expect("fit").is_none());
        let fit = s
            .insert_fit(d.id, 2, 500, 499, 7, "{\"auc\":0.5}")
            .await
            .expect("fit");
        let latest = s.latest_fit(d.id).await.expect("fit").expect("one fit");
        assert_eq!(
            (latest.id, latest.units, latest.seed),
            (fit, 500, 7),
            "{name}"
        );

        let row = |window: &str, estimate: f64| ScoreRow {
            model: "m".into(),
            estimator: "dr_loss".into(),
            window: window.into(),
            estimate,
            se: 0.1,
            rank: 1,
            units: 500,
        };
        let first = [
            board("a", Window::Cumulative, 1, 500),
            board("a", Window::Cohort("w1".into()), 1, 200),
        ];
        s.insert_snapshot(&NewSnapshot {
            id: 1,
            dataset_id: d.id,
            computed_at_ms: 10,
            fit_id: Some(fit),
            refitted: true,
            millis: 3.5,
            boards: &first,
            scores: &[row("cumulative", 1.0), row("cohort:w1", 2.0)],
            watch: "{\"looks\":1}",
        })
        .await
        .expect("snapshot 1");
        // Another dataset's snapshot in between must not leak into `a`.
        s.insert_snapshot(&NewSnapshot {
            id: 2,
            dataset_id: other.id,
            computed_at_ms: 15,
            fit_id: None,
            refitted: false,
            millis: 1.0,
            boards: &[board("b", Window::Cumulative, 2, 9)],
            scores: &[],
            watch: "{}",
        })
        .await
        .expect("snapshot 2");
        let second = [board("a", Window::Cumulative, 3, 700)];
        s.insert_snapshot(&NewSnapshot {
            id: 3,
            dataset_id: d.id,
            computed_at_ms: 30,
            fit_id: Some(fit),
            refitted: false,
            millis: 2.0,
            boards: &second,
            scores: &[row("cumulative", 1.5)],
            watch: "{\"looks\":2}",
        })
        .await
        .expect("snapshot 3");
        assert!(
            matches!(
                s.insert_snapshot(&NewSnapshot {
                    id: 3,
                    dataset_id: d.id,
                    computed_at_ms: 40,
                    fit_id: None,
                    refitted: false,
                    millis: 1.0,
                    boards: &second,
                    scores: &[],
                    watch: "{}",
                })
                .await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a snapshot id is stored once"
        );
        assert_eq!(s.max_snapshot_id().await.expect("max"), 3);

        let mut latest = s.latest_boards(d.id).await.expect("boards");
        latest.sort_by_key(|b| b.window.key());
        assert_eq!(latest, vec![first[1].clone(), second[0].clone()], "{name}");
        assert_eq!(
            s.latest_watch(d.id).await.expect("watch").as_deref(),
            Some("{\"looks\":2}"),
            "{name}: the latest snapshot's watch state"
        );

        let history = |window: &'static str, from_ms: i64, to_ms: i64| HistoryQuery {
            dataset_id: d.id,
            model: "m",
            key: "dr_loss",
            window,
            from_ms,
            to_ms,
        };
        let points = s
            .history(&history("cumulative", 0, i64::MAX))
            .await
            .expect("history");
        let got: Vec<(i64, f64)> = points.iter().map(|p| (p.snapshot_id, p.estimate)).collect();
        assert_eq!(got, vec![(1, 1.0), (3, 1.5)], "{name}: oldest first");
        let points = s
            .history(&history("cumulative", 11, 30))
            .await
            .expect("history");
        assert_eq!(points.len(), 1, "{name}: bounded by time, inclusive");
        let points = s
            .history(&history("cohort:w1", 0, i64::MAX))
            .await
            .expect("history");
        assert_eq!(points.len(), 1, "{name}: by window");
        s.close().await;
    }
}

#[tokio::test]
async fn events_come_after_an_id_per_dataset_and_tokens_revoke_once() {
    for (name, s, _dir) in backends("events").await {
        let a = s.create_dataset(&spec("a"), 1).await.expect("create");
        let b = s.create_dataset(&spec("b"), 1).await.expect("create");
        let mut ids = Vec::new();
        for i in 0..5 {
            let d = if i % 2 == 0 { a.id } else { b.id };
            ids.push(
                s.insert_event(d, "leader_changed", i, i, &format!("e{i}"), "{}")
                    .await
                    .expect("event"),
            );
        }
        assert!(ids.windows(2).all(|w| w[1] > w[0]), "{name}: ids increase");
        let all = s.events(None, 0, 100).await.expect("events");
        assert_eq!(all.len(), 5, "{name}");
        let of_a = s.events(Some(a.id), ids[0], 100).await.expect("events");
        let summaries: Vec<&str> = of_a.iter().map(|e| e.summary.as_str()).collect();
        assert_eq!(
            summaries,
            vec!["e2", "e4"],
            "{name}: after an id, one dataset"
        );
        assert!(
            of_a.iter().all(|e| e.dataset == "a"),
            "{name}: named by dataset"
        );
        assert_eq!(
            s.events(None, 0, 2).await.expect("events").len(),
            2,
            "{name}: limit"
        );

        let token = TokenRecord {
            id: "t1".into(),
            digest: vec![1, 2, 3],
            scopes: "[\"admin\"]".into(),
            label: "ops".into(),
            created_at_ms: 5,
            revoked_at_ms: 0,
        };
        s.insert_token(&token).await.expect("token");
        assert!(
            matches!(s.insert_token(&token).await, Err(StoreError::Conflict(_))),
            "{name}: a token id is stored once"
        );
        assert_eq!(s.tokens().await.expect("tokens"), vec![token.clone()]);
        assert!(s.revoke_token("t1", 9).await.expect("revoke"), "{name}");
        assert!(
            !s.revoke_token("t1", 10).await.expect("revoke"),
            "{name}: once"
        );
        assert!(!s.revoke_token("nope", 10).await.expect("revoke"), "{name}");
        assert_eq!(
            s.tokens().await.expect("tokens")[0].revoked_at_ms,
            9,
            "{name}"
        );
        s.close().await;
    }
}

#[tokio::test]
async fn a_second_writer_on_one_data_directory_is_refused() {
    let dir = TempDir::new("contract-claim");
    let config = StoreConfig {
        path: dir.0.join("plumbline.sqlite"),
        durability: Durability::Normal,
        claim: true,
    };
    let first = store::open(&config).await.expect("first");
    match store::open(&config).await {
        Err(StoreError::InUse(why)) => assert!(why.contains("in use by process"), "{why}"),
        Err(e) => panic!("second writer: {e}"),
        Ok(_) => panic!("a second writer was admitted"),
    }
    let reader = store::open(&StoreConfig {
        claim: false,
        ..config.clone()
    })
    .await
    .expect("a token tool opens beside the server");
    reader.close().await;
    first.close().await;
    let again = store::open(&config).await.expect("claim after close");
    again.close().await;
}
