-- plumbline store, version 4: the stream watch behind the alerts (running
-- sums, confidence sequences and change detectors over per-unit values fixed
-- when each unit was first scored), one row per dataset, written in the same
-- transaction as the snapshot whose recompute produced it, so that a restart
-- resumes the watch exactly where the last stored recompute left it.

CREATE TABLE watch_states (
    dataset_id  INTEGER PRIMARY KEY REFERENCES datasets(id),
    snapshot_id INTEGER NOT NULL,
    -- JSON of estimate::watch::Watch
    state       TEXT NOT NULL
);
