-- plumbline store, version 11: history for datasets with arms. A value is
-- on one contrast's board (an arm against the reference), so each history
-- row names that arm; every row stored before is a binary dataset's and
-- reads as arm '' (no contrast). The arm joins the key, since one model
-- has a value per contrast in the same snapshot and window. SQLite changes
-- no key in place: the table is rebuilt, rows copied as they are.

CREATE TABLE snapshot_scores_v11 (
    dataset_id     INTEGER NOT NULL,
    model          TEXT NOT NULL,
    arm            TEXT NOT NULL DEFAULT '',
    estimator      TEXT NOT NULL,
    window         TEXT NOT NULL,
    snapshot_id    INTEGER NOT NULL,
    computed_at_ms INTEGER NOT NULL,
    estimate       REAL NOT NULL,
    se             REAL NOT NULL,
    rank           INTEGER NOT NULL,
    units          INTEGER NOT NULL,
    PRIMARY KEY (dataset_id, model, arm, estimator, window, snapshot_id)
) WITHOUT ROWID;

INSERT INTO snapshot_scores_v11
    SELECT dataset_id, model, '', estimator, window, snapshot_id, computed_at_ms,
           estimate, se, rank, units
    FROM snapshot_scores;

DROP TABLE snapshot_scores;

ALTER TABLE snapshot_scores_v11 RENAME TO snapshot_scores;
