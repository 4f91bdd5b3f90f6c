-- plumbline store, version 9: datasets with more than two arms. A unit's
-- treatment column holds its arm's index in the dataset's declared arms (0
-- the reference), so a binary dataset's rows (0 or 1) are unchanged; the
-- check on it widens to the 32 arms a spec allows. A prediction names the
-- arm whose effect against the reference it is: every prediction stored
-- before is a binary dataset's, for the treatment, arm 1. One model may
-- then predict a unit once per arm, so the arm joins the key. SQLite
-- changes neither a check nor a key in place: both tables are rebuilt, rows
-- copied as they are.

CREATE TABLE units_v9 (
    dataset_id     INTEGER NOT NULL REFERENCES datasets(id),
    seq            INTEGER NOT NULL,
    key            TEXT NOT NULL,
    -- little-endian IEEE 754 doubles, one per feature, in the dataset's order
    features       BLOB NOT NULL,
    -- 0 or 1 on a binary dataset; the arm's index on a dataset with arms
    treatment      INTEGER NOT NULL CHECK (treatment >= 0 AND treatment < 32),
    propensity     REAL CHECK (propensity IS NULL OR (propensity > 0 AND propensity < 1)),
    cohort         TEXT NOT NULL,
    assigned_at_ms INTEGER NOT NULL,
    received_at_ms INTEGER NOT NULL,
    PRIMARY KEY (dataset_id, seq)
) WITHOUT ROWID;

INSERT INTO units_v9
    SELECT dataset_id, seq, key, features, treatment, propensity, cohort,
           assigned_at_ms, received_at_ms
    FROM units;

DROP TABLE units;

ALTER TABLE units_v9 RENAME TO units;

CREATE TABLE predictions_v9 (
    dataset_id      INTEGER NOT NULL REFERENCES datasets(id),
    model_id        INTEGER NOT NULL REFERENCES models(id),
    unit_seq        INTEGER NOT NULL,
    effect          REAL NOT NULL,
    predicted_at_ms INTEGER NOT NULL,
    received_at_ms  INTEGER NOT NULL,
    seq             INTEGER NOT NULL DEFAULT 0,
    -- the arm whose effect against arm 0 this is; 1 on a binary dataset
    arm             INTEGER NOT NULL DEFAULT 1 CHECK (arm >= 1 AND arm < 32),
    PRIMARY KEY (dataset_id, model_id, arm, unit_seq)
) WITHOUT ROWID;

INSERT INTO predictions_v9
    SELECT dataset_id, model_id, unit_seq, effect, predicted_at_ms, received_at_ms, seq, 1
    FROM predictions;

DROP TABLE predictions;

ALTER TABLE predictions_v9 RENAME TO predictions;
