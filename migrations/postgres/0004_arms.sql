-- plumbline store on PostgreSQL, version 4: datasets with more than two
-- arms. A unit's treatment column holds its arm's index in the dataset's
-- declared arms (0 the reference), so a binary dataset's rows (0 or 1) are
-- unchanged; the check on it widens to the 32 arms a spec allows. A
-- prediction names the arm whose effect against the reference it is:
-- every prediction stored before is a binary dataset's, for the treatment,
-- arm 1. One model may then predict a unit once per arm, so the arm joins
-- the key.

ALTER TABLE units DROP CONSTRAINT units_treatment_check;
ALTER TABLE units ADD CONSTRAINT units_treatment_check
    CHECK (treatment >= 0 AND treatment < 32);

ALTER TABLE predictions ADD COLUMN arm SMALLINT NOT NULL DEFAULT 1
    CHECK (arm >= 1 AND arm < 32);
ALTER TABLE predictions DROP CONSTRAINT predictions_pkey;
ALTER TABLE predictions ADD PRIMARY KEY (dataset_id, model_id, arm, unit_seq);
