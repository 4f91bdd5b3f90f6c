-- plumbline store, version 2: access tokens. Only a SHA-256 digest of each
-- token is kept; the token itself is shown once, when it is created.

CREATE TABLE access_tokens (
    id            TEXT PRIMARY KEY,
    digest        BLOB NOT NULL,
    -- JSON array of scopes: admin, read:<dataset>, write:<dataset>, read:*, write:*
    scopes        TEXT NOT NULL,
    label         TEXT NOT NULL,
    created_at_ms INTEGER NOT NULL,
    revoked_at_ms INTEGER NOT NULL DEFAULT 0
);
