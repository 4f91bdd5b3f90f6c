//! Server configuration: defaults, then an optional TOML file, then
//! `PLUMBLINE_*` environment variables, then command-line flags.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::limits::Limits;
use crate::store::{Durability, Location, StoreConfig, DEFAULT_WAL_LIMIT_MIB};

pub const DEFAULT_LISTEN: &str = "127.0.0.1:7070";
pub const DEFAULT_METRICS_LISTEN: &str = "127.0.0.1:7071";
pub const DEFAULT_DATA_DIR: &str = "plumbline-data";
pub const DATABASE_FILE: &str = "plumbline.sqlite";
/// The default store: a SQLite file under `data_dir`.
pub const DEFAULT_STORE_URL: &str = "sqlite:plumbline.sqlite";
pub const DEFAULT_LEASE_SECONDS: u64 = 10;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum LogFormat {
    #[default]
    Human,
    Json,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    /// gRPC address.
    pub listen: SocketAddr,
    /// HTTP address of /metrics, /healthz and /readyz.
    pub metrics_listen: SocketAddr,
    /// Directory of the SQLite database (and any relative `sqlite:` path).
    pub data_dir: PathBuf,
    /// Which store, from `store_url`: SQLite (the default) or PostgreSQL.
    /// Its Debug form hides any password.
    pub store: Location,
    /// How long a dataset may go without a live owner when servers share a
    /// store (see `monitor::leases`).
    pub lease_seconds: u64,
    /// This server's name among the servers sharing a store (the host's
    /// name when unset).
    pub replica_name: Option<String>,
    /// SQLite: truncate the WAL once it passes this many MiB (0: never
    /// while running).
    pub sqlite_wal_limit_mib: u64,
    pub durability: Durability,
    pub log_format: LogFormat,
    /// A tracing filter, e.g. "info" or "plumbline=debug".
    pub log_level: String,
    /// Resource limits (the `[limits]` section).
    pub limits: Limits,
    /// Whether RPCs need a bearer token; `None` means "yes unless the gRPC
    /// address is a loopback address" (see [`Config::tokens_required`]).
    pub require_token: Option<bool>,
    /// Whether `/metrics` needs a bearer token with `admin` or `read:*`.
    pub metrics_require_token: bool,
    /// Serve gRPC over TLS with this certificate and key.
    pub tls: Option<TlsConfig>,
}

/// TLS for the gRPC listener (PEM files).
#[derive(Debug, Clone, PartialEq, Eq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TlsConfig {
    /// Certificate chain, leaf first.
    pub cert: PathBuf,
    pub key: PathBuf,
    /// When set, clients must present a certificate signed by this authority.
    pub client_ca: Option<PathBuf>,
}

/// The file's shape: every key optional.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileConfig {
    listen: Option<String>,
    metrics_listen: Option<String>,
    data_dir: Option<PathBuf>,
    store_url: Option<String>,
    lease_seconds: Option<u64>,
    replica_name: Option<String>,
    sqlite_wal_limit_mib: Option<u64>,
    durability: Option<Durability>,
    log_format: Option<LogFormat>,
    log_level: Option<String>,
    limits: Option<Limits>,
    require_token: Option<bool>,
    metrics_require_token: Option<bool>,
    tls: Option<TlsConfig>,
}

fn flag(key: &str, v: &str) -> Result<bool, String> {
    match v {
        "true" | "1" | "yes" | "on" => Ok(true),
        "false" | "0" | "no" | "off" => Ok(false),
        other => Err(format!("{key}: {other:?} is not true or false")),
    }
}

fn addr(key: &str, v: &str) -> Result<SocketAddr, String> {
    v.parse()
        .map_err(|e| format!("{key}: {v:?} is not an address such as 127.0.0.1:7070 ({e})"))
}

