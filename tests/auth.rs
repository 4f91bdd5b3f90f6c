//! Tokens, scopes and TLS against a live server: each refusal has its exact
//! status code, tokens never reach the logs, a revoked token stops working
//! without a restart, and TLS (with and without client certificates) uses
//! certificates generated here.

mod common;

use std::time::Duration;

use common::service::{config, continuous_spec, http_get, serve_binary, TempDir};
use plumbline::api::pb;
use plumbline::auth::{issue, Scope};
use plumbline::config::{Config, TlsConfig, DATABASE_FILE};
use plumbline::store::{self, Durability, Store, StoreConfig};
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};
use tonic::{Code, Request};

fn with_token<T>(token: Option<&str>, message: T) -> Request<T> {
    let mut r = Request::new(message);
    if let Some(t) = token {
        r.metadata_mut().insert(
            "authorization",
            format!("Bearer {t}").parse().expect("ascii"),
        );
    }
    r
}

/// The store as the token command opens it: beside a running server,
/// without a claim on the directory.
async fn tokens_only(dir: &TempDir) -> Result<Store, store::StoreError> {
    store::open(&StoreConfig {
        claim: false,
        ..StoreConfig::sqlite(dir.0.join(DATABASE_FILE), Durability::Full)
    })
    .await
}

async fn create_token(dir: &TempDir, scopes: &[&str]) -> (String, String) {
    let store = tokens_only(dir).await.expect("store");
    let scopes: Vec<Scope> = scopes
        .iter()
        .map(|s| Scope::parse(s).expect("scope"))
        .collect();
    let issued = issue(&scopes, "test", 1).expect("issue");
    store.insert_token(&issued.record).await.expect("insert");
    store.close().await;
    (issued.record.id, issued.token)
}

