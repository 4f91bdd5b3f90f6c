//! The storage contract (`src/store/mod.rs`), checked the same way against
//! every backend: refused re-sends and conflicts, batches that are written
//! whole or not at all, the order of the row streams, snapshots and the
//! latest board of each window, history, events, tokens, leases and fenced
//! writes. A backend joins by adding itself to `backends()`.
//!
//! PostgreSQL runs on a throwaway cluster (`common/pg.rs`) where its server
//! is installed; elsewhere its half of each test says it skipped.

mod common;

use std::any::Any;

use common::pg::PgCluster;
use common::service::TempDir;
use plumbline::domain::{
    BlendDefinition, BlendMember, Board, DatasetSpec, OutcomeRecord, PredictionRecord, ScoreRow,
    UnitRecord, Window,
};
use plumbline::estimate::OutcomeKind;
use plumbline::store::{
    self, Durability, Fence, HistoryQuery, Location, NewEvent, NewSnapshot, Store, StoreConfig,
    StoreError, TokenRecord,
};
use tokio_stream::StreamExt;

struct Backend {
    name: &'static str,
    store: Store,
    /// What keeps the store alive: its directory, its cluster.
    _keep: Box<dyn Any + Send>,
}

/// Every backend this machine can open, each on a fresh empty store.
async fn backends(tag: &str) -> Vec<Backend> {
    let dir = TempDir::new(&format!("contract-{tag}"));
    let sqlite = store::open(&StoreConfig::sqlite(
        dir.0.join("plumbline.sqlite"),
        Durability::Normal,
    ))
    .await
    .expect("open sqlite");
    let mut all = vec![Backend {
        name: "sqlite",
        store: sqlite,
        _keep: Box::new(dir),
    }];
    if let Some(cluster) = PgCluster::start(&format!("contract-{tag}")) {
        let url = cluster.database("contract");
        let pg = store::open(&StoreConfig {
            location: Location::Postgres(url),
            durability: Durability::Full,
            claim: true,
            wal_limit_bytes: 0,
        })
        .await
        .unwrap_or_else(|e| panic!("open postgres: {e}\n{}", cluster.log()));
        all.push(Backend {
            name: "postgres",
            store: pg,
            _keep: Box::new(cluster),
        });
    }
    all
}

async fn collect<T>(stream: store::RowStream<'_, T>) -> Vec<T> {
    stream
        .collect::<Result<Vec<_>, _>>()
        .await
        .expect("row stream")
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
        front_runner: String::new(),
        front_runner_vs_constant: None,
        joint_critical_value: None,
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
        plugin_error_projection: None,
        blend: None,
        alerts: None,
        arm: String::new(),
        reference_arm: String::new(),
        contrasts: Vec::new(),
        arm_policy: None,
    }
}

