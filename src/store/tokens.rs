//! Access-token records: a public id, the SHA-256 digest of the token, its
//! scopes and a label. The token itself is never stored.

use sqlx::Row;

use super::{Store, StoreResult};

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TokenRecord {
    pub id: String,
    pub digest: Vec<u8>,
    /// A JSON array of the display forms of [`crate::auth::Scope`]'s display form.
    pub scopes: String,
    pub label: String,
    pub created_at_ms: i64,
    /// 0 while the token is live.
    pub revoked_at_ms: i64,
}

impl Store {
    pub async fn insert_token(&self, t: &TokenRecord) -> StoreResult<()> {
        sqlx::query(
            "INSERT INTO access_tokens (id, digest, scopes, label, created_at_ms, revoked_at_ms) \
             VALUES (?, ?, ?, ?, ?, 0)",
        )
        .bind(&t.id)
        .bind(&t.digest)
        .bind(&t.scopes)
        .bind(&t.label)
        .bind(t.created_at_ms)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// Marks a token revoked; false when no live token has this id.
    pub async fn revoke_token(&self, id: &str, now_ms: i64) -> StoreResult<bool> {
        let done = sqlx::query(
            "UPDATE access_tokens SET revoked_at_ms = ? WHERE id = ? AND revoked_at_ms = 0",
        )
        .bind(now_ms)
        .bind(id)
        .execute(&self.pool)
        .await?;
        Ok(done.rows_affected() == 1)
    }

    /// Every token, live and revoked, oldest first.
    pub async fn tokens(&self) -> StoreResult<Vec<TokenRecord>> {
        let rows = sqlx::query(
            "SELECT id, digest, scopes, label, created_at_ms, revoked_at_ms \
             FROM access_tokens ORDER BY created_at_ms, id",
        )
        .fetch_all(&self.pool)
        .await?;
        rows.into_iter()
            .map(|r| {
                Ok(TokenRecord {
                    id: r.try_get("id")?,
                    digest: r.try_get("digest")?,
                    scopes: r.try_get("scopes")?,
                    label: r.try_get("label")?,
                    created_at_ms: r.try_get("created_at_ms")?,
                    revoked_at_ms: r.try_get("revoked_at_ms")?,
                })
            })
            .collect()
    }
}
