//! Hostile and malformed requests against a live server: each case asserts
//! its exact gRPC status code and that the message names the field (and the
//! row for row-level faults). Afterwards the server is still healthy and the
//! store holds exactly the rows that were acknowledged: a batch with one bad
//! row leaves nothing of itself behind. The integrity rules are those of the
//! README's "Integrity rules and guarantees"; the limits are src/limits.rs.

mod common;

use std::collections::BTreeSet;
use std::time::Duration;

use common::service::*;
use plumbline::api::pb;
use plumbline::api::status::receipt_of;
use plumbline::config::Config;
use plumbline::server::{start, Running};
use sqlx::sqlite::SqliteConnectOptions;
use sqlx::{ConnectOptions, Connection};
use tonic::transport::Channel;
use tonic::{Code, Status};

/// What every case answered, for the summary table.
#[derive(Default)]
struct Tally {
    rows: Vec<(String, Code)>,
}

impl Tally {
    /// The call failed with `code` and its message holds every needle.
    fn refused<T: std::fmt::Debug>(
        &mut self,
        label: &str,
        r: Result<T, Status>,
        code: Code,
        needles: &[&str],
    ) -> Status {
        let s = match r {
            Ok(v) => panic!("{label}: accepted ({v:?}), expected {code:?}"),
            Err(s) => s,
        };
        assert_eq!(s.code(), code, "{label}: {}", s.message());
        for n in needles {
            assert!(
                s.message().contains(n),
                "{label}: message lacks {n:?}: {}",
                s.message()
            );
        }
        self.rows.push((label.into(), code));
        s
    }

    fn accepted<T: std::fmt::Debug>(&mut self, label: &str, r: Result<T, Status>) -> T {
        let v = r.unwrap_or_else(|s| panic!("{label}: refused {:?}: {}", s.code(), s.message()));
        self.rows.push((label.into(), Code::Ok));
        v
    }
}

const DS: &str = "corpus";
const BIN: &str = "corpus-bin";
/// The name is accepted as a unit key and must come back byte for byte.
const SQL_KEY: &str = "'; DROP TABLE units; --";

fn unit(key: &str, x: &[f64]) -> pb::UnitRow {
    unit_row(key, x, 1.0, None, "c1")
}

fn outcome(key: &str, value: f64, at: i64) -> pb::OutcomeRow {
    pb::OutcomeRow {
        unit_key: key.into(),
        value,
        observed_at_ms: at,
    }
}

fn prediction(model: &str, key: &str, effect: f64, at: i64) -> pb::PredictionRow {
    pb::PredictionRow {
        model: model.into(),
        unit_key: key.into(),
        effect,
        predicted_at_ms: at,
        arm: String::new(),
    }
}

async fn units(c: &Clients, ds: &str, rows: Vec<pb::UnitRow>) -> Result<pb::IntakeReceipt, Status> {
    let batch = pb::UnitBatch {
        dataset: ds.into(),
        rows,
    };
    let mut intake = c.intake.clone();
    intake
        .send_units(tokio_stream::iter(vec![batch]))
        .await
        .map(|r| r.into_inner())
}

async fn outcomes(
    c: &Clients,
    ds: &str,
    rows: Vec<pb::OutcomeRow>,
) -> Result<pb::IntakeReceipt, Status> {
    let batch = pb::OutcomeBatch {
        dataset: ds.into(),
        rows,
    };
    let mut intake = c.intake.clone();
    intake
        .send_outcomes(tokio_stream::iter(vec![batch]))
        .await
        .map(|r| r.into_inner())
}

async fn predictions(
    c: &Clients,
    ds: &str,
    rows: Vec<pb::PredictionRow>,
) -> Result<pb::IntakeReceipt, Status> {
    let batch = pb::PredictionBatch {
        dataset: ds.into(),
        rows,
    };
    let mut intake = c.intake.clone();
    intake
        .send_predictions(tokio_stream::iter(vec![batch]))
        .await
        .map(|r| r.into_inner())
}

async fn create(c: &Clients, spec: pb::DatasetSpec) -> Result<pb::Dataset, Status> {
    let mut d = c.datasets.clone();
    d.create_dataset(pb::CreateDatasetRequest { spec: Some(spec) })
        .await
        .map(|r| r.into_inner())
}

async fn register_named(c: &Clients, ds: &str, name: &str) -> Result<pb::Model, Status> {
    let mut m = c.models.clone();
    m.register_model(pb::RegisterModelRequest {
        dataset: ds.into(),
        name: name.into(),
        version: "1".into(),
        description: String::new(),
    })
    .await
    .map(|r| r.into_inner())
}

/// A wire-compatible mirror of `UnitRow` whose key is raw bytes, to put
/// invalid UTF-8 where the contract says `string`.
#[derive(Clone, PartialEq, prost::Message)]
struct RawUnitRow {
    #[prost(bytes = "vec", tag = "1")]
    key: Vec<u8>,
    #[prost(double, repeated, tag = "2")]
    features: Vec<f64>,
    #[prost(uint32, tag = "3")]
    treatment: u32,
}

#[derive(Clone, PartialEq, prost::Message)]
struct RawUnitBatch {
    #[prost(string, tag = "1")]
    dataset: String,
    #[prost(message, repeated, tag = "2")]
    rows: Vec<RawUnitRow>,
}

