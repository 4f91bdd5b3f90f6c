-- plumbline store, version 3: the units table without its (dataset, key)
-- unique index. Client keys arrive in no useful order (counters printed as
-- text, UUIDs), so that index took a random page for every inserted unit:
-- once it outgrew the page cache, each batch of 1,000 units wrote about as
-- many index pages to the WAL as it wrote units, and ingest slowed with the
-- history. Keys stay unique per dataset: intake checks every key against
-- the service's in-memory key table under the dataset's lock (one writer
-- per dataset), and start-up refuses a store that holds a key twice.

CREATE TABLE units_v3 (
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
    PRIMARY KEY (dataset_id, seq)
) WITHOUT ROWID;

INSERT INTO units_v3
    SELECT dataset_id, seq, key, features, treatment, propensity, cohort,
           assigned_at_ms, received_at_ms
    FROM units;

DROP TABLE units;

ALTER TABLE units_v3 RENAME TO units;
