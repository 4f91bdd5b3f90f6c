//! `plumbline token create | revoke | list`: access tokens, managed in the
//! server's store (the servers pick changes up within a second).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, Subcommand};

use super::client::{print_json, Output};
use super::clock::{ms_to_text, now_ms};
use super::EXIT_BAD_INPUT;
use crate::auth::{issue, Scope};
use crate::config::{DEFAULT_DATA_DIR, DEFAULT_STORE_URL};
use crate::store::{self, Durability, Location, StoreConfig, TokenRecord};

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
    /// A table for people, or JSON for programs.
    #[arg(long, value_enum, default_value_t = Output::Table, global = true)]
    pub format: Output,
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
    /// Revoke a token by its id; a running server refuses it within a second.
    Revoke {
        /// The token's id: the 12 hex digits after `plb_`, as `token list` shows it.
        id: String,
    },
    /// List tokens: id, scopes, label, created, revoked.
    List,
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
            if args.format == Output::Json {
                print_json(serde_json::json!({
                    "id": issued.record.id, "token": issued.token,
                    "scopes": scopes.iter().map(Scope::to_string).collect::<Vec<_>>(),
                    "label": label, "created_at_ms": issued.record.created_at_ms,
                }));
                return Ok(());
            }
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
            match args.format {
                Output::Json => print_json(serde_json::Value::Array(
                    tokens.iter().map(token_json).collect(),
                )),
                Output::Table => print!("{}", tokens_text(&tokens)),
            }
            Ok(())
        }
    };
    store.close().await;
    result
}

/// A token's stored scopes (a JSON array of strings) as a list; a value
/// that is not one is shown as stored rather than hidden.
fn scope_list(stored: &str) -> Vec<String> {
    serde_json::from_str::<Vec<String>>(stored).unwrap_or_else(|_| vec![stored.to_string()])
}

fn token_json(t: &TokenRecord) -> serde_json::Value {
    serde_json::json!({
        "id": t.id, "label": t.label, "scopes": scope_list(&t.scopes),
        "created_at_ms": t.created_at_ms,
        "revoked_at_ms": (t.revoked_at_ms > 0).then_some(t.revoked_at_ms),
        "state": if t.revoked_at_ms == 0 { "live" } else { "revoked" },
    })
}

/// Columns of the tokens table before the scopes.
const TOKEN_LEAD: usize = 12 + 2 + 7 + 2 + 20 + 2 + 18 + 2;

/// Tokens as a table: times as every table prints them, scopes separated
/// by commas (wrapped under their column, so a line stays within 100
/// columns), the label cut to its column. Revocation times are in the JSON.
fn tokens_text(tokens: &[TokenRecord]) -> String {
    let mut out = format!(
        "{:<12}  {:<7}  {:<20}  {:<18}  scopes\n",
        "id", "state", "created", "label"
    );
    for t in tokens {
        let state = if t.revoked_at_ms == 0 {
            "live"
        } else {
            "revoked"
        };
        let scopes = super::client::wrap(&scope_list(&t.scopes).join(", "), 100 - TOKEN_LEAD);
        out.push_str(&format!(
            "{:<12}  {:<7}  {:<20}  {:<18}  {}\n",
            t.id,
            state,
            ms_to_text(t.created_at_ms),
            super::admin::cut(&t.label, 18),
            scopes.first().map(String::as_str).unwrap_or("")
        ));
        for more in scopes.iter().skip(1) {
            out.push_str(&format!("{}{more}\n", " ".repeat(TOKEN_LEAD)));
        }
    }
    out
}

pub fn run(args: &TokenArgs) -> ExitCode {
    match super::client::block_on_command("plumbline token", apply(args)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(code) => code,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn token_list_prints_times_and_comma_separated_scopes() {
        let t = TokenRecord {
            id: "3f9a0c21b7de".into(),
            digest: Vec::new(),
            scopes: r#"["read:*","write:ride-credits"]"#.into(),
            label: "scoring pipeline".into(),
            created_at_ms: 1_796_400_000_000,
            revoked_at_ms: 0,
        };
        let text = tokens_text(std::slice::from_ref(&t));
        let line = text.lines().nth(1).expect("a row");
        assert!(line.contains(&ms_to_text(t.created_at_ms)), "{line}");
        assert!(!line.contains("1796400000000"), "{line}");
        assert!(line.ends_with("read:*, write:ride-credits"), "{line}");
        assert!(!line.contains('['), "{line}");
        let v = token_json(&t);
        assert_eq!(
            v["scopes"],
            serde_json::json!(["read:*", "write:ride-credits"])
        );
        assert_eq!(v["state"], "live");
        assert!(v["revoked_at_ms"].is_null());
    }
}