async fn raw_units(channel: Channel, batch: RawUnitBatch) -> Result<pb::IntakeReceipt, Status> {
    let mut grpc = tonic::client::Grpc::new(channel);
    grpc.ready()
        .await
        .map_err(|e| Status::unavailable(e.to_string()))?;
    let path =
        tonic::codegen::http::uri::PathAndQuery::from_static("/plumbline.v1.Intake/SendUnits");
    let codec = tonic_prost::ProstCodec::<RawUnitBatch, pb::IntakeReceipt>::default();
    grpc.client_streaming(
        tonic::Request::new(tokio_stream::iter(vec![batch])),
        path,
        codec,
    )
    .await
    .map(|r| r.into_inner())
}

async fn channel(addr: std::net::SocketAddr) -> Channel {
    Channel::from_shared(format!("http://{addr}"))
        .expect("uri")
        .connect()
        .await
        .expect("connect")
}

/// Opens the server's SQLite file read-only, beside the running server.
async fn read_only(dir: &TempDir) -> sqlx::SqliteConnection {
    SqliteConnectOptions::new()
        .filename(dir.0.join(plumbline::config::DATABASE_FILE))
        .read_only(true)
        .connect()
        .await
        .expect("open read-only")
}

/// Every case of the corpus against one server; see the module comment.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn hostile_requests_get_exact_codes_and_the_store_holds_only_what_was_accepted() {
    let dir = TempDir::new("corpus");
    let srv = server(&dir).await;
    let c = clients(srv.grpc_addr).await;
    let mut t = Tally::default();
    let mut sent_keys: BTreeSet<String> = BTreeSet::new();
    let (mut n_outcomes, mut n_predictions) = (0u64, 0u64);

    // ---------------------------------------------------------- datasets
    create(&c, continuous_spec(DS, 2)).await.expect("create");
    let mut bin = continuous_spec(BIN, 2);
    bin.outcome_kind = pb::OutcomeKind::Binary as i32;
    create(&c, bin).await.expect("create binary");
    let spec = |f: &dyn Fn(&mut pb::DatasetSpec)| {
        let mut s = continuous_spec("spec-case", 2);
        f(&mut s);
        s
    };
    let bad_specs: Vec<(&str, pb::DatasetSpec, Code, &[&str])> = vec![
        (
            "spec: one fold",
            spec(&|s| s.folds = 1),
            Code::InvalidArgument,
            &["folds", "1"],
        ),
        (
            "spec: 21 folds",
            spec(&|s| s.folds = 21),
            Code::InvalidArgument,
            &["folds", "21"],
        ),
        (
            "spec: overlap eps 0.6",
            spec(&|s| {
                s.overlap = Some(pb::OverlapThresholds {
                    eps: 0.6,
                    ..Default::default()
                })
            }),
            Code::InvalidArgument,
            &["overlap.eps"],
        ),
        (
            "spec: overlap eps NaN",
            spec(&|s| {
                s.overlap = Some(pb::OverlapThresholds {
                    eps: f64::NAN,
                    ..Default::default()
                })
            }),
            Code::InvalidArgument,
            &["overlap.eps"],
        ),
        (
            "spec: max extreme share 1.5",
            spec(&|s| {
                s.overlap = Some(pb::OverlapThresholds {
                    max_extreme_share: 1.5,
                    ..Default::default()
                })
            }),
            Code::InvalidArgument,
            &["overlap.max_extreme_share"],
        ),
        (
            "spec: min coverage -0.1",
            spec(&|s| s.min_coverage = -0.1),
            Code::InvalidArgument,
            &["min_coverage"],
        ),
        (
            "spec: alpha 1",
            spec(&|s| s.alpha = 1.0),
            Code::InvalidArgument,
            &["alpha"],
        ),
        (
            "spec: treatment cost inf",
            spec(&|s| s.treatment_cost = f64::INFINITY),
            Code::InvalidArgument,
            &["treatment_cost"],
        ),
        (
            "spec: refit growth NaN",
            spec(&|s| {
                s.recompute = Some(pb::RecomputePolicy {
                    refit_growth: f64::NAN,
                    ..Default::default()
                })
            }),
            Code::InvalidArgument,
            &["refit_growth"],
        ),
        (
            "spec: duplicate feature names",
            spec(&|s| s.feature_names = vec!["a".into(), "a".into()]),
            Code::InvalidArgument,
            &["feature_names[1]", "duplicate"],
        ),
        (
            "spec: no features",
            spec(&|s| s.feature_names.clear()),
            Code::InvalidArgument,
            &["feature_names"],
        ),
        (
            "spec: 257 features",
            spec(&|s| s.feature_names = (0..257).map(|j| format!("f{j}")).collect()),
            Code::InvalidArgument,
            &["feature_names", "limits.max_features = 256", "257"],
        ),
        (
            "spec: empty name",
            spec(&|s| s.name.clear()),
            Code::InvalidArgument,
            &["name"],
        ),
        (
            "spec: SQL in the name",
            spec(&|s| s.name = SQL_KEY.into()),
            Code::InvalidArgument,
            &["name", "letters, digits"],
        ),
        (
            "spec: 100 kB name",
            spec(&|s| s.name = "n".repeat(100_000)),
            Code::InvalidArgument,
            &["name", "limits.max_name_bytes = 128", "100000 bytes"],
        ),
        (
            "spec: no outcome kind",
            spec(&|s| s.outcome_kind = 0),
            Code::InvalidArgument,
            &["outcome_kind"],
        ),
        (
            "spec: same name, other settings",
            {
                let mut s = continuous_spec(DS, 3);
                s.seed = 99;
                s
            },
            Code::AlreadyExists,
            &["corpus"],
        ),
    ];
    for (label, s, code, needles) in bad_specs {
        t.refused(label, create(&c, s).await, code, needles);
    }
    let zero_folds = t.accepted(
        "spec: zero folds means the default",
        create(
            &c,
            spec(&|s| {
                s.name = "zero-folds".into();
                s.folds = 0;
            }),
        )
        .await,
    );
    assert_eq!(zero_folds.spec.expect("spec").folds, 5);
    let mut datasets = c.datasets.clone();
    t.refused(
        "get: 100 kB dataset name",
        datasets
            .get_dataset(pb::GetDatasetRequest {
                name: "d".repeat(100_000),
            })
            .await,
        Code::InvalidArgument,
        &["name", "limits.max_name_bytes"],
    );
    t.refused(
        "get: unknown dataset",
        datasets
            .get_dataset(pb::GetDatasetRequest {
                name: "nowhere".into(),
            })
            .await,
        Code::NotFound,
        &["nowhere"],
    );

    // ------------------------------------------------------------ models
    t.accepted("model: register m1", register_named(&c, DS, "m1").await);
    t.accepted("model: register m2", register_named(&c, DS, "m2").await);
    let mut models = c.models.clone();
    t.accepted(
        "model: retire m2",
        models
            .retire_model(pb::RetireModelRequest {
                dataset: DS.into(),
                name: "m2".into(),
            })
            .await,
    );
    t.refused(
        "model: reserved baseline name",
        register_named(&c, DS, "zero-effect").await,
        Code::InvalidArgument,
        &["name", "reserved"],
    );
    t.refused(
        "model: SQL in the name",
        register_named(&c, DS, SQL_KEY).await,
        Code::InvalidArgument,
        &["name"],
    );
    t.refused(
        "model: 100 kB name",
        register_named(&c, DS, &"m".repeat(100_000)).await,
        Code::InvalidArgument,
        &["name", "limits.max_name_bytes"],
    );
    t.refused(
        "model: unknown dataset",
        register_named(&c, "nowhere", "m1").await,
        Code::NotFound,
        &["nowhere"],
    );
    t.refused(
        "model: retire unknown model",
        models
            .retire_model(pb::RetireModelRequest {
                dataset: DS.into(),
                name: "ghost".into(),
            })
            .await,
        Code::NotFound,
        &["ghost"],
    );

    // ------------------------------------------------------------- units
    let base: Vec<pb::UnitRow> = (0..10)
        .map(|i| {
            unit_row(
                &format!("k{i}"),
                &[i as f64, 1.0],
                (i % 2) as f64,
                None,
                "c1",
            )
        })
        .collect();
    let r = t.accepted("units: ten valid", units(&c, DS, base.clone()).await);
    assert_eq!((r.accepted, r.duplicate), (10, 0));
    sent_keys.extend(base.iter().map(|u| u.key.clone()));
    let r = t.accepted(
        "units: identical re-send",
        units(&c, DS, base.clone()).await,
    );
    assert_eq!(
        (r.accepted, r.duplicate),
        (0, 10),
        "a re-send is all duplicates"
    );

    // Each bad row sits at index 1 behind a valid new row, which must not
    // be stored either (the batch is one transaction).
    let mut fresh = 0;
    let mut behind = |bad: pb::UnitRow| {
        fresh += 1;
        vec![unit(&format!("fresh-{fresh}"), &[0.0, 0.0]), bad]
    };
    let unit_cases: Vec<(&str, pb::UnitRow, Code, &[&str])> = vec![
        (
            "units: NaN feature",
            unit("u", &[0.0, f64::NAN]),
            Code::InvalidArgument,
            &["features[1]", "NaN"],
        ),
        (
            "units: +inf feature",
            unit("u", &[f64::INFINITY, 0.0]),
            Code::InvalidArgument,
            &["features[0]", "inf"],
        ),
        (
            "units: -inf feature",
            unit("u", &[0.0, f64::NEG_INFINITY]),
            Code::InvalidArgument,
            &["features[1]"],
        ),
        (
            "units: three features for two",
            unit("u", &[0.0, 1.0, 2.0]),
            Code::InvalidArgument,
            &["features", "3 values for 2"],
        ),
        (
            "units: no features",
            unit("u", &[]),
            Code::InvalidArgument,
            &["features", "0 values"],
        ),
        (
            "units: treatment 2",
            unit_row("u", &[0.0, 0.0], 2.0, None, ""),
            Code::InvalidArgument,
            &["treatment", "2"],
        ),
        (
            "units: propensity 0",
            unit_row("u", &[0.0, 0.0], 1.0, Some(0.0), ""),
            Code::InvalidArgument,
            &["propensity"],
        ),
        (
            "units: propensity 1",
            unit_row("u", &[0.0, 0.0], 1.0, Some(1.0), ""),
            Code::InvalidArgument,
            &["propensity"],
        ),
        (
            "units: propensity 1.5",
            unit_row("u", &[0.0, 0.0], 1.0, Some(1.5), ""),
            Code::InvalidArgument,
            &["propensity", "1.5"],
        ),
        (
            "units: propensity -0.1",
            unit_row("u", &[0.0, 0.0], 1.0, Some(-0.1), ""),
            Code::InvalidArgument,
            &["propensity"],
        ),
        (
            "units: propensity NaN",
            unit_row("u", &[0.0, 0.0], 1.0, Some(f64::NAN), ""),
            Code::InvalidArgument,
            &["propensity", "NaN"],
        ),
        (
            "units: empty key",
            unit("", &[0.0, 0.0]),
            Code::InvalidArgument,
            &["key"],
        ),
        (
            "units: 257-byte key",
            unit(&"k".repeat(257), &[0.0, 0.0]),
            Code::InvalidArgument,
            &["key", "limits.max_key_bytes = 256", "257 bytes"],
        ),
        (
            "units: control character in key",
            unit("a\u{0}b", &[0.0, 0.0]),
            Code::InvalidArgument,
            &["key", "control"],
        ),
        (
            "units: 200-byte cohort",
            unit_row("u", &[0.0, 0.0], 1.0, None, &"c".repeat(200)),
            Code::InvalidArgument,
            &["cohort"],
        ),
        (
            "units: negative assignment time",
            pb::UnitRow {
                assigned_at_ms: -5,
                ..unit("u", &[0.0, 0.0])
            },
            Code::InvalidArgument,
            &["assigned_at_ms", "-5"],
        ),
        (
            "units: conflicts with a stored unit",
            unit("k3", &[99.0, 1.0]),
            Code::AlreadyExists,
            &["key", "k3"],
        ),
    ];
    for (label, bad, code, needles) in unit_cases {
        let s = t.refused(label, units(&c, DS, behind(bad)).await, code, needles);
        assert!(s.message().contains("row 1"), "{label}: {}", s.message());
        let receipt = receipt_of(&s).expect("receipt in the details");
        assert_eq!(
            (receipt.batches, receipt.rejections[0].row),
            (0, 1),
            "{label}"
        );
    }
    t.refused(
        "units: two rows, same key, other values",
        units(
            &c,
            DS,
            vec![unit("twin", &[1.0, 1.0]), unit("twin", &[1.0, 2.0])],
        )
        .await,
        Code::AlreadyExists,
        &["row 1", "key", "row 0"],
    );
    let r = t.accepted(
        "units: two identical rows in one batch",
        units(
            &c,
            DS,
            vec![unit("pair", &[1.0, 1.0]), unit("pair", &[1.0, 1.0])],
        )
        .await,
    );
    assert_eq!((r.accepted, r.duplicate), (1, 1));
    sent_keys.insert("pair".into());
    t.refused(
        "units: empty batch",
        units(&c, DS, vec![]).await,
        Code::InvalidArgument,
        &["rows", "empty"],
    );
    let big: Vec<pb::UnitRow> = (0..10_001)
        .map(|i| unit(&format!("big-{i}"), &[0.0, 0.0]))
        .collect();
    t.refused(
        "units: 10,001 rows",
        units(&c, DS, big).await,
        Code::InvalidArgument,
        &["rows", "limits.max_batch_rows = 10000", "10001 rows"],
    );
    t.refused(
        "units: unknown dataset",
        units(&c, "nowhere", vec![unit("u", &[0.0, 0.0])]).await,
        Code::NotFound,
        &["nowhere"],
    );
    t.refused(
        "units: 100 kB dataset name",
        units(&c, &"d".repeat(100_000), vec![unit("u", &[0.0, 0.0])]).await,
        Code::InvalidArgument,
        &["dataset", "limits.max_name_bytes"],
    );
    let mut intake = c.intake.clone();
    let two = vec![
        pb::UnitBatch {
            dataset: DS.into(),
            rows: vec![unit("switch-0", &[0.0, 0.0])],
        },
        pb::UnitBatch {
            dataset: BIN.into(),
            rows: vec![unit("switch-1", &[0.0, 0.0])],
        },
    ];
    t.refused(
        "units: stream switches dataset",
        intake.send_units(tokio_stream::iter(two)).await,
        Code::InvalidArgument,
        &["batch 1", "dataset"],
    );
    sent_keys.insert("switch-0".into()); // batch 0 committed before the refusal
    let r = t.accepted(
        "units: SQL text as a key",
        units(&c, DS, vec![unit(SQL_KEY, &[2.0, 3.0])]).await,
    );
    assert_eq!(r.accepted, 1);
    let odd = "ключ 🙂 \"quoted\" \\ %_*";
    t.accepted(
        "units: unicode and quotes in a key",
        units(&c, DS, vec![unit(odd, &[2.0, 3.0])]).await,
    );
    sent_keys.extend([SQL_KEY.to_string(), odd.to_string()]);
    let raw = RawUnitBatch {
        dataset: DS.into(),
        rows: vec![RawUnitRow {
            key: vec![0x6b, 0xff, 0xfe, 0x00],
            features: vec![0.0, 0.0],
            treatment: 1,
        }],
    };
    // Per the gRPC status code document, a request the server cannot parse
    // is INTERNAL; prost refuses invalid UTF-8 in a string field and names it.
    t.refused(
        "units: invalid UTF-8 in a key",
        raw_units(channel(srv.grpc_addr).await, raw).await,
        Code::Internal,
        &["UnitRow.key", "UTF-8"],
    );
    // Long keys that conflict: 100 reasons that each quote a 256-byte key
    // would overflow a client's 16 KiB header cap; the details are cut.
    let long: Vec<pb::UnitRow> = (0..120)
        .map(|i| unit(&format!("{i:03}{}", "é".repeat(126)), &[1.0, 1.0]))
        .collect();
    assert!(long.iter().all(|u| u.key.len() == 255));
    t.accepted(
        "units: 120 keys of 255 bytes",
        units(&c, DS, long.clone()).await,
    );
    sent_keys.extend(long.iter().map(|u| u.key.clone()));
    let changed: Vec<pb::UnitRow> = long.iter().map(|u| unit(&u.key, &[5.0, 5.0])).collect();
    let s = t.refused(
        "units: 120 conflicting long keys",
        units(&c, DS, changed).await,
        Code::AlreadyExists,
        &["row 0", "key"],
    );
    let receipt = receipt_of(&s).expect("details fit the header");
    assert!(
        !receipt.rejections.is_empty() && receipt.rejections.len() < 100,
        "{} reasons",
        receipt.rejections.len()
    );

    // ---------------------------------------------------------- outcomes
    let r = t.accepted(
        "outcomes: two valid",
        outcomes(
            &c,
            DS,
            vec![outcome("k0", 1.5, 0), outcome("k1", 2.0, 5_000)],
        )
        .await,
    );
    n_outcomes += r.accepted;
    let r = t.accepted(
        "outcomes: identical re-send",
        outcomes(
            &c,
            DS,
            vec![outcome("k0", 1.5, 0), outcome("k1", 2.0, 5_000)],
        )
        .await,
    );
    assert_eq!((r.accepted, r.duplicate), (0, 2));
    // A stamped prediction for k2 made at 7,000 ms.
    let r = t.accepted(
        "predictions: stamped, before any outcome",
        predictions(&c, DS, vec![prediction("m1", "k2", 0.1, 7_000)]).await,
    );
    n_predictions += r.accepted;
    let outcome_cases: Vec<(&str, &str, pb::OutcomeRow, Code, &[&str])> = vec![
        (
            "outcomes: NaN",
            DS,
            outcome("k3", f64::NAN, 0),
            Code::InvalidArgument,
            &["value", "NaN"],
        ),
        (
            "outcomes: +inf",
            DS,
            outcome("k3", f64::INFINITY, 0),
            Code::InvalidArgument,
            &["value", "inf"],
        ),
        (
            "outcomes: 0.5 on a binary dataset",
            BIN,
            outcome("b1", 0.5, 0),
            Code::InvalidArgument,
            &["value", "binary"],
        ),
        (
            "outcomes: unknown unit",
            DS,
            outcome("nobody", 1.0, 0),
            Code::NotFound,
            &["unit_key", "nobody"],
        ),
        (
            "outcomes: conflicts with a stored outcome",
            DS,
            outcome("k0", 9.0, 0),
            Code::AlreadyExists,
            &["value", "k0"],
        ),
        (
            "outcomes: negative observation time",
            DS,
            outcome("k3", 1.0, -1),
            Code::InvalidArgument,
            &["observed_at_ms"],
        ),
        (
            "outcomes: observed before a stored prediction's stamp",
            DS,
            outcome("k2", 1.0, 6_000),
            Code::FailedPrecondition,
            &["observed_at_ms", "m1"],
        ),
        (
            "outcomes: 257-byte unit key",
            DS,
            outcome(&"k".repeat(257), 1.0, 0),
            Code::InvalidArgument,
            &["unit_key", "limits.max_key_bytes"],
        ),
    ];
    t.accepted(
        "units: two on the binary dataset",
        units(
            &c,
            BIN,
            vec![unit("b0", &[0.0, 0.0]), unit("b1", &[1.0, 0.0])],
        )
        .await,
    );
    for (label, ds, bad, code, needles) in outcome_cases {
        // k9 (or b0) never gets an outcome: it is the valid row in front.
        let front = if ds == BIN { "b0" } else { "k9" };
        let s = t.refused(
            label,
            outcomes(&c, ds, vec![outcome(front, 1.0, 0), bad]).await,
            code,
            needles,
        );
        assert!(s.message().contains("row 1"), "{label}: {}", s.message());
    }
    t.refused(
        "outcomes: two for one unit in a batch",
        outcomes(&c, DS, vec![outcome("k4", 1.0, 0), outcome("k4", 2.0, 0)]).await,
        Code::AlreadyExists,
        &["row 1", "value", "row 0"],
    );

    // ------------------------------------------------------- predictions
    let prediction_cases: Vec<(&str, pb::PredictionRow, Code, &[&str])> = vec![
        (
            "predictions: NaN effect",
            prediction("m1", "k3", f64::NAN, 0),
            Code::InvalidArgument,
            &["effect", "NaN"],
        ),
        (
            "predictions: -inf effect",
            prediction("m1", "k3", f64::NEG_INFINITY, 0),
            Code::InvalidArgument,
            &["effect"],
        ),
        (
            "predictions: unknown model",
            prediction("ghost", "k3", 0.1, 0),
            Code::NotFound,
            &["model", "ghost"],
        ),
        (
            "predictions: retired model",
            prediction("m2", "k3", 0.1, 0),
            Code::FailedPrecondition,
            &["model", "retired"],
        ),
        (
            "predictions: SQL in the model name",
            prediction(SQL_KEY, "k3", 0.1, 0),
            Code::InvalidArgument,
            &["model"],
        ),
        (
            "predictions: unknown unit",
            prediction("m1", "nobody", 0.1, 0),
            Code::NotFound,
            &["unit_key", "nobody"],
        ),
        (
            "predictions: after the outcome, unstamped",
            prediction("m1", "k0", 0.1, 0),
            Code::FailedPrecondition,
            &["unit_key", "already known"],
        ),
        (
            "predictions: stamped after the outcome",
            prediction("m1", "k1", 0.1, 6_000),
            Code::FailedPrecondition,
            &["unit_key", "stamped after"],
        ),
        (
            "predictions: stamped, outcome unstamped",
            prediction("m1", "k0", 0.1, 100),
            Code::FailedPrecondition,
            &["unit_key"],
        ),
        (
            "predictions: conflicts with a stored prediction",
            prediction("m1", "k2", 0.2, 7_000),
            Code::AlreadyExists,
            &["effect", "k2"],
        ),
        (
            "predictions: negative prediction time",
            prediction("m1", "k3", 0.1, -7),
            Code::InvalidArgument,
            &["predicted_at_ms"],
        ),
    ];
    for (label, bad, code, needles) in prediction_cases {
        // Nothing is ever stored for (m1, k8): it is the valid row in front.
        let s = t.refused(
            label,
            predictions(&c, DS, vec![prediction("m1", "k8", 0.5, 0), bad]).await,
            code,
            needles,
        );
        assert!(s.message().contains("row 1"), "{label}: {}", s.message());
    }
    let r = t.accepted(
        "predictions: backfill stamped before the outcome",
        predictions(&c, DS, vec![prediction("m1", "k1", 0.3, 4_000)]).await,
    );
    n_predictions += r.accepted;
    let r = t.accepted(
        "predictions: identical re-send",
        predictions(&c, DS, vec![prediction("m1", "k2", 0.1, 7_000)]).await,
    );
    assert_eq!((r.accepted, r.duplicate), (0, 1));

    // ------------------------------------------------- after the corpus
    let mut health =
        tonic_health::pb::health_client::HealthClient::new(channel(srv.grpc_addr).await);
    let status = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .expect("health")
        .into_inner()
        .status;
    assert_eq!(
        status,
        tonic_health::pb::health_check_response::ServingStatus::Serving as i32
    );
    let info = datasets
        .get_dataset(pb::GetDatasetRequest { name: DS.into() })
        .await
        .expect("get")
        .into_inner();
    let expected = (sent_keys.len() as u64, n_outcomes, n_predictions);
    assert_eq!((info.units, info.outcomes, info.predictions), expected);
    let mut db = read_only(&dir).await;
    let id = srv.monitor.dataset_id(DS).expect("id");
    let keys: Vec<String> = sqlx::query_scalar("SELECT key FROM units WHERE dataset_id = ?")
        .bind(id)
        .fetch_all(&mut db)
        .await
        .expect("keys");
    let stored: BTreeSet<String> = keys.into_iter().collect();
    assert_eq!(
        stored, sent_keys,
        "stored keys are exactly the accepted ones, byte for byte"
    );
    let (o, p): (i64, i64) = sqlx::query_as(
        "SELECT (SELECT COUNT(*) FROM outcomes WHERE dataset_id = ?1), \
                (SELECT COUNT(*) FROM predictions WHERE dataset_id = ?1)",
    )
    .bind(id)
    .fetch_one(&mut db)
    .await
    .expect("counts");
    assert_eq!((o as u64, p as u64), (n_outcomes, n_predictions));
    let tables: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM sqlite_master WHERE name = 'units'")
        .fetch_one(&mut db)
        .await
        .expect("schema");
    assert_eq!(tables, 1, "the units table survived");
    db.close().await.expect("close");

    println!("\n{} cases:", t.rows.len());
    for (label, code) in &t.rows {
        println!("| {label} | {code:?} |");
    }
    assert!(t.rows.len() >= 40, "{} cases", t.rows.len());
    srv.stop().await.expect("stop");
}

