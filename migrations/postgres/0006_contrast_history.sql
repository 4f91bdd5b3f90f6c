-- plumbline store on PostgreSQL, version 6: history for datasets with
-- arms. A value is on one contrast's board (an arm against the reference),
-- so each history row names that arm; every row stored before is a binary
-- dataset's and reads as arm '' (no contrast). The arm joins the key,
-- since one model has a value per contrast in the same snapshot and window.

ALTER TABLE snapshot_scores ADD COLUMN arm TEXT NOT NULL DEFAULT '';
ALTER TABLE snapshot_scores DROP CONSTRAINT snapshot_scores_pkey;
ALTER TABLE snapshot_scores
    ADD PRIMARY KEY (dataset_id, model, arm, estimator, window_key, snapshot_id);