impl Config {
    /// Builds the configuration. `file` is read if given; `env` is a lookup
    /// of environment variables (injected for tests).
    pub fn load(file: Option<&Path>, env: impl Fn(&str) -> Option<String>) -> Result<Self, String> {
        let f: FileConfig = match file {
            Some(p) => {
                let text =
                    std::fs::read_to_string(p).map_err(|e| format!("{}: {e}", p.display()))?;
                toml::from_str(&text).map_err(|e| format!("{}: {e}", p.display()))?
            }
            None => FileConfig::default(),
        };
        let pick = |env_key: &str, from_file: Option<String>, default: &str| {
            env(env_key)
                .or(from_file)
                .unwrap_or_else(|| default.to_string())
        };
        let listen = addr(
            "listen",
            &pick("PLUMBLINE_LISTEN", f.listen, DEFAULT_LISTEN),
        )?;
        let metrics_listen = addr(
            "metrics_listen",
            &pick(
                "PLUMBLINE_METRICS_LISTEN",
                f.metrics_listen,
                DEFAULT_METRICS_LISTEN,
            ),
        )?;
        let data_dir = env("PLUMBLINE_DATA_DIR")
            .map(PathBuf::from)
            .or(f.data_dir)
            .unwrap_or_else(|| PathBuf::from(DEFAULT_DATA_DIR));
        let store = Location::parse(
            &pick("PLUMBLINE_STORE_URL", f.store_url, DEFAULT_STORE_URL),
            &data_dir,
        )?;
        let lease_seconds = match env("PLUMBLINE_LEASE_SECONDS") {
            Some(v) => v
                .parse()
                .map_err(|_| format!("PLUMBLINE_LEASE_SECONDS: {v:?} is not a whole number"))?,
            None => f.lease_seconds.unwrap_or(DEFAULT_LEASE_SECONDS),
        };
        if !(2..=600).contains(&lease_seconds) {
            return Err(format!(
                "lease_seconds: {lease_seconds} is outside 2..=600 (a shorter lease needs a \
                 store that answers within a tenth of it; a longer one leaves datasets without \
                 an owner that long after a server dies)"
            ));
        }
        let sqlite_wal_limit_mib = match env("PLUMBLINE_SQLITE_WAL_LIMIT_MIB") {
            Some(v) => v.parse().map_err(|_| {
                format!("PLUMBLINE_SQLITE_WAL_LIMIT_MIB: {v:?} is not a whole number")
            })?,
            None => f.sqlite_wal_limit_mib.unwrap_or(DEFAULT_WAL_LIMIT_MIB),
        };
        let replica_name = env("PLUMBLINE_REPLICA_NAME")
            .or(f.replica_name)
            .filter(|n| !n.is_empty());
        let durability = match env("PLUMBLINE_DURABILITY").as_deref() {
            Some("full") => Durability::Full,
            Some("normal") => Durability::Normal,
            Some(other) => {
                return Err(format!(
                    "PLUMBLINE_DURABILITY: {other:?} is not full or normal"
                ))
            }
            None => f.durability.unwrap_or_default(),
        };
        let log_format = match env("PLUMBLINE_LOG_FORMAT").as_deref() {
            Some("human") => LogFormat::Human,
            Some("json") => LogFormat::Json,
            Some(other) => {
                return Err(format!(
                    "PLUMBLINE_LOG_FORMAT: {other:?} is not human or json"
                ))
            }
            None => f.log_format.unwrap_or_default(),
        };
        let log_level = pick("PLUMBLINE_LOG", f.log_level, "info");
        let limits = f.limits.unwrap_or_default();
        limits.check()?;
        let require_token = match env("PLUMBLINE_REQUIRE_TOKEN") {
            Some(v) => Some(flag("PLUMBLINE_REQUIRE_TOKEN", &v)?),
            None => f.require_token,
        };
        let metrics_require_token = match env("PLUMBLINE_METRICS_REQUIRE_TOKEN") {
            Some(v) => flag("PLUMBLINE_METRICS_REQUIRE_TOKEN", &v)?,
            None => f.metrics_require_token.unwrap_or(false),
        };
        let tls = match (env("PLUMBLINE_TLS_CERT"), env("PLUMBLINE_TLS_KEY")) {
            (Some(cert), Some(key)) => Some(TlsConfig {
                cert: cert.into(),
                key: key.into(),
                client_ca: env("PLUMBLINE_TLS_CLIENT_CA").map(PathBuf::from),
            }),
            (None, None) => f.tls,
            _ => {
                return Err(
                    "PLUMBLINE_TLS_CERT and PLUMBLINE_TLS_KEY must be set together".to_string(),
                )
            }
        };
        if metrics_require_token && require_token == Some(false) {
            return Err(
                "metrics_require_token needs tokens: it cannot be set with require_token = false"
                    .to_string(),
            );
        }
        Ok(Self {
            listen,
            metrics_listen,
            data_dir,
            store,
            lease_seconds,
            replica_name,
            sqlite_wal_limit_mib,
            durability,
            log_format,
            log_level,
            limits,
            require_token,
            metrics_require_token,
            tls,
        })
    }