/// A server whose limits differ from the defaults.
async fn limited(dir: &TempDir, f: impl Fn(&mut Config)) -> Running {
    let mut config = config(dir);
    f(&mut config);
    start(&config).await.expect("server starts")
}

/// The count, size and idle limits answer with their codes and name the
/// limit and its value.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn configured_limits_are_enforced_and_named() {
    let dir = TempDir::new("limits");
    let srv = limited(&dir, |c| {
        c.limits.max_datasets = 2;
        c.limits.max_models_per_dataset = 2;
        c.limits.max_request_bytes = 64 * 1024;
        c.limits.max_batch_rows = 50;
        c.limits.max_key_bytes = 8;
        c.limits.stream_idle_seconds = 1;
    })
    .await;
    let c = clients(srv.grpc_addr).await;
    create(&c, continuous_spec("a", 1)).await.expect("a");
    create(&c, continuous_spec("b", 1)).await.expect("b");
    let s = create(&c, continuous_spec("c", 1))
        .await
        .expect_err("third");
    assert_eq!(s.code(), Code::ResourceExhausted, "{}", s.message());
    assert!(
        s.message().contains("limits.max_datasets = 2"),
        "{}",
        s.message()
    );
    create(&c, continuous_spec("a", 1))
        .await
        .expect("an existing dataset is not a new one");

    register_named(&c, "a", "m1").await.expect("m1");
    register_named(&c, "a", "m2").await.expect("m2");
    let s = register_named(&c, "a", "m3")
        .await
        .expect_err("third model");
    assert_eq!(s.code(), Code::ResourceExhausted);
    assert!(
        s.message().contains("limits.max_models_per_dataset = 2"),
        "{}",
        s.message()
    );
    register_named(&c, "a", "m2")
        .await
        .expect("re-registering is not a new model");

    let rows: Vec<pb::UnitRow> = (0..51).map(|i| unit(&format!("u{i}"), &[0.0])).collect();
    let s = units(&c, "a", rows).await.expect_err("51 rows");
    assert_eq!(s.code(), Code::InvalidArgument);
    assert!(
        s.message().contains("limits.max_batch_rows = 50"),
        "{}",
        s.message()
    );
    let s = units(&c, "a", vec![unit("u1", &[0.0]), unit("ninebytes", &[0.0])])
        .await
        .expect_err("long key");
    assert_eq!(s.code(), Code::InvalidArgument);
    assert!(
        s.message().contains("row 1") && s.message().contains("limits.max_key_bytes = 8"),
        "{}",
        s.message()
    );

    // 9,000 features of 8 bytes: above the 64 KiB request limit.
    let s = units(&c, "a", vec![unit("wide", &[0.5; 9_000])])
        .await
        .expect_err("large message");
    assert_eq!(s.code(), Code::ResourceExhausted, "{}", s.message());
    assert!(
        s.message().contains("limits.max_request_bytes = 65536"),
        "{}",
        s.message()
    );

    // A reply above max_response_bytes: tonic refuses to encode it and
    // answers OUT_OF_RANGE, naming the limit.
    let dir2 = TempDir::new("limits-out");
    let srv2 = limited(&dir2, |c| c.limits.max_response_bytes = 1024).await;
    let c2 = clients(srv2.grpc_addr).await;
    let mut wide = continuous_spec("wide", 1);
    wide.feature_names = (0..60)
        .map(|j| format!("feature-{j:02}-{}", "y".repeat(20)))
        .collect();
    let s = create(&c2, wide).await.expect_err("reply above 1 KiB");
    assert_eq!(s.code(), Code::OutOfRange, "{}", s.message());
    assert!(
        s.message().contains("the limit is: 1024 bytes"),
        "{}",
        s.message()
    );
    srv2.stop().await.expect("stop");

    // A stream that goes quiet for longer than stream_idle_seconds is ended,
    // and the batch it sent before stays committed.
    let (tx, rx) = tokio::sync::mpsc::channel(1);
    tx.send(pb::UnitBatch {
        dataset: "a".into(),
        rows: vec![unit("idle-0", &[1.0])],
    })
    .await
    .expect("send");
    let mut intake = c.intake.clone();
    let s = intake
        .send_units(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .expect_err("idle stream ends");
    assert_eq!(s.code(), Code::DeadlineExceeded, "{}", s.message());
    assert!(
        s.message().contains("limits.stream_idle_seconds = 1"),
        "{}",
        s.message()
    );
    assert_eq!(receipt_of(&s).expect("receipt").batches, 1);
    drop(tx);
    let info = c
        .datasets
        .clone()
        .get_dataset(pb::GetDatasetRequest { name: "a".into() })
        .await
        .expect("get")
        .into_inner();
    assert_eq!(info.units, 1);
    srv.stop().await.expect("stop");
}

