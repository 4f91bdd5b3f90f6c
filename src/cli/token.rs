//! `plumbline token create | revoke | list`: access tokens, managed in the
//! server's store (the servers pick changes up within a second).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, Subcommand};

use super::EXIT_BAD_INPUT;
use crate::auth::{issue, Scope};
use crate::config::{DEFAULT_DATA_DIR, DEFAULT_STORE_URL};
use crate::store::{self, Durability, Location, StoreConfig};

#[derive(Debug, Args)]
pub struct TokenArgs {
    #[command(subcommand)]
    pub action: TokenAction,
    /// Directory of the server's SQLite database.
    #[arg(long, env = "PLUMBLINE_DATA_DIR", default_value = DEFAULT_DATA_DIR, global = true)]
    pub data_dir: PathBuf,
    /// The servers' store, as in `serve --store-url` (sqlite:PATH or postgres://...).
    #[arg(long, env = "PLUMBLINE_STORE_URL", default_value = DEFAULT_STORE_URL, global = true)]
    pub store_url: String,
}

#[derive(Debug, Subcommand)]
pub enum TokenAction {
    /// Create a token and print it once; only its digest is stored.
    Create {
        /// admin, read:DATASET, write:DATASET, read:* or write:* (repeatable).
        #[arg(long = "scope", required = true, value_name = "SCOPE")]
        scopes: Vec<String>,
        /// Who or what the token is for, shown by `token list`.
        #[arg(long, default_value = "")]
        label: String,
    },
    /// Revoke a token by its id (the 12 hex digits after plb_).
    Revoke { id: String },
    /// List tokens: id, scopes, label, created, revoked.
    List,
}

fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}

async fn apply(args: &TokenArgs) -> Result<(), (u8, String)> {
    let fail = |e: String| (1u8, e);
    let scopes = match &args.action {
        TokenAction::Create { scopes, .. } => scopes
            .iter()
            .map(|s| Scope::parse(s))
            .collect::<Result<Vec<_>, _>>()
            .map_err(|e| (EXIT_BAD_INPUT, format!("--scope: {e}")))?,
        _ => Vec::new(),
    };
    let location = Location::parse(&args.store_url, &args.data_dir).map_err(|e| {
        (
            EXIT_BAD_INPUT,
            format!("--{e}").replace("--store_url", "--store-url"),
        )
    })?;
    if matches!(location, Location::Sqlite(_)) && !args.data_dir.is_dir() {
        return Err((
            EXIT_BAD_INPUT,
            format!(
                "--data-dir {}: not a directory (start the server once, or create it)",
                args.data_dir.display()
            ),
        ));
    }
    // Beside a running server: tokens only, so no claim on the directory.
    let store = store::open(&StoreConfig {
        location: location.clone(),
        durability: Durability::Full,
        claim: false,
        wal_limit_bytes: 0,
    })
    .await
    .map_err(|e| fail(format!("{}: {e}", location.display())))?;
    let result = match &args.action {
        TokenAction::Create { label, .. } => {
            let issued = issue(&scopes, label, now_ms()).map_err(fail)?;
            store
                .insert_token(&issued.record)
                .await
                .map_err(|e| fail(e.to_string()))?;
            eprintln!(
                "token {} created with scopes {}; it is shown once, store it now:",
                issued.record.id,
                scopes
                    .iter()
                    .map(Scope::to_string)
                    .collect::<Vec<_>>()
                    .join(", ")
            );
            println!("{}", issued.token);
            Ok(())
        }
        TokenAction::Revoke { id } => match store.revoke_token(id, now_ms()).await {
            Ok(true) => {
                eprintln!("token {id} revoked; a running server refuses it within a second");
                Ok(())
            }
            Ok(false) => Err((EXIT_BAD_INPUT, format!("no live token has id {id:?}"))),
            Err(e) => Err(fail(e.to_string())),
        },
        TokenAction::List => {
            let tokens = store.tokens().await.map_err(|e| fail(e.to_string()))?;
            println!(
                "{:<12}  {:<8}  {:<13}  {:<24}  scopes",
                "id", "state", "created (ms)", "label"
            );
            for t in tokens {
                let state = if t.revoked_at_ms == 0 {
                    "live"
                } else {
                    "revoked"
                };
                println!(
                    "{:<12}  {:<8}  {:<13}  {:<24}  {}",
                    t.id, state, t.created_at_ms, t.label, t.scopes
                );
            }
            Ok(())
        }
    };
    store.close().await;
    result
}

pub fn run(args: &TokenArgs) -> ExitCode {
    match super::client::block_on_command("plumbline token", apply(args)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(code) => code,
    }
}
