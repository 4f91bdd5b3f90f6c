-- plumbline store on PostgreSQL, version 2: a recompute asked of a server
-- that does not own the dataset waits here until its owner answers.

CREATE TABLE recompute_asks (
    id             BIGSERIAL PRIMARY KEY,
    dataset_id     BIGINT NOT NULL REFERENCES datasets(id),
    refit          BOOLEAN NOT NULL,
    refresh_ranks  BOOLEAN NOT NULL,
    asked_at_ms    BIGINT NOT NULL,
    answered_at_ms BIGINT NOT NULL DEFAULT 0,
    -- JSON: the owner's summary, or its error
    answer         TEXT
);
CREATE INDEX recompute_asks_open ON recompute_asks (dataset_id, answered_at_ms, id);