/// One client opens an intake stream, sends a batch and stalls; another
/// client's batches on the same dataset are acknowledged meanwhile, so a
/// stalled stream holds no lock. Then a deadline (`grpc-timeout`) ends a
/// call, and HTTP/2 streams beyond `max_concurrent_streams` wait their turn.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn stalled_streams_hold_no_lock_and_deadlines_and_stream_caps_hold() {
    let dir = TempDir::new("stall");
    let srv = limited(&dir, |c| c.limits.max_concurrent_streams = 2).await;
    let c = clients(srv.grpc_addr).await;
    create(&c, continuous_spec("s", 1)).await.expect("create");

    let (tx, rx) = tokio::sync::mpsc::channel(1);
    tx.send(pb::UnitBatch {
        dataset: "s".into(),
        rows: vec![unit("stalled-0", &[1.0])],
    })
    .await
    .expect("send");
    let mut stalled_client = clients(srv.grpc_addr).await.intake;
    let stalled = tokio::spawn(async move {
        stalled_client
            .send_units(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await
    });
    // Wait until the stalled stream's first batch is committed.
    let mut datasets = c.datasets.clone();
    for _ in 0..200 {
        let n = datasets
            .get_dataset(pb::GetDatasetRequest { name: "s".into() })
            .await
            .expect("get")
            .into_inner()
            .units;
        if n == 1 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    // The other client's batches: each call carries a 10 s deadline, far
    // beyond a batch's commit; failing it would mean the lock is held.
    for b in 0..5 {
        let mut req = tonic::Request::new(tokio_stream::iter(vec![pb::UnitBatch {
            dataset: "s".into(),
            rows: (0..100)
                .map(|i| unit(&format!("other-{b}-{i}"), &[i as f64]))
                .collect(),
        }]));
        req.set_timeout(Duration::from_secs(10));
        let r = c
            .intake
            .clone()
            .send_units(req)
            .await
            .expect("acknowledged while the other stalls");
        assert_eq!(r.into_inner().accepted, 100);
    }
    assert!(!stalled.is_finished(), "the stalled stream is still open");
    tx.send(pb::UnitBatch {
        dataset: "s".into(),
        rows: vec![unit("stalled-1", &[1.0])],
    })
    .await
    .expect("send");
    drop(tx);
    let r = stalled
        .await
        .expect("join")
        .expect("stalled stream completes")
        .into_inner();
    assert_eq!((r.batches, r.accepted), (2, 2));

    // A deadline: the call never completes (its stream never ends) and the
    // server ends it when grpc-timeout expires; tonic answers CANCELLED.
    let (tx, rx) = tokio::sync::mpsc::channel::<pb::UnitBatch>(1);
    let mut req = tonic::Request::new(tokio_stream::wrappers::ReceiverStream::new(rx));
    req.set_timeout(Duration::from_millis(300));
    let s = c
        .intake
        .clone()
        .send_units(req)
        .await
        .expect_err("deadline");
    assert_eq!(s.code(), Code::Cancelled, "{}", s.message());
    assert!(s.message().contains("Timeout expired"), "{}", s.message());
    drop(tx);

    // Two streams fill the connection's cap; a third call on the same
    // connection waits until one of them ends.
    let one = clients(srv.grpc_addr).await.intake;
    let mut held = Vec::new();
    for k in 0..2 {
        let (tx, rx) = tokio::sync::mpsc::channel(1);
        tx.send(pb::UnitBatch {
            dataset: "s".into(),
            rows: vec![unit(&format!("held-{k}"), &[1.0])],
        })
        .await
        .expect("send");
        let mut client = one.clone();
        let task = tokio::spawn(async move {
            client
                .send_units(tokio_stream::wrappers::ReceiverStream::new(rx))
                .await
        });
        held.push((tx, task));
    }
    tokio::time::sleep(Duration::from_millis(300)).await;
    let mut third_client = one.clone();
    let third = tokio::spawn(async move {
        third_client
            .send_units(tokio_stream::iter(vec![pb::UnitBatch {
                dataset: "s".into(),
                rows: vec![unit("third", &[1.0])],
            }]))
            .await
    });
    tokio::time::sleep(Duration::from_millis(500)).await;
    assert!(!third.is_finished(), "a third stream waits for a free slot");
    let (tx, task) = held.remove(0);
    drop(tx);
    task.await.expect("join").expect("first held stream");
    let r = tokio::time::timeout(Duration::from_secs(10), third)
        .await
        .expect("the third call runs once a slot frees")
        .expect("join")
        .expect("third");
    assert_eq!(r.into_inner().accepted, 1);
    for (tx, task) in held {
        drop(tx);
        task.await.expect("join").expect("held stream");
    }
    srv.stop().await.expect("stop");
}

/// A call cut off by its deadline while its batch is being written must not
/// leave the batch on disk but missing from the server's memory (which
/// would refuse every later batch of the dataset). Deadlines from 1 ms up
/// land before, during and after the commit; after each, the same batch is
/// re-sent without a deadline and must be wholly new or wholly duplicate,
/// and the API's counts must equal the SQLite file's.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cancelled_calls_never_split_the_store_from_memory() {
    let dir = TempDir::new("cancel");
    let srv = limited(&dir, |c| c.durability = plumbline::store::Durability::Full).await;
    let c = clients(srv.grpc_addr).await;
    create(&c, continuous_spec("k", 2)).await.expect("create");
    let id = srv.monitor.dataset_id("k").expect("id");
    let mut cut_off = 0;
    for round in 0..30u64 {
        let rows: Vec<pb::UnitRow> = (0..2_000)
            .map(|i| unit(&format!("r{round}-{i}"), &[i as f64, 1.0]))
            .collect();
        let mut req = tonic::Request::new(tokio_stream::iter(vec![pb::UnitBatch {
            dataset: "k".into(),
            rows: rows.clone(),
        }]));
        req.set_timeout(Duration::from_millis(1 + round));
        if c.intake.clone().send_units(req).await.is_err() {
            cut_off += 1;
        }
        let r = units(&c, "k", rows).await.expect("the re-send is accepted");
        assert!(
            (r.accepted, r.duplicate) == (2_000, 0) || (r.accepted, r.duplicate) == (0, 2_000),
            "round {round}: {} new, {} duplicate",
            r.accepted,
            r.duplicate
        );
        let info = c
            .datasets
            .clone()
            .get_dataset(pb::GetDatasetRequest { name: "k".into() })
            .await
            .expect("get")
            .into_inner();
        let (stored, _, _) = srv.monitor.store().counts(id).await.expect("counts");
        assert_eq!(info.units, stored as u64, "round {round}");
        assert_eq!(info.units, 2_000 * (round + 1));
    }
    assert!(cut_off > 0, "no call was cut off by its deadline");
    srv.stop().await.expect("stop");
}

