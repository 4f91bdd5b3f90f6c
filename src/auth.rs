//! Who may call what: bearer tokens with scopes, checked on every RPC.
//!
//! A token reads `plb_<id>_<secret>`: the id (12 hex digits) is public and
//! names the token in lists, logs and revocations; the secret (64 hex digits,
//! 256 random bits from the operating system) is shown once when the token
//! is created. The store keeps only the SHA-256 digest of the whole token; a
//! fast digest is enough because the secret is uniformly random, not a
//! password a person chose.
//!
//! Scopes: `admin` (everything, including creating datasets), `write:<d>`
//! (send units, outcomes and predictions to dataset `d`, register and retire
//! its models, trigger its recomputes; includes `read:<d>`), `read:<d>`
//! (scoreboards, history, overlap, comparisons, events and models of `d`),
//! and the `write:*` / `read:*` forms for every dataset.
//!
//! The gate runs as a tonic interceptor: it resolves the bearer token in the
//! `authorization` metadata to a [`Caller`] (or refuses with UNAUTHENTICATED)
//! and stores it in the request's extensions; each handler then asks the
//! caller for the access its dataset needs (PERMISSION_DENIED otherwise).
//! The table of live tokens is held in memory and reloaded from the store
//! every [`REFRESH_EVERY`], so a token created or revoked from the command
//! line on the same data directory takes effect within that time without a
//! restart. Health checks are never gated, so probes keep working.

use std::collections::HashMap;
use std::fmt;
use std::sync::{Arc, RwLock};
use std::time::Duration;

use rand::rngs::OsRng;
use rand::RngCore;
use sha2::{Digest, Sha256};
use tonic::metadata::MetadataMap;
use tonic::{Request, Status};
use tracing::warn;

use crate::store::{Store, StoreError, TokenRecord};

/// How often the live-token table is reloaded from the store.
pub const REFRESH_EVERY: Duration = Duration::from_secs(1);

const PREFIX: &str = "plb_";
const ID_BYTES: usize = 6;
const SECRET_BYTES: usize = 32;

/// Which datasets a read or write scope covers.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Target {
    All,
    Dataset(String),
}

impl Target {
    fn covers(&self, dataset: &str) -> bool {
        match self {
            Target::All => true,
            Target::Dataset(d) => d == dataset,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Scope {
    Admin,
    Read(Target),
    Write(Target),
}

impl Scope {
    /// Parses `admin`, `read:<dataset>`, `write:<dataset>`, `read:*`, `write:*`.
    pub fn parse(text: &str) -> Result<Scope, String> {
        let target = |rest: &str| -> Result<Target, String> {
            match rest {
                "" => Err(format!("scope {text:?}: the dataset after ':' is empty")),
                "*" => Ok(Target::All),
                d => Ok(Target::Dataset(d.to_string())),
            }
        };
        match text.split_once(':') {
            None if text == "admin" => Ok(Scope::Admin),
            Some(("read", rest)) => Ok(Scope::Read(target(rest)?)),
            Some(("write", rest)) => Ok(Scope::Write(target(rest)?)),
            _ => Err(format!(
                "scope {text:?} is not one of admin, read:<dataset>, write:<dataset>, read:*, write:*"
            )),
        }
    }
}

impl fmt::Display for Scope {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let (verb, target) = match self {
            Scope::Admin => return f.write_str("admin"),
            Scope::Read(t) => ("read", t),
            Scope::Write(t) => ("write", t),
        };
        match target {
            Target::All => write!(f, "{verb}:*"),
            Target::Dataset(d) => write!(f, "{verb}:{d}"),
        }
    }
}

/// The stored form of a scope list: a JSON array of their display forms
/// (dataset names may hold any character, so no separator is safe).
fn join_scopes(scopes: &[Scope]) -> String {
    let texts: Vec<String> = scopes.iter().map(Scope::to_string).collect();
    serde_json::Value::from(texts).to_string()
}

fn split_scopes(stored: &str) -> Result<Vec<Scope>, String> {
    let texts: Vec<String> =
        serde_json::from_str(stored).map_err(|e| format!("stored scopes {stored:?}: {e}"))?;
    texts.iter().map(|t| Scope::parse(t)).collect()
}

/// What an RPC needs on its dataset.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Access {
    Read,
    Write,
}

/// The resolved identity of a request.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Caller {
    /// Authentication is off: everything is allowed.
    Open,
    Token {
        id: String,
        scopes: Vec<Scope>,
    },
}

