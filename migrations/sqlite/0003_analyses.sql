-- Analysis jobs (clustering, privacy audit, dither calibration) run over the
-- results of recovery jobs or over stored levels. Like recoveries, a job's
-- results are written in the same transaction that marks it done.
CREATE TABLE analysis_jobs (
    job_id       TEXT PRIMARY KEY NOT NULL,
    kind         TEXT NOT NULL CHECK (kind IN ('cluster', 'audit', 'calibrate')),
    params       TEXT NOT NULL,
    state        TEXT NOT NULL CHECK (state IN ('queued', 'running', 'done', 'failed')),
    progress     REAL NOT NULL DEFAULT 0,
    message      TEXT NOT NULL DEFAULT '',
    created_at   INTEGER NOT NULL,
    started_at   INTEGER,
    finished_at  INTEGER,
    result       TEXT,
    error        TEXT
);

CREATE TABLE cluster_assignments (
    job_id      TEXT NOT NULL REFERENCES analysis_jobs (job_id),
    meter_id    TEXT NOT NULL,
    feeder_id   TEXT NOT NULL,
    cluster     INTEGER NOT NULL CHECK (cluster >= 0),
    confidence  REAL NOT NULL CHECK (confidence >= 0 AND confidence <= 1),
    PRIMARY KEY (job_id, meter_id)
) WITHOUT ROWID;