    /// The defaults, with the data (and the SQLite store) in `data_dir`:
    /// for tools and tests that start a server in-process.
    pub fn in_dir(data_dir: impl Into<PathBuf>) -> Self {
        let data_dir = data_dir.into();
        Self {
            listen: ([127, 0, 0, 1], 7070).into(),
            metrics_listen: ([127, 0, 0, 1], 7071).into(),
            store: Location::Sqlite(data_dir.join(DATABASE_FILE)),
            data_dir,
            lease_seconds: DEFAULT_LEASE_SECONDS,
            replica_name: None,
            sqlite_wal_limit_mib: DEFAULT_WAL_LIMIT_MIB,
            durability: Durability::default(),
            log_format: LogFormat::default(),
            log_level: "info".into(),
            limits: Limits::default(),
            require_token: None,
            metrics_require_token: false,
            tls: None,
        }
    }

    /// Tokens are required when asked for, and by default whenever the
    /// gRPC listener is reachable from other machines.
    pub fn tokens_required(&self) -> bool {
        self.require_token
            .unwrap_or(!self.listen.ip().is_loopback())
            || self.metrics_require_token
    }

    /// How a server opens its store.
    pub fn store_config(&self) -> StoreConfig {
        StoreConfig {
            location: self.store.clone(),
            durability: self.durability,
            claim: true,
            wal_limit_bytes: self.sqlite_wal_limit_mib << 20,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn file_then_environment_override_defaults() {
        let dir = std::env::temp_dir().join(format!("plumbline-config-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("dir");
        let path = dir.join("c.toml");
        std::fs::write(
            &path,
            "listen = \"127.0.0.1:9000\"\ndurability = \"normal\"\n",
        )
        .expect("write");
        let c = Config::load(Some(&path), |k| {
            (k == "PLUMBLINE_METRICS_LISTEN").then(|| "127.0.0.1:9001".into())
        })
        .expect("config");
        assert_eq!(c.listen.port(), 9000);
        assert_eq!(c.metrics_listen.port(), 9001);
        assert_eq!(c.durability, Durability::Normal);
        assert_eq!(c.data_dir, PathBuf::from(DEFAULT_DATA_DIR));
        std::fs::write(&path, "[limits]\nmax_datasets = 3\n").expect("write");
        let c = Config::load(Some(&path), |_| None).expect("limits section");
        assert_eq!(c.limits.max_datasets, 3);
        assert!(
            !c.tokens_required(),
            "loopback without require_token is open"
        );
        // A refit cap below the minimum is refused at start-up, by name.
        std::fs::write(&path, "[limits]\nmax_fit_units = 500\n").expect("write");
        let err = Config::load(Some(&path), |_| None).expect_err("below the minimum");
        assert!(err.to_string().contains("limits.max_fit_units"), "{err}");
        std::fs::write(
            &path,
            "listen = \"0.0.0.0:9000\"\n[tls]\ncert = \"c.pem\"\nkey = \"k.pem\"\n",
        )
        .expect("write");
        let c = Config::load(Some(&path), |_| None).expect("config");
        assert!(c.tokens_required(), "a non-loopback listener needs tokens");
        assert_eq!(c.tls.as_ref().map(|t| t.key.clone()), Some("k.pem".into()));
        let c = Config::load(Some(&path), |k| {
            (k == "PLUMBLINE_REQUIRE_TOKEN").then(|| "false".into())
        })
        .expect("config");
        assert!(!c.tokens_required(), "explicitly turned off");
        let err = Config::load(None, |k| (k == "PLUMBLINE_TLS_CERT").then(|| "c".into()))
            .expect_err("cert without key");
        assert!(err.contains("PLUMBLINE_TLS_KEY"), "{err}");
        std::fs::write(&path, "lisen = \"x\"\n").expect("write");
        let err = Config::load(Some(&path), |_| None).expect_err("typo is refused");
        assert!(err.contains("lisen"), "{err}");
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn the_store_is_sqlite_under_the_data_dir_unless_a_url_says_otherwise() {
        let c = Config::load(None, |k| {
            (k == "PLUMBLINE_DATA_DIR").then(|| "/srv/pl".into())
        })
        .expect("config");
        assert_eq!(
            c.store,
            Location::Sqlite(PathBuf::from("/srv/pl").join(DATABASE_FILE))
        );
        assert_eq!(c.lease_seconds, DEFAULT_LEASE_SECONDS);
        let c = Config::load(None, |k| {
            (k == "PLUMBLINE_STORE_URL").then(|| "postgres://pl:hunter2@db/pl".into())
        })
        .expect("config");
        assert_eq!(
            c.store,
            Location::Postgres("postgres://pl:hunter2@db/pl".into())
        );
        let shown = format!("{c:?}");
        assert!(!shown.contains("hunter2"), "{shown}");
        let err = Config::load(None, |k| {
            (k == "PLUMBLINE_LEASE_SECONDS").then(|| "1".into())
        })
        .expect_err("too short");
        assert!(err.contains("lease_seconds"), "{err}");
    }
}