impl Caller {
    pub fn is_admin(&self) -> bool {
        match self {
            Caller::Open => true,
            Caller::Token { scopes, .. } => scopes.contains(&Scope::Admin),
        }
    }

    pub fn allows(&self, access: Access, dataset: &str) -> bool {
        match self {
            Caller::Open => true,
            Caller::Token { scopes, .. } => scopes.iter().any(|s| match (s, access) {
                (Scope::Admin, _) => true,
                (Scope::Write(t), _) => t.covers(dataset),
                (Scope::Read(t), Access::Read) => t.covers(dataset),
                (Scope::Read(_), Access::Write) => false,
            }),
        }
    }

    /// True when every dataset, present and future, is readable.
    pub fn reads_everything(&self) -> bool {
        match self {
            Caller::Open => true,
            Caller::Token { scopes, .. } => scopes.iter().any(|s| {
                matches!(
                    s,
                    Scope::Admin | Scope::Read(Target::All) | Scope::Write(Target::All)
                )
            }),
        }
    }

    fn id(&self) -> &str {
        match self {
            Caller::Open => "(open)",
            Caller::Token { id, .. } => id,
        }
    }

    pub fn require(&self, access: Access, dataset: &str) -> Result<(), Status> {
        if self.allows(access, dataset) {
            return Ok(());
        }
        let verb = match access {
            Access::Read => "read",
            Access::Write => "write",
        };
        Err(Status::permission_denied(format!(
            "dataset: token {} has no {verb}:{dataset} scope",
            self.id()
        )))
    }

    pub fn require_admin(&self) -> Result<(), Status> {
        if self.is_admin() {
            return Ok(());
        }
        Err(Status::permission_denied(format!(
            "token {} has no admin scope",
            self.id()
        )))
    }

    /// For a `dataset` filter where empty means every dataset.
    pub fn require_read_filter(&self, dataset: &str) -> Result<(), Status> {
        if !dataset.is_empty() {
            return self.require(Access::Read, dataset);
        }
        if self.reads_everything() {
            return Ok(());
        }
        Err(Status::permission_denied(format!(
            "dataset: empty means every dataset, which needs admin or read:*; token {} should name its dataset",
            self.id()
        )))
    }
}

/// The caller the gate attached to a request.
pub fn caller<T>(request: &Request<T>) -> Result<Caller, Status> {
    request
        .extensions()
        .get::<Caller>()
        .cloned()
        .ok_or_else(|| Status::internal("request reached a handler without passing the gate"))
}

/// A token as created: the record to store and the text shown once.
pub struct Issued {
    pub record: TokenRecord,
    pub token: String,
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn digest(token: &str) -> [u8; 32] {
    Sha256::digest(token.as_bytes()).into()
}

/// Creates a token with fresh randomness from the operating system.
pub fn issue(scopes: &[Scope], label: &str, now_ms: i64) -> Result<Issued, String> {
    if scopes.is_empty() {
        return Err("a token needs at least one scope".into());
    }
    let mut id = [0u8; ID_BYTES];
    let mut secret = [0u8; SECRET_BYTES];
    OsRng
        .try_fill_bytes(&mut id)
        .and_then(|()| OsRng.try_fill_bytes(&mut secret))
        .map_err(|e| format!("the operating system's random source failed: {e}"))?;
    let id = hex(&id);
    let token = format!("{PREFIX}{id}_{}", hex(&secret));
    Ok(Issued {
        record: TokenRecord {
            id,
            digest: digest(&token).to_vec(),
            scopes: join_scopes(scopes),
            label: label.to_string(),
            created_at_ms: now_ms,
            revoked_at_ms: 0,
        },
        token,
    })
}

/// The public id inside a token's text, if it has the right shape.
fn token_id(token: &str) -> Option<&str> {
    let rest = token.strip_prefix(PREFIX)?;
    let (id, secret) = rest.split_once('_')?;
    (id.len() == 2 * ID_BYTES && secret.len() == 2 * SECRET_BYTES).then_some(id)
}

/// Equality that takes the same time wherever the first difference is.
fn same_digest(a: &[u8], b: &[u8; 32]) -> bool {
    a.len() == b.len() && a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
}

struct Live {
    digest: Vec<u8>,
    scopes: Vec<Scope>,
}

/// The authentication gate shared by every service.
pub struct Gate {
    enabled: bool,
    live: RwLock<HashMap<String, Live>>,
}

impl Gate {
    /// A gate that lets everything through (authentication off).
    pub fn open() -> Arc<Gate> {
        Arc::new(Gate {
            enabled: false,
            live: RwLock::new(HashMap::new()),
        })
    }