fn units(n: usize) -> Vec<pb::UnitRow> {
    (0..n)
        .map(|i| {
            let x = [(i % 7) as f64 / 7.0, (i % 11) as f64 / 11.0];
            pb::UnitRow {
                key: format!("u{i}"),
                features: x.to_vec(),
                treatment: (i % 2) as u32,
                propensity: Some(0.5),
                cohort: "c0".into(),
                assigned_at_ms: 0,
                arm: String::new(),
            }
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn scopes_decide_every_rpc_and_revocation_needs_no_restart() {
    let dir = TempDir::new("auth");
    let (_, admin) = create_token(&dir, &["admin"]).await;
    let (writer_id, writer) = create_token(&dir, &["write:a"]).await;
    let (_, reader) = create_token(&dir, &["read:a"]).await;
    let (_, everything) = create_token(&dir, &["read:*"]).await;
    let cfg = Config {
        require_token: Some(true),
        metrics_require_token: true,
        ..config(&dir)
    };
    let srv = plumbline::server::start(&cfg).await.expect("start");
    let channel = Channel::from_shared(format!("http://{}", srv.grpc_addr))
        .expect("uri")
        .connect()
        .await
        .expect("connect");
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(channel.clone());
    let mut models = pb::model_registry_client::ModelRegistryClient::new(channel.clone());
    let mut intake = pb::intake_client::IntakeClient::new(channel.clone());
    let mut scoring = pb::scoring_client::ScoringClient::new(channel.clone());
    let mut events = pb::event_feed_client::EventFeedClient::new(channel.clone());
    let create = |name: &str| pb::CreateDatasetRequest {
        spec: Some(continuous_spec(name, 2)),
    };

    // Missing, malformed and unknown tokens: UNAUTHENTICATED, naming the header.
    for token in [None, Some("not-a-token"), Some(&admin[..admin.len() - 1])] {
        let e = datasets
            .create_dataset(with_token(token, create("a")))
            .await
            .expect_err("refused");
        assert_eq!(e.code(), Code::Unauthenticated, "{token:?}: {e:?}");
        assert!(e.message().starts_with("authorization"), "{}", e.message());
    }
    // The admin creates; a dataset writer may not.
    for name in ["a", "b"] {
        datasets
            .create_dataset(with_token(Some(&admin), create(name)))
            .await
            .expect("admin creates");
    }
    let e = datasets
        .create_dataset(with_token(Some(&writer), create("c")))
        .await
        .expect_err("writer cannot create");
    assert_eq!(e.code(), Code::PermissionDenied);
    assert!(e.message().contains("admin"), "{}", e.message());

    // Models: write on its own dataset only.
    let register = |dataset: &str| pb::RegisterModelRequest {
        dataset: dataset.into(),
        name: "m1".into(),
        version: "1".into(),
        description: String::new(),
    };
    models
        .register_model(with_token(Some(&writer), register("a")))
        .await
        .expect("writer registers on a");
    for (token, dataset) in [(&writer, "b"), (&reader, "a")] {
        let e = models
            .register_model(with_token(Some(token), register(dataset)))
            .await
            .expect_err("no write scope");
        assert_eq!(e.code(), Code::PermissionDenied, "{dataset}");
        assert!(
            e.message().contains(&format!("write:{dataset}")),
            "{}",
            e.message()
        );
    }

    // Intake: the stream's dataset decides.
    let batch = |dataset: &str| {
        tokio_stream::iter(vec![pb::UnitBatch {
            dataset: dataset.into(),
            rows: units(400),
        }])
    };
    let receipt = intake
        .send_units(with_token(Some(&writer), batch("a")))
        .await
        .expect("writer sends to a")
        .into_inner();
    assert_eq!(receipt.accepted, 400);
    for (token, dataset) in [(&writer, "b"), (&reader, "a"), (&everything, "a")] {
        let e = intake
            .send_units(with_token(Some(token), batch(dataset)))
            .await
            .expect_err("no write scope");
        assert_eq!(e.code(), Code::PermissionDenied, "{dataset}");
    }
    let outcomes = tokio_stream::iter(vec![pb::OutcomeBatch {
        dataset: "a".into(),
        rows: (0..400)
            .map(|i| pb::OutcomeRow {
                unit_key: format!("u{i}"),
                value: (i % 5) as f64 + 0.5 * (i % 2) as f64,
                observed_at_ms: 0,
            })
            .collect(),
    }]);
    intake
        .send_outcomes(with_token(Some(&writer), outcomes))
        .await
        .expect("outcomes");
    scoring
        .recompute(with_token(
            Some(&writer),
            pb::RecomputeRequest {
                dataset: "a".into(),
                refit: true,
                ..Default::default()
            },
        ))
        .await
        .expect("writer recomputes");
    let e = scoring
        .recompute(with_token(
            Some(&reader),
            pb::RecomputeRequest {
                dataset: "a".into(),
                refit: false,
                ..Default::default()
            },
        ))
        .await
        .expect_err("reader cannot recompute");
    assert_eq!(e.code(), Code::PermissionDenied);

    // Reads: own dataset yes, another no; write includes read.
    let board = |dataset: &str| pb::GetScoreboardRequest {
        dataset: dataset.into(),
        window: None,
    };
    for token in [&reader, &writer, &everything, &admin] {
        scoring
            .get_scoreboard(with_token(Some(token), board("a")))
            .await
            .expect("readable");
    }
    let e = scoring
        .get_scoreboard(with_token(Some(&reader), board("b")))
        .await
        .expect_err("other dataset");
    assert_eq!(e.code(), Code::PermissionDenied);
    assert!(e.message().contains("read:b"), "{}", e.message());

    // Listing shows only readable datasets.
    let names = |token: &str| {
        let mut d = datasets.clone();
        let token = token.to_string();
        async move {
            d.list_datasets(with_token(Some(&token), pb::ListDatasetsRequest {}))
                .await
                .expect("list")
                .into_inner()
                .datasets
                .into_iter()
                .filter_map(|d| d.spec.map(|s| s.name))
                .collect::<Vec<_>>()
        }
    };
    assert_eq!(names(&reader).await, vec!["a".to_string()]);
    assert_eq!(names(&admin).await, vec!["a".to_string(), "b".to_string()]);

    // Events: naming the dataset works; "every dataset" needs read:*.
    let list = |dataset: &str| pb::ListEventsRequest {
        dataset: dataset.into(),
        after_id: 0,
        limit: 10,
    };
    events
        .list_events(with_token(Some(&reader), list("a")))
        .await
        .expect("own events");
    let e = events
        .list_events(with_token(Some(&reader), list("")))
        .await
        .expect_err("all datasets");
    assert_eq!(e.code(), Code::PermissionDenied);
    assert!(e.message().starts_with("dataset"), "{}", e.message());
    events
        .list_events(with_token(Some(&everything), list("")))
        .await
        .expect("read:* sees all");

    // Health stays open for probes.
    let mut health = tonic_health::pb::health_client::HealthClient::new(channel.clone());
    let h = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .expect("health without a token")
        .into_inner();
    assert_eq!(h.status, 1, "SERVING");

    // /metrics: 401 without, 403 with a one-dataset token, 200 with read:*.
    let metrics = |token: Option<&str>| {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(srv.metrics_addr).expect("connect");
        let auth = token
            .map(|t| format!("Authorization: Bearer {t}\r\n"))
            .unwrap_or_default();
        write!(
            s,
            "GET /metrics HTTP/1.1\r\nHost: x\r\n{auth}Connection: close\r\n\r\n"
        )
        .expect("write");
        let mut raw = String::new();
        s.read_to_string(&mut raw).expect("read");
        raw.split_whitespace()
            .nth(1)
            .and_then(|c| c.parse::<u16>().ok())
            .unwrap_or(0)
    };
    assert_eq!(metrics(None), 401);
    assert_eq!(metrics(Some(&reader)), 403);
    assert_eq!(metrics(Some(&everything)), 200);
    assert_eq!(http_get(srv.metrics_addr, "/healthz").0, 200, "probe open");

    // Revoking and creating while the server runs take effect within the
    // refresh period (1 s); allow 5 s for a loaded machine.
    let store = tokens_only(&dir).await.expect("store");
    assert!(store.revoke_token(&writer_id, 2).await.expect("revoke"));
    store.close().await;
    let (_, late) = create_token(&dir, &["read:a"]).await;
    let mut revoked = false;
    let mut admitted = false;
    for _ in 0..50 {
        tokio::time::sleep(Duration::from_millis(100)).await;
        let w = scoring
            .get_scoreboard(with_token(Some(&writer), board("a")))
            .await;
        revoked = matches!(&w, Err(e) if e.code() == Code::Unauthenticated);
        admitted = scoring
            .get_scoreboard(with_token(Some(&late), board("a")))
            .await
            .is_ok();
        if revoked && admitted {
            break;
        }
    }
    assert!(revoked, "a revoked token is refused without a restart");
    assert!(admitted, "a new token works without a restart");
    srv.stop().await.expect("stop");
}

/// The token commands and the serve binary: the secret is printed once by
/// `token create`, and never appears in the server's logs, even at debug
/// level and even for a refused near-miss.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn token_commands_and_no_token_in_logs() {
    let dir = TempDir::new("auth-cli");
    let bin = env!("CARGO_BIN_EXE_plumbline");
    // Create the database first, as a server's first start would.
    tokens_only(&dir).await.expect("store").close().await;
    let out = std::process::Command::new(bin)
        .args(["token", "create", "--scope", "admin", "--label", "ops"])
        .arg("--data-dir")
        .arg(&dir.0)
        .output()
        .expect("token create");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let token = String::from_utf8(out.stdout)
        .expect("utf8")
        .trim()
        .to_string();
    assert!(token.starts_with("plb_") && token.len() == 81, "{token}");
    let id = token[4..16].to_string();
    let bad_scope = std::process::Command::new(bin)
        .args(["token", "create", "--scope", "root"])
        .arg("--data-dir")
        .arg(&dir.0)
        .output()
        .expect("run");
    assert_eq!(bad_scope.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&bad_scope.stderr).contains("--scope"));

    let server = serve_binary(&dir, &["--require-token"], "debug", true);
    let grpc = server.grpc;
    let channel = server.channel().await;
    let mut datasets = pb::dataset_registry_client::DatasetRegistryClient::new(channel);
    datasets
        .create_dataset(with_token(
            Some(&token),
            pb::CreateDatasetRequest {
                spec: Some(continuous_spec("logged", 2)),
            },
        ))
        .await
        .expect("created with the admin token");
    let mut near_miss = token.clone();
    near_miss.replace_range(70..72, "zz");
    let e = datasets
        .list_datasets(with_token(Some(&near_miss), pb::ListDatasetsRequest {}))
        .await
        .expect_err("near miss refused");
    assert_eq!(e.code(), Code::Unauthenticated);

    // The client command sends --token as a bearer header.
    let listed = std::process::Command::new(bin)
        .args(["datasets", "--format", "json", "--server"])
        .arg(format!("http://{grpc}"))
        .env("PLUMBLINE_TOKEN", &token)
        .output()
        .expect("datasets");
    assert!(
        listed.status.success(),
        "{}",
        String::from_utf8_lossy(&listed.stderr)
    );
    assert!(String::from_utf8_lossy(&listed.stdout).contains("logged"));
    // Without one, the client says where a token goes.
    let refused = std::process::Command::new(bin)
        .args(["datasets", "--server"])
        .arg(format!("http://{grpc}"))
        .env_remove("PLUMBLINE_TOKEN")
        .output()
        .expect("datasets");
    let err = String::from_utf8_lossy(&refused.stderr);
    assert_eq!(refused.status.code(), Some(1), "{err}");
    assert!(
        err.contains("--token") && err.contains("PLUMBLINE_TOKEN"),
        "no token: {err}"
    );

    let list = std::process::Command::new(bin)
        .args(["token", "list", "--data-dir"])
        .arg(&dir.0)
        .output()
        .expect("list");
    let text = String::from_utf8_lossy(&list.stdout);
    assert!(
        text.contains(&id) && text.contains("live") && text.contains("ops"),
        "{text}"
    );
    assert!(
        !text.contains(&token[17..]),
        "token list must not show secrets"
    );
    for (expected, what) in [(Some(0), "first revoke"), (Some(2), "second revoke")] {
        let r = std::process::Command::new(bin)
            .args(["token", "revoke", &id, "--data-dir"])
            .arg(&dir.0)
            .output()
            .expect("revoke");
        assert_eq!(r.status.code(), expected, "{what}");
    }

    // SIGTERM, then read everything the server logged.
    let out = server.terminate();
    let logs = String::from_utf8_lossy(&out.stderr);
    assert!(logs.contains("serving"), "debug logs were captured: {logs}");
    for secret in [&token[17..], &near_miss[17..]] {
        assert!(!logs.contains(secret), "a token secret reached the logs");
    }
}

struct Pki {
    ca: String,
    server_cert: String,
    server_key: String,
    client_cert: String,
    client_key: String,
}

fn pki() -> Pki {
    use rcgen::{
        BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    };
    let ca_key = KeyPair::generate().expect("ca key");
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).expect("params");
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    ca_params
        .distinguished_name
        .push(DnType::CommonName, "plumbline test authority");
    let ca_cert = ca_params.self_signed(&ca_key).expect("ca cert");
    let issuer = Issuer::new(ca_params, ca_key);
    let leaf = |name: &str, purpose: ExtendedKeyUsagePurpose| {
        let key = KeyPair::generate().expect("key");
        // The server's names: localhost and 127.0.0.1 (an IP SAN).
        let mut p = CertificateParams::new(vec![name.to_string(), "127.0.0.1".to_string()])
            .expect("params");
        p.distinguished_name.push(DnType::CommonName, name);
        p.extended_key_usages = vec![purpose];
        let cert = p.signed_by(&key, &issuer).expect("signed");
        (cert.pem(), key.serialize_pem())
    };
    let (server_cert, server_key) = leaf("localhost", ExtendedKeyUsagePurpose::ServerAuth);
    let (client_cert, client_key) = leaf("pipeline", ExtendedKeyUsagePurpose::ClientAuth);
    Pki {
        ca: ca_cert.pem(),
        server_cert,
        server_key,
        client_cert,
        client_key,
    }
}

