-- plumbline store, version 6: predictions carry their arrival order within
-- the dataset (as units and outcomes already do), and each dataset has a
-- lease with a fencing epoch. On SQLite one server holds every lease; the
-- table is there so that both backends keep the same contract.

ALTER TABLE predictions ADD COLUMN seq INTEGER NOT NULL DEFAULT 0;

-- Predictions stored before this version are numbered in the order they
-- were received.
UPDATE predictions SET seq = numbered.n
FROM (
    SELECT dataset_id, model_id, unit_seq,
           ROW_NUMBER() OVER (
               PARTITION BY dataset_id ORDER BY received_at_ms, model_id, unit_seq
           ) - 1 AS n
    FROM predictions
) AS numbered
WHERE predictions.dataset_id = numbered.dataset_id
  AND predictions.model_id = numbered.model_id
  AND predictions.unit_seq = numbered.unit_seq;

CREATE TABLE dataset_leases (
    dataset_id    INTEGER PRIMARY KEY REFERENCES datasets(id),
    holder        TEXT NOT NULL,
    epoch         INTEGER NOT NULL,
    expires_at_ms INTEGER NOT NULL
);