    /// A gate that requires tokens, loaded from the store now.
    pub async fn enforcing(store: &Store) -> Result<Arc<Gate>, StoreError> {
        let gate = Arc::new(Gate {
            enabled: true,
            live: RwLock::new(HashMap::new()),
        });
        gate.reload(store).await?;
        Ok(gate)
    }

    pub fn enabled(&self) -> bool {
        self.enabled
    }

    /// Replaces the live-token table with the store's.
    pub async fn reload(&self, store: &Store) -> Result<(), StoreError> {
        let mut table = HashMap::new();
        for t in store.tokens().await? {
            if t.revoked_at_ms != 0 {
                continue;
            }
            match split_scopes(&t.scopes) {
                Ok(scopes) => {
                    table.insert(
                        t.id,
                        Live {
                            digest: t.digest,
                            scopes,
                        },
                    );
                }
                Err(e) => warn!(token = %t.id, error = %e, "stored token skipped"),
            }
        }
        match self.live.write() {
            Ok(mut live) => *live = table,
            Err(poisoned) => *poisoned.into_inner() = table,
        }
        Ok(())
    }

    /// Resolves a bearer token (the text after `Bearer `).
    pub fn identify_token(&self, token: &str) -> Result<Caller, Status> {
        if !self.enabled {
            return Ok(Caller::Open);
        }
        let unknown = || Status::unauthenticated("authorization: token is unknown or revoked");
        let id = token_id(token).ok_or_else(|| {
            Status::unauthenticated("authorization: not a plumbline token (plb_<id>_<secret>)")
        })?;
        let live = match self.live.read() {
            Ok(l) => l,
            Err(poisoned) => poisoned.into_inner(),
        };
        let entry = live.get(id).ok_or_else(unknown)?;
        if !same_digest(&entry.digest, &digest(token)) {
            return Err(unknown());
        }
        Ok(Caller::Token {
            id: id.to_string(),
            scopes: entry.scopes.clone(),
        })
    }

    /// Resolves the `authorization: Bearer <token>` header of a request.
    pub fn identify(&self, header: Option<&str>) -> Result<Caller, Status> {
        if !self.enabled {
            return Ok(Caller::Open);
        }
        let header = header.ok_or_else(|| {
            Status::unauthenticated("authorization: missing; send 'authorization: Bearer <token>'")
        })?;
        let token = header
            .strip_prefix("Bearer ")
            .or_else(|| header.strip_prefix("bearer "))
            .ok_or_else(|| Status::unauthenticated("authorization: expected 'Bearer <token>'"))?;
        self.identify_token(token.trim())
    }

    fn identify_metadata(&self, metadata: &MetadataMap) -> Result<Caller, Status> {
        if !self.enabled {
            return Ok(Caller::Open);
        }
        let header = match metadata.get("authorization") {
            None => None,
            Some(v) => Some(v.to_str().map_err(|_| {
                Status::unauthenticated("authorization: header is not printable ASCII")
            })?),
        };
        self.identify(header)
    }