async fn tls_channel(
    port: u16,
    ca: &str,
    identity: Option<(&str, &str)>,
) -> Result<Channel, tonic::transport::Error> {
    let mut tls = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(ca))
        .domain_name("localhost");
    if let Some((cert, key)) = identity {
        tls = tls.identity(Identity::from_pem(cert, key));
    }
    Channel::from_shared(format!("https://127.0.0.1:{port}"))
        .expect("uri")
        .tls_config(tls)?
        .connect()
        .await
}

async fn list(channel: Channel) -> Result<usize, tonic::Status> {
    Ok(
        pb::dataset_registry_client::DatasetRegistryClient::new(channel)
            .list_datasets(pb::ListDatasetsRequest {})
            .await?
            .into_inner()
            .datasets
            .len(),
    )
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tls_with_and_without_client_certificates() {
    let pki = pki();
    let dir = TempDir::new("tls");
    let file = |name: &str, text: &str| {
        let p = dir.0.join(name);
        std::fs::write(&p, text).expect("write pem");
        p
    };
    let tls = TlsConfig {
        cert: file("server.pem", &pki.server_cert),
        key: file("server.key", &pki.server_key),
        client_ca: None,
    };
    let ca_path = file("ca.pem", &pki.ca);

    // Server certificate only.
    let srv = plumbline::server::start(&Config {
        tls: Some(tls.clone()),
        ..config(&dir)
    })
    .await
    .expect("start with tls");
    let port = srv.grpc_addr.port();
    let ch = tls_channel(port, &pki.ca, None).await.expect("tls connect");
    assert_eq!(list(ch).await.expect("list over tls"), 0);
    // Plaintext to a TLS port fails.
    let plain = Channel::from_shared(format!("http://127.0.0.1:{port}"))
        .expect("uri")
        .connect()
        .await;
    if let Ok(ch) = plain {
        assert!(list(ch).await.is_err(), "plaintext must not be served");
    }
    // A client that trusts another authority refuses the server.
    let other = self::pki();
    let wrong = tls_channel(port, &other.ca, None).await;
    if let Ok(ch) = wrong {
        assert!(list(ch).await.is_err(), "an untrusted server certificate");
    }
    // The client command speaks TLS with --ca-cert.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(["datasets", "--format", "json", "--server"])
        .arg(format!("https://127.0.0.1:{port}"))
        .arg("--ca-cert")
        .arg(&ca_path)
        .output()
        .expect("datasets over tls");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    srv.stop().await.expect("stop");

    // Client certificates required.
    let dir2 = TempDir::new("mtls");
    let srv = plumbline::server::start(&Config {
        tls: Some(TlsConfig {
            client_ca: Some(ca_path.clone()),
            ..tls
        }),
        ..config(&dir2)
    })
    .await
    .expect("start with client verification");
    let port = srv.grpc_addr.port();
    let ch = tls_channel(
        port,
        &pki.ca,
        Some((pki.client_cert.as_str(), pki.client_key.as_str())),
    )
    .await
    .expect("mtls connect");
    assert_eq!(list(ch).await.expect("list with a client certificate"), 0);
    let anonymous = tls_channel(port, &pki.ca, None).await;
    if let Ok(ch) = anonymous {
        assert!(
            list(ch).await.is_err(),
            "a client without a certificate is refused"
        );
    }
    // A certificate from another authority is refused too.
    let stranger = tls_channel(
        port,
        &pki.ca,
        Some((other.client_cert.as_str(), other.client_key.as_str())),
    )
    .await;
    if let Ok(ch) = stranger {
        assert!(list(ch).await.is_err(), "a foreign client certificate");
    }
    srv.stop().await.expect("stop");
}
