-- Recovery jobs and their results. Results are estimates made by the population
-- model, not readings: they become visible only when the job is done, written in
-- the same transaction that marks it so.
CREATE TABLE recovery_jobs (
    job_id           TEXT PRIMARY KEY NOT NULL,
    feeder_id        TEXT NOT NULL REFERENCES feeders (feeder_id),
    window_start     INTEGER NOT NULL,
    window_end       INTEGER NOT NULL,
    params           TEXT NOT NULL,
    profile_version  INTEGER,
    state            TEXT NOT NULL CHECK (state IN ('queued', 'running', 'done', 'failed')),
    progress         REAL NOT NULL DEFAULT 0,
    message          TEXT NOT NULL DEFAULT '',
    created_at       INTEGER NOT NULL,
    started_at       INTEGER,
    finished_at      INTEGER,
    diagnostics      TEXT,
    error            TEXT
);

CREATE TABLE recovered_intervals (
    job_id          TEXT NOT NULL REFERENCES recovery_jobs (job_id),
    meter_id        TEXT NOT NULL,
    interval_start  INTEGER NOT NULL,
    estimate_kw     REAL NOT NULL,
    flag            TEXT NOT NULL CHECK (flag IN ('derived', 'estimated', 'corrected')),
    band_low_kw     REAL NOT NULL,
    band_high_kw    REAL NOT NULL,
    PRIMARY KEY (job_id, meter_id, interval_start)
) WITHOUT ROWID;
