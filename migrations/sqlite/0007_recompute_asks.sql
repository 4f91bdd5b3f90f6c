-- plumbline store, version 7: a recompute asked of a server that does not
-- own the dataset waits here for the owner (one SQLite server owns every
-- dataset, so it never does; the table keeps both backends' contract).

CREATE TABLE recompute_asks (
    id             INTEGER PRIMARY KEY,
    dataset_id     INTEGER NOT NULL REFERENCES datasets(id),
    refit          INTEGER NOT NULL,
    refresh_ranks  INTEGER NOT NULL,
    asked_at_ms    INTEGER NOT NULL,
    answered_at_ms INTEGER NOT NULL DEFAULT 0,
    -- JSON: the owner's summary, or its error
    answer         TEXT
);
CREATE INDEX recompute_asks_open ON recompute_asks (dataset_id, answered_at_ms, id);
