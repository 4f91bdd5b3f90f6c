//! Access-token records, in PostgreSQL.

use async_trait::async_trait;
use sqlx::Row;

use super::PgStore;
use crate::store::{StoreResult, TokenLog, TokenRecord};

#[async_trait]
impl TokenLog for PgStore {
    async fn insert_token(&self, t: &TokenRecord) -> StoreResult<()> {
        sqlx::query(
            "INSERT INTO access_tokens (id, digest, scopes, label, created_at_ms, revoked_at_ms) \
             VALUES ($1, $2, $3, $4, $5, 0)",
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

    async fn revoke_token(&self, id: &str, now_ms: i64) -> StoreResult<bool> {
        let done = sqlx::query(
            "UPDATE access_tokens SET revoked_at_ms = $1 WHERE id = $2 AND revoked_at_ms = 0",
        )
        .bind(now_ms)
        .bind(id)
        .execute(&self.pool)
        .await?;
        Ok(done.rows_affected() == 1)
    }

    async fn tokens(&self) -> StoreResult<Vec<TokenRecord>> {
        let rows = sqlx::query(
            "SELECT id, digest, scopes, label, created_at_ms, revoked_at_ms \
             FROM access_tokens ORDER BY created_at_ms, id",
        )
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|r| TokenRecord {
                id: r.get(0),
                digest: r.get(1),
                scopes: r.get(2),
                label: r.get(3),
                created_at_ms: r.get(4),
                revoked_at_ms: r.get(5),
            })
            .collect())
    }
}
