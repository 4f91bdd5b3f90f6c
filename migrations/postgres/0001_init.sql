-- plumbline store on PostgreSQL, version 1: the same records as the SQLite
-- store (migrations/sqlite), for several servers writing at once. The
-- rules the SQLite server keeps in memory are constraints here: a unit key
-- once per dataset, and each sequence number once per dataset, so that a
-- server that numbered a batch from a stale view is refused rather than
-- leaving a gap. Plain SQL throughout (no triggers, functions, advisory
-- locks or extensions), so that PostgreSQL-compatible engines can run it.

CREATE TABLE datasets (
    id            BIGSERIAL PRIMARY KEY,
    name          TEXT NOT NULL UNIQUE,
    spec_json     TEXT NOT NULL,
    created_at_ms BIGINT NOT NULL
);

CREATE TABLE models (
    id               BIGSERIAL PRIMARY KEY,
    dataset_id       BIGINT NOT NULL REFERENCES datasets(id),
    name             TEXT NOT NULL,
    version          TEXT NOT NULL,
    description      TEXT NOT NULL,
    registered_at_ms BIGINT NOT NULL,
    retired_at_ms    BIGINT NOT NULL DEFAULT 0,
    UNIQUE (dataset_id, name)
);

CREATE TABLE units (
    dataset_id     BIGINT NOT NULL REFERENCES datasets(id),
    seq            BIGINT NOT NULL,
    key            TEXT NOT NULL,
    -- little-endian IEEE 754 doubles, one per feature, in the dataset's order
    features       BYTEA NOT NULL,
    treatment      SMALLINT NOT NULL CHECK (treatment IN (0, 1)),
    propensity     DOUBLE PRECISION
                   CHECK (propensity IS NULL OR (propensity > 0 AND propensity < 1)),
    cohort         TEXT NOT NULL,
    assigned_at_ms BIGINT NOT NULL,
    received_at_ms BIGINT NOT NULL,
    PRIMARY KEY (dataset_id, seq),
    UNIQUE (dataset_id, key)
);

CREATE TABLE outcomes (
    dataset_id     BIGINT NOT NULL REFERENCES datasets(id),
    unit_seq       BIGINT NOT NULL,
    -- arrival order of outcomes within the dataset, from 0
    seq            BIGINT NOT NULL,
    value          DOUBLE PRECISION NOT NULL,
    observed_at_ms BIGINT NOT NULL,
    received_at_ms BIGINT NOT NULL,
    PRIMARY KEY (dataset_id, unit_seq),
    UNIQUE (dataset_id, seq)
);

CREATE TABLE predictions (
    dataset_id      BIGINT NOT NULL REFERENCES datasets(id),
    model_id        BIGINT NOT NULL REFERENCES models(id),
    unit_seq        BIGINT NOT NULL,
    -- arrival order of predictions within the dataset, from 0
    seq             BIGINT NOT NULL,
    effect          DOUBLE PRECISION NOT NULL,
    predicted_at_ms BIGINT NOT NULL,
    received_at_ms  BIGINT NOT NULL,
    PRIMARY KEY (dataset_id, model_id, unit_seq),
    UNIQUE (dataset_id, seq)
);

CREATE TABLE nuisance_fits (
    id               BIGSERIAL PRIMARY KEY,
    dataset_id       BIGINT NOT NULL REFERENCES datasets(id),
    fitted_at_ms     BIGINT NOT NULL,
    units            BIGINT NOT NULL,
    last_outcome_seq BIGINT NOT NULL,
    seed             BIGINT NOT NULL,
    report_json      TEXT NOT NULL
);
CREATE INDEX nuisance_fits_by_dataset ON nuisance_fits (dataset_id, id);

-- Snapshot ids are handed out by this sequence to every server.
CREATE SEQUENCE snapshot_ids;

CREATE TABLE snapshots (
    id             BIGINT PRIMARY KEY,
    dataset_id     BIGINT NOT NULL REFERENCES datasets(id),
    computed_at_ms BIGINT NOT NULL,
    fit_id         BIGINT REFERENCES nuisance_fits(id),
    refitted       BOOLEAN NOT NULL,
    millis         DOUBLE PRECISION NOT NULL
);
CREATE INDEX snapshots_by_dataset ON snapshots (dataset_id, id);

CREATE TABLE snapshot_boards (
    snapshot_id BIGINT NOT NULL REFERENCES snapshots(id),
    dataset_id  BIGINT NOT NULL,
    window_key  TEXT NOT NULL,
    -- JSON of domain::Board
    board       TEXT NOT NULL,
    PRIMARY KEY (snapshot_id, window_key)
);
CREATE INDEX snapshot_boards_latest ON snapshot_boards (dataset_id, window_key, snapshot_id);

CREATE TABLE snapshot_scores (
    dataset_id     BIGINT NOT NULL,
    model          TEXT NOT NULL,
    estimator      TEXT NOT NULL,
    window_key     TEXT NOT NULL,
    snapshot_id    BIGINT NOT NULL,
    computed_at_ms BIGINT NOT NULL,
    estimate       DOUBLE PRECISION NOT NULL,
    se             DOUBLE PRECISION NOT NULL,
    rank           BIGINT NOT NULL,
    units          BIGINT NOT NULL,
    PRIMARY KEY (dataset_id, model, estimator, window_key, snapshot_id)
);

CREATE TABLE watch_states (
    dataset_id  BIGINT PRIMARY KEY REFERENCES datasets(id),
    snapshot_id BIGINT NOT NULL,
    -- JSON of estimate::watch::Watch
    state       TEXT NOT NULL
);

CREATE TABLE events (
    id           BIGSERIAL PRIMARY KEY,
    dataset_id   BIGINT NOT NULL REFERENCES datasets(id),
    kind         TEXT NOT NULL,
    at_ms        BIGINT NOT NULL,
    snapshot_id  BIGINT NOT NULL,
    summary      TEXT NOT NULL,
    details_json TEXT NOT NULL
);
CREATE INDEX events_by_dataset ON events (dataset_id, id);

CREATE TABLE access_tokens (
    id            TEXT PRIMARY KEY,
    digest        BYTEA NOT NULL,
    -- JSON array of scopes: admin, read:<dataset>, write:<dataset>, read:*, write:*
    scopes        TEXT NOT NULL,
    label         TEXT NOT NULL,
    created_at_ms BIGINT NOT NULL,
    revoked_at_ms BIGINT NOT NULL DEFAULT 0
);

-- One holder per dataset; every grant raises the epoch, and every fenced
-- write checks it in its own transaction. Times are the database's clock.
CREATE TABLE dataset_leases (
    dataset_id    BIGINT PRIMARY KEY REFERENCES datasets(id),
    holder        TEXT NOT NULL,
    epoch         BIGINT NOT NULL,
    expires_at_ms BIGINT NOT NULL
);
