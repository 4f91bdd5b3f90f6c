//! Server configuration: defaults, then an optional TOML file, then
//! `PLUMBLINE_*` environment variables, then command-line flags.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::limits::Limits;
use crate::store::Durability;

pub const DEFAULT_LISTEN: &str = "127.0.0.1:7070";
pub const DEFAULT_METRICS_LISTEN: &str = "127.0.0.1:7071";
pub const DEFAULT_DATA_DIR: &str = "plumbline-data";
pub const DATABASE_FILE: &str = "plumbline.sqlite";

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
    /// Directory holding the SQLite database.
    pub data_dir: PathBuf,
    pub durability: Durability,
    pub log_format: LogFormat,
    /// A tracing filter, e.g. "info" or "plumbline=debug".
    pub log_level: String,
    /// Resource limits (the `[limits]` section).
    pub limits: Limits,
}

/// The file's shape: every key optional.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileConfig {
    listen: Option<String>,
    metrics_listen: Option<String>,
    data_dir: Option<PathBuf>,
    durability: Option<Durability>,
    log_format: Option<LogFormat>,
    log_level: Option<String>,
    limits: Option<Limits>,
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
        Ok(Self {
            listen,
            metrics_listen,
            data_dir,
            durability,
            log_format,
            log_level,
            limits,
        })
    }

    pub fn database_path(&self) -> PathBuf {
        self.data_dir.join(DATABASE_FILE)
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
        std::fs::write(&path, "lisen = \"x\"\n").expect("write");
        let err = Config::load(Some(&path), |_| None).expect_err("typo is refused");
        assert!(err.contains("lisen"), "{err}");
        let _ = std::fs::remove_dir_all(&dir);
    }
}
