-- Settlement runs. A feeder's schedule (README, "Settlement runs") says when
-- each settlement day's runs start: the initial run once the day's readings
-- are complete enough or at a local time, later runs some days after. A run is
-- one recovery job over the trailing window that ends with its day; when the
-- job finishes, the day's settled figures are frozen into the run (`days`, the
-- JSON of each meter's daily figures), so that a run quoted on an invoice never
-- changes. Runs of one day are numbered 1, 2, … in the order they were made;
-- a kind is made once per day.
CREATE TABLE settlement_schedules (
    feeder_id TEXT PRIMARY KEY NOT NULL REFERENCES feeders (feeder_id),
    body TEXT NOT NULL,
    updated_at BIGINT NOT NULL
);

CREATE TABLE settlement_runs (
    run_id TEXT PRIMARY KEY NOT NULL,
    feeder_id TEXT NOT NULL REFERENCES feeders (feeder_id),
    day_start BIGINT NOT NULL,
    kind TEXT NOT NULL,
    version BIGINT NOT NULL,
    job_id TEXT NOT NULL REFERENCES recovery_jobs (job_id),
    started_by TEXT NOT NULL,
    due_at BIGINT NOT NULL,
    created_at BIGINT NOT NULL,
    days TEXT,
    UNIQUE (feeder_id, day_start, kind),
    UNIQUE (feeder_id, day_start, version)
);