    /// Reloads the table every [`REFRESH_EVERY`] until `stop` fires.
    pub fn spawn_refresher(
        self: &Arc<Self>,
        store: Store,
        mut stop: crate::shutdown::Shutdown,
    ) -> Option<tokio::task::JoinHandle<()>> {
        if !self.enabled {
            return None;
        }
        let gate = Arc::clone(self);
        Some(tokio::spawn(async move {
            let mut tick = tokio::time::interval(REFRESH_EVERY);
            loop {
                tokio::select! {
                    _ = tick.tick() => {
                        if let Err(e) = gate.reload(&store).await {
                            warn!(error = %e, "reloading access tokens failed; keeping the previous table");
                        }
                    }
                    _ = stop.recv() => break,
                }
            }
        }))
    }
}

/// The tonic interceptor: attaches the [`Caller`] or refuses the request.
#[derive(Clone)]
pub struct GateLayer(pub Arc<Gate>);

impl tonic::service::Interceptor for GateLayer {
    fn call(&mut self, mut request: Request<()>) -> Result<Request<()>, Status> {
        let caller = self.0.identify_metadata(request.metadata())?;
        request.extensions_mut().insert(caller);
        Ok(request)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn token_caller(scopes: &[&str]) -> Caller {
        Caller::Token {
            id: "abc".into(),
            scopes: scopes
                .iter()
                .map(|s| Scope::parse(s).expect("scope"))
                .collect(),
        }
    }

    #[test]
    fn scopes_parse_display_and_round_trip_through_storage() {
        let scopes = ["admin", "read:ride credits", "write:*", "read:a:b"]
            .map(|s| Scope::parse(s).expect("scope"));
        assert_eq!(
            scopes[1],
            Scope::Read(Target::Dataset("ride credits".into()))
        );
        assert_eq!(scopes[3], Scope::Read(Target::Dataset("a:b".into())));
        let stored = join_scopes(&scopes);
        assert_eq!(
            stored,
            r#"["admin","read:ride credits","write:*","read:a:b"]"#
        );
        assert_eq!(split_scopes(&stored).expect("split"), scopes.to_vec());
        for bad in ["", "root", "read", "read:", "delete:x", "Admin"] {
            assert!(Scope::parse(bad).is_err(), "{bad:?} should be refused");
        }
    }

    #[test]
    fn access_rules() {
        let reader = token_caller(&["read:a"]);
        assert!(reader.allows(Access::Read, "a"));
        assert!(!reader.allows(Access::Write, "a"));
        assert!(!reader.allows(Access::Read, "b"));
        assert!(!reader.reads_everything());
        let writer = token_caller(&["write:a"]);
        assert!(writer.allows(Access::Read, "a") && writer.allows(Access::Write, "a"));
        assert!(!writer.allows(Access::Write, "ab"));
        let all = token_caller(&["read:*"]);
        assert!(all.allows(Access::Read, "anything") && !all.allows(Access::Write, "x"));
        assert!(all.reads_everything() && !all.is_admin());
        let admin = token_caller(&["admin"]);
        assert!(admin.allows(Access::Write, "x") && admin.is_admin());
        let denied = reader.require(Access::Write, "a").expect_err("denied");
        assert_eq!(denied.code(), tonic::Code::PermissionDenied);
        assert!(denied.message().contains("write:a"), "{}", denied.message());
    }

    #[test]
    fn issued_tokens_verify_and_tampered_ones_do_not() {
        let issued = issue(&[Scope::Admin], "ops", 1).expect("issue");
        assert!(issued.token.starts_with("plb_"));
        assert_eq!(issued.token.len(), 4 + 12 + 1 + 64);
        let gate = Gate {
            enabled: true,
            live: RwLock::new(HashMap::from([(
                issued.record.id.clone(),
                Live {
                    digest: issued.record.digest.clone(),
                    scopes: vec![Scope::Admin],
                },
            )])),
        };
        let who = gate
            .identify(Some(&format!("Bearer {}", issued.token)))
            .expect("valid token");
        assert!(who.is_admin());
        // Flip the last secret digit: same id, wrong digest.
        let mut tampered = issued.token.clone();
        let last = tampered.pop().expect("non-empty");
        tampered.push(if last == '0' { '1' } else { '0' });
        for header in [
            Some(format!("Bearer {tampered}")),
            Some(issued.token.clone()),
            Some("Bearer plb_short".to_string()),
            None,
        ] {
            let e = gate.identify(header.as_deref()).expect_err("refused");
            assert_eq!(e.code(), tonic::Code::Unauthenticated);
            assert!(e.message().starts_with("authorization"), "{}", e.message());
            assert!(!e.message().contains(&issued.token[17..]), "secret leaked");
        }
        // The stored digest is not the token and does not contain it.
        assert_ne!(issued.record.digest, issued.token.as_bytes());
        assert_eq!(issued.record.digest.len(), 32);
    }

    #[test]
    fn open_gate_lets_everything_through() {
        let gate = Gate::open();
        assert_eq!(gate.identify(None).expect("open"), Caller::Open);
        assert!(Caller::Open.allows(Access::Write, "x"));
    }
}
