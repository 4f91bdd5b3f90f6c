-- plumbline store, version 1. Units, outcomes and predictions are keyed by
-- (dataset, unit sequence number): the unit's arrival order, which is also
-- the order every scoring pass uses, so results are reproducible after a
-- restart.

CREATE TABLE datasets (
    id            INTEGER PRIMARY KEY,
    name          TEXT NOT NULL UNIQUE,
    spec_json     TEXT NOT NULL,
    created_at_ms INTEGER NOT NULL
);

CREATE TABLE models (
    id               INTEGER PRIMARY KEY,
    dataset_id       INTEGER NOT NULL REFERENCES datasets(id),
    name             TEXT NOT NULL,
    version          TEXT NOT NULL,
    description      TEXT NOT NULL,
    registered_at_ms INTEGER NOT NULL,
    retired_at_ms    INTEGER NOT NULL DEFAULT 0,
    UNIQUE (dataset_id, name)
);

CREATE TABLE units (
    dataset_id     INTEGER NOT NULL REFERENCES datasets(id),
    seq            INTEGER NOT NULL,
    key            TEXT NOT NULL,
    -- little-endian IEEE 754 doubles, one per feature, in the dataset's order
    features       BLOB NOT NULL,
    treatment      INTEGER NOT NULL CHECK (treatment IN (0, 1)),
    propensity     REAL CHECK (propensity IS NULL OR (propensity > 0 AND propensity < 1)),
    cohort         TEXT NOT NULL,
    assigned_at_ms INTEGER NOT NULL,
    received_at_ms INTEGER NOT NULL,
    PRIMARY KEY (dataset_id, seq),
    UNIQUE (dataset_id, key)
) WITHOUT ROWID;

CREATE TABLE outcomes (
    dataset_id     INTEGER NOT NULL REFERENCES datasets(id),
    unit_seq       INTEGER NOT NULL,
    -- arrival order of outcomes within the dataset, for "recent" windows
    seq            INTEGER NOT NULL,
    value          REAL NOT NULL,
    observed_at_ms INTEGER NOT NULL,
    received_at_ms INTEGER NOT NULL,
    PRIMARY KEY (dataset_id, unit_seq)
) WITHOUT ROWID;

CREATE TABLE predictions (
    dataset_id      INTEGER NOT NULL REFERENCES datasets(id),
    model_id        INTEGER NOT NULL REFERENCES models(id),
    unit_seq        INTEGER NOT NULL,
    effect          REAL NOT NULL,
    predicted_at_ms INTEGER NOT NULL,
    received_at_ms  INTEGER NOT NULL,
    PRIMARY KEY (dataset_id, model_id, unit_seq)
) WITHOUT ROWID;

-- One row per full cross-fitted refit. A fit is reproduced exactly from
-- the units whose outcome sequence number is at most last_outcome_seq, in
-- unit order, with the recorded seed.
CREATE TABLE nuisance_fits (
    id               INTEGER PRIMARY KEY,
    dataset_id       INTEGER NOT NULL REFERENCES datasets(id),
    fitted_at_ms     INTEGER NOT NULL,
    units            INTEGER NOT NULL,
    last_outcome_seq INTEGER NOT NULL,
    seed             INTEGER NOT NULL,
    report_json      TEXT NOT NULL
);

CREATE TABLE snapshots (
    id             INTEGER PRIMARY KEY,
    dataset_id     INTEGER NOT NULL REFERENCES datasets(id),
    computed_at_ms INTEGER NOT NULL,
    fit_id         INTEGER REFERENCES nuisance_fits(id),
    refitted       INTEGER NOT NULL,
    millis         REAL NOT NULL
);

-- The scoreboards of a snapshot, one per window, protobuf-encoded.
CREATE TABLE snapshot_boards (
    snapshot_id INTEGER NOT NULL REFERENCES snapshots(id),
    window      TEXT NOT NULL,
    board       BLOB NOT NULL,
    PRIMARY KEY (snapshot_id, window)
) WITHOUT ROWID;

-- Per model and estimator values of every snapshot, for history queries.
CREATE TABLE snapshot_scores (
    dataset_id     INTEGER NOT NULL,
    model          TEXT NOT NULL,
    estimator      TEXT NOT NULL,
    window         TEXT NOT NULL,
    snapshot_id    INTEGER NOT NULL,
    computed_at_ms INTEGER NOT NULL,
    estimate       REAL NOT NULL,
    se             REAL NOT NULL,
    rank           INTEGER NOT NULL,
    units          INTEGER NOT NULL,
    PRIMARY KEY (dataset_id, model, estimator, window, snapshot_id)
) WITHOUT ROWID;

CREATE TABLE events (
    id           INTEGER PRIMARY KEY,
    dataset_id   INTEGER NOT NULL REFERENCES datasets(id),
    kind         TEXT NOT NULL,
    at_ms        INTEGER NOT NULL,
    snapshot_id  INTEGER NOT NULL,
    summary      TEXT NOT NULL,
    details_json TEXT NOT NULL
);
CREATE INDEX events_by_dataset ON events (dataset_id, id);