/// Unit keys are unique by intake's check (the store keeps no key index):
/// a store that holds a key twice was written by something else, and the
/// server refuses to start on it rather than serve two units as one.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_store_holding_a_unit_key_twice_is_refused_at_start() {
    let dir = TempDir::new("key-twice");
    let srv = server(&dir).await;
    let mut c = clients(srv.grpc_addr).await;
    c.datasets
        .create_dataset(pb::CreateDatasetRequest {
            spec: Some(continuous_spec("twice", 2)),
        })
        .await
        .expect("create");
    let rows = vec![
        unit_row("a", &[0.1, 0.2], 1.0, None, "c1"),
        unit_row("b", &[0.3, 0.4], 0.0, None, "c1"),
    ];
    assert_eq!(send_units(&mut c, "twice", rows).await.accepted, 2);
    srv.stop().await.expect("stop");

    let mut db = SqliteConnectOptions::new()
        .filename(dir.0.join(plumbline::config::DATABASE_FILE))
        .connect()
        .await
        .expect("open");
    sqlx::query(
        "INSERT INTO units SELECT dataset_id, 2, key, features, treatment, propensity, \
         cohort, assigned_at_ms, received_at_ms FROM units WHERE seq = 0",
    )
    .execute(&mut db)
    .await
    .expect("write a second unit with key a");
    db.close().await.expect("close");

    let refused = start(&config(&dir)).await.err().expect("refused");
    assert!(
        refused
            .to_string()
            .contains(r#"unit key "a" is stored twice (units 0 and 2)"#),
        "{refused}"
    );
}