#[tokio::test]
async fn datasets_models_and_rows_keep_their_identity() {
    for Backend { name, store: s, .. } in backends("rows").await {
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
        assert_eq!(models[0].blend, None, "{name}: a sent-predictions model");

        // A registered blend reads back with its definition whole (weights
        // bit for bit: serde_json writes the shortest string that parses
        // back to the same double), and its name is taken like any model's.
        let definition = BlendDefinition {
            snapshot_id: 41,
            window: Window::Cohort("spring".into()),
            members: vec![
                BlendMember {
                    model_id: m.id,
                    model: "m".into(),
                    weight: 0.1 + 0.2,
                },
                BlendMember {
                    model_id: m.id + 100,
                    model: "other".into(),
                    weight: 1.0 - (0.1 + 0.2),
                },
            ],
        };
        let b = s
            .register_blend_model(d.id, "mix", "v", "a blend", 10, &definition)
            .await
            .expect("blend model");
        assert_eq!(b.blend.as_ref(), Some(&definition), "{name}");
        assert!(
            matches!(
                s.register_blend_model(d.id, "m", "1", "", 10, &definition)
                    .await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a blend cannot take a registered name"
        );
        let models = s.models(d.id).await.expect("models");
        assert_eq!(models.len(), 2, "{name}");
        assert_eq!(models[1], b, "{name}: the blend reads back as registered");

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
                seq: u,
                effect: -(u as f64),
                predicted_at_ms: 3,
                arm: 1,
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

        // The streams: each from a number on, in order of the numbers
        // (a rebuild's predictions, from 0, in any order).
        let read = collect(s.units(d.id, 0)).await;
        assert_eq!(read, units, "{name}: units read back in order, bit for bit");
        let read = collect(s.units(d.id, 1_150)).await;
        assert_eq!(read, units[1_150..], "{name}: units from a number on");
        let read = collect(s.outcomes(d.id, 0)).await;
        assert_eq!(read, outcomes, "{name}: outcomes in arrival order");
        let read = collect(s.outcomes(d.id, 1_199)).await;
        assert_eq!(read, outcomes[1_199..], "{name}: outcomes from a number on");
        let mut read = collect(s.predictions(d.id, 0)).await;
        read.sort_by_key(|p| p.unit_seq);
        assert_eq!(read, predictions, "{name}");
        let mut read = collect(s.predictions(d.id, 1_000)).await;
        read.sort_by_key(|p| p.seq);
        assert_eq!(
            read,
            predictions[1_000..],
            "{name}: predictions from a number on"
        );
        s.close().await;
    }
}

#[tokio::test]
async fn snapshots_keep_each_windows_latest_board_and_the_history() {
    for Backend { name, store: s, .. } in backends("snapshots").await {
        let d = s.create_dataset(&spec("a"), 1).await.expect("create");
        let other = s.create_dataset(&spec("b"), 1).await.expect("create");
        let fa = s
            .acquire_lease(d.id, "me", 60_000)
            .await
            .expect("lease")
            .expect("free");
        let fb = s
            .acquire_lease(other.id, "me", 60_000)
            .await
            .expect("lease")
            .expect("free");
        assert_eq!(s.latest_snapshot_id(d.id).await.expect("latest"), 0);
        assert!(s.latest_fit(d.id).await.expect("fit").is_none());
        let fit = s
            .insert_fit(fa, 2, 500, 499, 7, "{\"auc\":0.5}")
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
            arm: String::new(),
            estimate,
            se: 0.1,
            rank: 1,
            units: 500,
        };
        let first = [
            board("a", Window::Cumulative, 1, 500),
            board("a", Window::Cohort("w1".into()), 1, 200),
        ];
        let mut ids = Vec::new();
        for _ in 0..3 {
            ids.push(s.next_snapshot_id().await.expect("snapshot id"));
        }
        assert!(ids.windows(2).all(|w| w[1] > w[0]), "{name}: ids increase");
        let [s1, s2, s3] = [ids[0], ids[1], ids[2]];
        s.insert_snapshot(&NewSnapshot {
            id: s1,
            fence: fa,
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
            id: s2,
            fence: fb,
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
            id: s3,
            fence: fa,
            computed_at_ms: 30,
            fit_id: Some(fit),
            refitted: false,
            millis: 2.0,
            boards: &second,
            // The same model, estimator and window on two contrasts' boards
            // besides its binary value: the arm is part of a row's identity.
            scores: &[
                row("cumulative", 1.5),
                ScoreRow {
                    arm: "text".into(),
                    ..row("cumulative", 2.5)
                },
                ScoreRow {
                    arm: "mail".into(),
                    ..row("cumulative", 3.5)
                },
            ],
            watch: "{\"looks\":2}",
        })
        .await
        .expect("snapshot 3");
        assert!(
            matches!(
                s.insert_snapshot(&NewSnapshot {
                    id: s3,
                    fence: fa,
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
        assert_eq!(s.latest_snapshot_id(d.id).await.expect("latest"), s3);
        assert_eq!(s.latest_snapshot_id(other.id).await.expect("latest"), s2);

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
            arm: "",
            from_ms,
            to_ms,
        };
        let points = s
            .history(&history("cumulative", 0, i64::MAX))
            .await
            .expect("history");
        let got: Vec<(i64, f64)> = points.iter().map(|p| (p.snapshot_id, p.estimate)).collect();
        assert_eq!(got, vec![(s1, 1.0), (s3, 1.5)], "{name}: oldest first");
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
        for (arm, want) in [("text", 2.5), ("mail", 3.5), ("sms", f64::NAN)] {
            let points = s
                .history(&HistoryQuery {
                    arm,
                    ..history("cumulative", 0, i64::MAX)
                })
                .await
                .expect("history");
            let got: Vec<(i64, f64)> = points.iter().map(|p| (p.snapshot_id, p.estimate)).collect();
            let expected = if want.is_nan() {
                vec![]
            } else {
                vec![(s3, want)]
            };
            assert_eq!(got, expected, "{name}: the contrast {arm}'s rows only");
        }
        s.close().await;
    }
}

#[tokio::test]
async fn events_come_after_an_id_per_dataset_and_tokens_revoke_once() {
    for Backend { name, store: s, .. } in backends("events").await {
        let a = s.create_dataset(&spec("a"), 1).await.expect("create");
        let b = s.create_dataset(&spec("b"), 1).await.expect("create");
        let fa = s
            .acquire_lease(a.id, "me", 60_000)
            .await
            .expect("lease")
            .expect("free");
        let mut ids = Vec::new();
        for i in 0..5 {
            let d = if i % 2 == 0 { a.id } else { b.id };
            let summary = format!("e{i}");
            ids.push(
                s.insert_event(&NewEvent {
                    dataset_id: d,
                    // Fenced on `a`, which has a lease; `b`'s are registry events.
                    epoch: (d == a.id).then_some(fa.epoch),
                    kind: "front_runner_changed",
                    at_ms: i,
                    snapshot_id: i,
                    summary: &summary,
                    details_json: "{}",
                })
                .await
                .expect("event"),
            );
        }
        assert_eq!(s.last_event_id(a.id).await.expect("last"), ids[4], "{name}");
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
    let config = StoreConfig::sqlite(dir.0.join("plumbline.sqlite"), Durability::Normal);
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
    // Closing drops the lock's file at once, but a child process forked by
    // another test of this binary in that instant (PostgreSQL's initdb,
    // a server) shares the descriptor until it execs, and the lock lives
    // as long as any copy: allow that window, never a held claim.
    let mut again = store::open(&config).await;
    for _ in 0..50 {
        if !matches!(again, Err(StoreError::InUse(_))) {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
        again = store::open(&config).await;
    }
    again.expect("claim after close").close().await;
}

#[tokio::test]
async fn leases_go_to_one_holder_and_fence_the_ones_before() {
    for Backend { name, store: s, .. } in backends("leases").await {
        let d = s.create_dataset(&spec("a"), 1).await.expect("create");
        let first = s
            .acquire_lease(d.id, "one", 60_000)
            .await
            .expect("acquire")
            .expect("a free lease is granted");
        assert!(
            s.acquire_lease(d.id, "two", 60_000)
                .await
                .expect("acquire")
                .is_none(),
            "{name}: a live lease has one holder"
        );
        assert!(
            s.renew_lease(first, "one", 60_000).await.expect("renew"),
            "{name}"
        );
        assert!(
            !s.renew_lease(first, "two", 60_000).await.expect("renew"),
            "{name}: only the holder renews"
        );
        let listed = s.leases().await.expect("leases");
        assert_eq!(listed.len(), 1, "{name}");
        assert_eq!(
            (listed[0].holder.as_str(), listed[0].epoch),
            ("one", first.epoch)
        );
        assert!(listed[0].expires_in_ms > 50_000, "{name}: {listed:?}");

        // A lapsed lease goes to the next holder with a larger epoch, and the
        // first holder's writes are refused from then on.
        s.release_lease(first, "one").await.expect("release");
        let second = s
            .acquire_lease(d.id, "two", 60_000)
            .await
            .expect("acquire")
            .expect("a released lease is granted");
        assert!(
            second.epoch > first.epoch,
            "{name}: {second:?} after {first:?}"
        );
        assert!(
            !s.renew_lease(first, "one", 60_000).await.expect("renew"),
            "{name}: the old holder cannot renew"
        );
        fn fenced<T>(r: Result<T, StoreError>) -> bool {
            matches!(r, Err(StoreError::Fenced(_)))
        }
        assert!(
            fenced(s.insert_fit(first, 1, 10, 9, 0, "{}").await),
            "{name}: a fit record at the old epoch is refused"
        );
        let id = s.next_snapshot_id().await.expect("id");
        let snapshot = |fence: Fence| NewSnapshot {
            id,
            fence,
            computed_at_ms: 1,
            fit_id: None,
            refitted: false,
            millis: 1.0,
            boards: &[],
            scores: &[],
            watch: "{}",
        };
        assert!(
            fenced(s.insert_snapshot(&snapshot(first)).await),
            "{name}: a snapshot at the old epoch is refused"
        );
        assert_eq!(
            s.latest_snapshot_id(d.id).await.expect("latest"),
            0,
            "{name}: and left nothing"
        );
        s.insert_snapshot(&snapshot(second))
            .await
            .expect("the new holder writes");
        let event = |epoch| NewEvent {
            dataset_id: d.id,
            epoch,
            kind: "k",
            at_ms: 1,
            snapshot_id: id,
            summary: "s",
            details_json: "{}",
        };
        assert!(
            fenced(s.insert_event(&event(Some(first.epoch))).await),
            "{name}: an alert event at the old epoch is refused"
        );
        s.insert_event(&event(Some(second.epoch)))
            .await
            .expect("fenced event");
        s.insert_event(&event(None)).await.expect("registry event");

        // A recompute asked of the owner waits open until answered.
        let ask = store::RecomputeAsk {
            dataset_id: d.id,
            refit: true,
            refresh_ranks: false,
            asked_at_ms: 5,
        };
        let asked = s.ask_recompute(&ask).await.expect("ask");
        assert_eq!(
            s.open_asks(d.id).await.expect("open"),
            vec![(asked, ask)],
            "{name}"
        );
        assert_eq!(s.answer(asked).await.expect("answer"), None, "{name}");
        s.answer_ask(asked, "{\"done\":1}", 6)
            .await
            .expect("answer it");
        assert_eq!(
            s.answer(asked).await.expect("answer").as_deref(),
            Some("{\"done\":1}"),
            "{name}"
        );
        assert!(
            s.open_asks(d.id).await.expect("open").is_empty(),
            "{name}: answered"
        );

        // A lease lapses by the store's clock.
        let e = s.create_dataset(&spec("b"), 1).await.expect("create");
        s.acquire_lease(e.id, "one", 1)
            .await
            .expect("acquire")
            .expect("free");
        tokio::time::sleep(std::time::Duration::from_millis(30)).await;
        assert!(
            s.acquire_lease(e.id, "two", 60_000)
                .await
                .expect("acquire")
                .is_some(),
            "{name}: a lapsed lease is granted again"
        );
        s.close().await;
    }
}

/// Several servers on one store: a batch numbered from a stale view is
/// stored after what the others appended (the store says where), and a
/// batch that repeats a unit key, an outcome of a unit or a prediction of
/// a (model, unit) pair another server stored is refused whole.
#[tokio::test]
async fn a_shared_store_numbers_stale_batches_after_others_and_refuses_repeats() {
    for Backend { name, store: s, .. } in backends("shared").await {
        if !s.shared() {
            continue;
        }
        let d = s.create_dataset(&spec("a"), 1).await.expect("create");
        let m = s
            .register_model(d.id, "m", "1", "", 1)
            .await
            .expect("model");
        let units: Vec<UnitRecord> = (0..10).map(|i| unit(i, &format!("k{i}"))).collect();
        assert_eq!(s.insert_units(d.id, &units, 2).await.expect("units"), 0);
        // Numbered 9 from a view that missed unit 9: stored as 10.
        assert_eq!(
            s.insert_units(d.id, &[unit(9, "late")], 3)
                .await
                .expect("late"),
            10,
            "{name}: a stale unit number is moved to the next"
        );
        let conflict = |r: Result<i64, StoreError>| matches!(r, Err(StoreError::Conflict(_)));
        assert!(
            conflict(
                s.insert_units(d.id, &[unit(11, "new"), unit(12, "k3")], 3)
                    .await
            ),
            "{name}: a unit key stored twice"
        );
        let stored: Vec<(i64, String)> = collect(s.units(d.id, 0))
            .await
            .into_iter()
            .map(|u| (u.seq, u.key))
            .collect();
        assert_eq!(stored.len(), 11, "{name}: nothing of the refused batch");
        assert_eq!(stored[10], (10, "late".to_string()), "{name}");
        let outcome = |unit_seq, seq| OutcomeRecord {
            unit_seq,
            seq,
            value: 1.0,
            observed_at_ms: 5,
        };
        s.insert_outcomes(d.id, &[outcome(0, 0), outcome(1, 1)], 4)
            .await
            .expect("outcomes");
        assert_eq!(
            s.insert_outcomes(d.id, &[outcome(2, 1)], 5)
                .await
                .expect("stale outcome"),
            2,
            "{name}: a stale outcome number is moved to the next"
        );
        assert!(
            conflict(
                s.insert_outcomes(d.id, &[outcome(3, 3), outcome(1, 4)], 5)
                    .await
            ),
            "{name}: a second outcome of a unit"
        );
        let prediction = |unit_seq, seq| PredictionRecord {
            model_id: m.id,
            unit_seq,
            seq,
            effect: 0.5,
            predicted_at_ms: 1,
            arm: 1,
        };
        s.insert_predictions(d.id, &[prediction(0, 0)], 6)
            .await
            .expect("prediction");
        assert_eq!(
            s.insert_predictions(d.id, &[prediction(1, 0)], 7)
                .await
                .expect("stale prediction"),
            1,
            "{name}: a stale prediction number is moved to the next"
        );
        assert!(
            conflict(s.insert_predictions(d.id, &[prediction(0, 2)], 7).await),
            "{name}: a second prediction of a (model, unit) pair"
        );
        assert_eq!(s.counts(d.id).await.expect("counts"), (11, 3, 2), "{name}");
        let tip = s.tip(d.id).await.expect("tip");
        assert_eq!(
            (
                tip.units,
                tip.outcomes,
                tip.predictions,
                tip.models,
                tip.retired
            ),
            (11, 3, 2, 1, 0),
            "{name}: the tip"
        );
        s.close().await;
    }
}

/// Writers appending to one dataset of a shared store at once, each from
/// its own stale view, get gapless numbers: every batch is stored whole,
/// in one run of numbers, where the store said.
#[tokio::test]
async fn concurrent_writers_of_a_shared_store_get_gapless_numbers() {
    const WRITERS: usize = 4;
    const BATCHES: usize = 25;
    const ROWS: usize = 40;
    for Backend { name, store: s, .. } in backends("gapless").await {
        if !s.shared() {
            continue;
        }
        let d = s.create_dataset(&spec("a"), 1).await.expect("create");
        let tasks: Vec<_> = (0..WRITERS)
            .map(|w| {
                let s = s.clone();
                tokio::spawn(async move {
                    let mut placed = Vec::new();
                    for b in 0..BATCHES {
                        // Every writer proposes the numbers it would give
                        // if it were alone.
                        let rows: Vec<UnitRecord> = (0..ROWS)
                            .map(|i| unit((b * ROWS + i) as i64, &format!("w{w}-b{b}-{i}")))
                            .collect();
                        let first = s.insert_units(d.id, &rows, 2).await.expect("append");
                        placed.push((first, w, b));
                    }
                    placed
                })
            })
            .collect();
        let mut placed = Vec::new();
        for t in tasks {
            placed.extend(t.await.expect("writer"));
        }
        let stored = collect(s.units(d.id, 0)).await;
        let total = WRITERS * BATCHES * ROWS;
        assert_eq!(stored.len(), total, "{name}");
        for (i, u) in stored.iter().enumerate() {
            assert_eq!(u.seq, i as i64, "{name}: numbers without gaps");
        }
        for (first, w, b) in placed {
            for i in 0..ROWS {
                assert_eq!(
                    stored[first as usize + i].key,
                    format!("w{w}-b{b}-{i}"),
                    "{name}: batch {b} of writer {w} in one run from {first}"
                );
            }
        }
        println!("{name}: {WRITERS} writers, {total} units in gapless runs");
        s.close().await;
    }
}

/// A stream of unit batches into a fresh SQLite store for `seconds`, each
/// committed as soon as the last one is: the largest WAL size seen, how
/// often the file shrank, and the units written.
async fn wal_under_stream(limit: u64, seconds: u64) -> (u64, usize, i64) {
    let dir = TempDir::new("contract-wal");
    let path = dir.0.join("plumbline.sqlite");
    let s = store::open(&StoreConfig {
        wal_limit_bytes: limit,
        ..StoreConfig::sqlite(&path, Durability::Normal)
    })
    .await
    .expect("open");
    let d = s.create_dataset(&spec("a"), 1).await.expect("create");
    let wal = dir.0.join("plumbline.sqlite-wal");
    let size = || std::fs::metadata(&wal).map(|m| m.len()).unwrap_or(0);
    let (mut seq, mut largest, mut cuts, mut last) = (0i64, 0u64, 0, 0u64);
    let started = std::time::Instant::now();
    while started.elapsed() < std::time::Duration::from_secs(seconds) {
        let batch: Vec<UnitRecord> = (seq..seq + 200)
            .map(|i| unit(i, &format!("k{i}")))
            .collect();
        s.insert_units(d.id, &batch, 1).await.expect("units");
        seq += 200;
        let now = size();
        if now < last {
            cuts += 1;
        }
        largest = largest.max(now);
        last = now;
    }
    s.close().await;
    (largest, cuts, seq)
}

/// SQLite's WAL under a stream that never pauses: passive checkpoints never
/// catch up with it, so without a bound the file grows with everything
/// written. With `wal_limit_bytes` a checkpoint cuts it back once it passes
/// the bound; between checkpoints (every 500 ms) it grows by what is
/// written in the meantime. The same 3 s stream runs without a bound and
/// with a 2 MiB one.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_sqlite_wal_is_cut_back_once_it_passes_its_bound() {
    let mib = |b: u64| b as f64 / f64::from(1 << 20);
    let (free, free_cuts, free_units) = wal_under_stream(0, 3).await;
    let limit: u64 = 2 << 20;
    let (bounded, cuts, units) = wal_under_stream(limit, 3).await;
    println!(
        "3 s streams: unbounded WAL reached {:.1} MiB ({free_units} units, cut {free_cuts} \
         times); bounded at {:.0} MiB it reached {:.1} MiB ({units} units, cut {cuts} times)",
        mib(free),
        mib(limit),
        mib(bounded)
    );
    assert_eq!(
        free_cuts, 0,
        "without a bound the WAL only grows under a stream"
    );
    assert!(cuts >= 2, "the bounded WAL was cut back {cuts} times");
    // The unbounded file holds the whole stream; the bounded one at most the
    // bound plus what one or two checkpoint intervals wrote (a quarter of a
    // 3 s stream leaves room for a slow interval).
    let per_unit = free as f64 / free_units as f64;
    assert!(
        (bounded as f64) < limit as f64 + 0.34 * per_unit * units as f64,
        "bounded WAL reached {:.1} MiB",
        mib(bounded)
    );
}

fn arms_spec(name: &str) -> DatasetSpec {
    DatasetSpec {
        arms: vec!["none".into(), "text".into(), "mail".into()],
        arm_costs: vec![0.0, 0.1, 0.3],
        ..spec(name)
    }
    .normalized()
    .expect("a valid spec with arms")
}

#[tokio::test]
async fn a_dataset_with_arms_keeps_each_units_arm_and_each_predictions_arm() {
    for Backend { name, store: s, .. } in backends("arms").await {
        let d = s
            .create_dataset(&arms_spec("three"), 5)
            .await
            .expect("create");
        let listed = s.datasets().await.expect("datasets");
        assert_eq!(
            listed[0].spec,
            arms_spec("three"),
            "{name}: arms and costs read back"
        );
        let m = s
            .register_model(d.id, "m", "1", "", 6)
            .await
            .expect("model");
        // Arm indices 0, 1 and 2 in the treatment column.
        let units: Vec<UnitRecord> = (0..30)
            .map(|i| UnitRecord {
                treatment: (i % 3) as u8,
                ..unit(i, &format!("k{i}"))
            })
            .collect();
        s.insert_units(d.id, &units, 7).await.expect("units");
        assert_eq!(collect(s.units(d.id, 0)).await, units, "{name}");
        // One model predicts each unit twice: once per arm.
        let predictions: Vec<PredictionRecord> = (0..60)
            .map(|j| PredictionRecord {
                model_id: m.id,
                unit_seq: j / 2,
                seq: j,
                arm: 1 + (j % 2) as u8,
                effect: j as f64 * 0.25,
                predicted_at_ms: 3,
            })
            .collect();
        s.insert_predictions(d.id, &predictions, 8)
            .await
            .expect("predictions of two arms");
        // The same (model, arm, unit) again is refused whole.
        let again = vec![PredictionRecord {
            seq: 60,
            ..predictions[5].clone()
        }];
        assert!(
            matches!(
                s.insert_predictions(d.id, &again, 9).await,
                Err(StoreError::Conflict(_))
            ),
            "{name}: a model's prediction of one arm for a unit is stored once"
        );
        let mut read = collect(s.predictions(d.id, 0)).await;
        read.sort_by_key(|p| p.seq);
        assert_eq!(read, predictions, "{name}: each prediction keeps its arm");
        assert_eq!(s.counts(d.id).await.expect("counts"), (30, 0, 60), "{name}");
        s.close().await;
    }
}

/// A SQLite store written before arms existed (migrations 1 to 8) opens
/// under the current schema with its rows as they were and every
/// prediction for arm 1, the binary treatment.
#[tokio::test]
async fn a_sqlite_store_from_before_arms_reads_back_its_binary_rows() {
    use sqlx::sqlite::{SqliteConnectOptions, SqlitePoolOptions};
    let dir = TempDir::new("contract-before-arms");
    let old = dir.0.join("migrations");
    std::fs::create_dir_all(&old).expect("dir");
    let here = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("migrations/sqlite");
    for e in std::fs::read_dir(&here).expect("migrations") {
        let path = e.expect("entry").path();
        let file = path.file_name().and_then(|f| f.to_str()).unwrap_or("");
        if file.get(..4).is_some_and(|v| v <= "0008") {
            std::fs::copy(&path, old.join(file)).expect("copy");
        }
    }
    let db = dir.0.join("plumbline.sqlite");
    {
        let pool = SqlitePoolOptions::new()
            .connect_with(
                SqliteConnectOptions::new()
                    .filename(&db)
                    .create_if_missing(true),
            )
            .await
            .expect("open");
        sqlx::migrate::Migrator::new(old.as_path())
            .await
            .expect("migrator")
            .run(&pool)
            .await
            .expect("migrate to 8");
        let spec_json = serde_json::to_string(&spec("old")).expect("json");
        // The spec as stored before arms existed: without the new keys.
        let spec_json = spec_json.replace(",\"arms\":[],\"arm_costs\":[]", "");
        assert!(!spec_json.contains("arms"), "{spec_json}");
        sqlx::query("INSERT INTO datasets VALUES (1, 'old', ?, 1)")
            .bind(&spec_json)
            .execute(&pool)
            .await
            .expect("dataset");
        for sql in [
            "INSERT INTO models VALUES (1, 1, 'm', '1', '', 2, 0)",
            "INSERT INTO units VALUES (1, 0, 'a', x'0000000000000000', 1, 0.25, 'c', 3, 4)",
            "INSERT INTO units VALUES (1, 1, 'b', x'000000000000F03F', 0, NULL, 'c', 3, 4)",
            "INSERT INTO predictions VALUES (1, 1, 0, 0.5, 5, 6, 0)",
            "INSERT INTO predictions VALUES (1, 1, 1, -0.5, 5, 6, 1)",
            "INSERT INTO snapshot_scores VALUES (1, 'm', 'dr_loss', 'cumulative', 7, 8, 0.25, \
             0.5, 1, 2)",
        ] {
            sqlx::query(sql).execute(&pool).await.expect(sql);
        }
        pool.close().await;
    }
    let s = store::open(&StoreConfig::sqlite(&db, Durability::Normal))
        .await
        .expect("open and migrate");
    let d = &s.datasets().await.expect("datasets")[0];
    assert_eq!(d.spec, spec("old"), "a spec from before reads as binary");
    assert!(d.spec.arms.is_empty());
    let units = collect(s.units(d.id, 0)).await;
    assert_eq!(
        units.iter().map(|u| u.treatment).collect::<Vec<_>>(),
        vec![1, 0]
    );
    assert_eq!(units[1].features, vec![1.0]);
    let mut read = collect(s.predictions(d.id, 0)).await;
    read.sort_by_key(|p| p.seq);
    assert_eq!(
        read.iter()
            .map(|p| (p.unit_seq, p.seq, p.arm, p.effect))
            .collect::<Vec<_>>(),
        vec![(0, 0, 1, 0.5), (1, 1, 1, -0.5)],
        "predictions stored before arms are the treatment's, arm 1"
    );
    let history = |arm: &'static str| HistoryQuery {
        dataset_id: d.id,
        model: "m",
        key: "dr_loss",
        window: "cumulative",
        arm,
        from_ms: 0,
        to_ms: i64::MAX,
    };
    let points = s.history(&history("")).await.expect("history");
    assert_eq!(
        points
            .iter()
            .map(|p| (p.snapshot_id, p.estimate, p.se, p.rank, p.units))
            .collect::<Vec<_>>(),
        vec![(7, 0.25, 0.5, 1, 2)],
        "history stored before contrasts reads as a binary dataset's, arm \"\""
    );
    assert!(s
        .history(&history("text"))
        .await
        .expect("history")
        .is_empty());
    s.close().await;
}

/// A rebuild reads every stored prediction of a dataset, at a thousand
/// models over a hundred million rows, so SQLite's read goes in chunks on a
/// connection of its own (`src/store/sqlite/bulk.rs`). Here: rows of three
/// models spanning several chunks (8,192 rows each) come back whole and
/// only the dataset's own, and a reader dropped after a few rows (its
/// thread then stops at its next chunk) neither errors nor holds up the
/// writes and the close that follow (a thread left blocked would hang
/// the suite here).
#[tokio::test]
async fn a_rebuild_reads_many_models_predictions_whole_and_can_stop_early() {
    for Backend { name, store: s, .. } in backends("bulk").await {
        let d = s.create_dataset(&spec("a"), 1).await.expect("create");
        let other = s.create_dataset(&spec("b"), 1).await.expect("create");
        let units: Vec<UnitRecord> = (0..7_000).map(|i| unit(i, &format!("k{i}"))).collect();
        s.insert_units(d.id, &units, 2).await.expect("units");
        s.insert_units(other.id, &units[..10], 2)
            .await
            .expect("other's units");
        let mut written = Vec::new();
        for (k, model) in ["m1", "m2", "m3"].into_iter().enumerate() {
            let m = s
                .register_model(d.id, model, "1", "", 3)
                .await
                .expect("model");
            let batch: Vec<PredictionRecord> = (0..7_000)
                .map(|u| PredictionRecord {
                    model_id: m.id,
                    unit_seq: u,
                    seq: k as i64 * 7_000 + u,
                    effect: (u as f64).sin() / (k + 1) as f64,
                    predicted_at_ms: 10 + u,
                    arm: 1,
                })
                .collect();
            s.insert_predictions(d.id, &batch, 4)
                .await
                .expect("predictions");
            written.extend(batch);
        }
        let o = s
            .register_model(other.id, "o", "1", "", 3)
            .await
            .expect("other's model");
        let stray = PredictionRecord {
            model_id: o.id,
            unit_seq: 0,
            seq: 0,
            effect: 9.0,
            predicted_at_ms: 1,
            arm: 1,
        };
        s.insert_predictions(other.id, std::slice::from_ref(&stray), 5)
            .await
            .expect("other's prediction");

        let mut read = collect(s.predictions(d.id, 0)).await;
        read.sort_by_key(|p| p.seq);
        assert_eq!(read.len(), 21_000, "{name}: every row, once");
        assert_eq!(read, written, "{name}: read back bit for bit");

        let mut stream = s.predictions(d.id, 0);
        for _ in 0..5 {
            stream
                .next()
                .await
                .expect("a row")
                .expect("read without error");
        }
        drop(stream);
        let next = PredictionRecord {
            seq: 1,
            unit_seq: 1,
            ..stray
        };
        s.insert_predictions(other.id, &[next], 6)
            .await
            .expect("the store takes writes after a reader stopped early");
        assert_eq!(
            collect(s.predictions(other.id, 0)).await.len(),
            2,
            "{name}: the other dataset's rows only"
        );
        s.close().await;
    }
}
