//! Access-token records, in SQLite.

use async_trait::async_trait;
use sqlx::Row;

use super::SqliteStore;
use crate::store::{StoreResult, TokenLog, TokenRecord};

#[async_trait]
impl TokenLog for SqliteStore {
    async fn insert_token(&self, t: &TokenRecord) -> StoreResult<()> {
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
    async fn revoke_token(&self, id: &str, now_ms: i64) -> StoreResult<bool> {
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
    async fn tokens(&self) -> StoreResult<Vec<TokenRecord>> {
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
