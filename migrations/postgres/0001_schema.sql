-- Meterveil service schema (PostgreSQL). The same tables and rules as the
-- SQLite migrations, consolidated: integers are BIGINT (the store reads and
-- binds 64-bit values), estimates DOUBLE PRECISION, flags 0/1 BIGINT. Nothing
-- here can hold a raw reading: interval data is stored only as quantizer levels.

CREATE TABLE feeders (
    feeder_id   TEXT PRIMARY KEY NOT NULL,
    name        TEXT NOT NULL DEFAULT '',
    created_at  BIGINT NOT NULL,
    -- IANA zone the feeder's customers are settled in.
    time_zone   TEXT NOT NULL DEFAULT 'UTC'
);

CREATE TABLE meters (
    meter_id    TEXT PRIMARY KEY NOT NULL,
    feeder_id   TEXT NOT NULL REFERENCES feeders (feeder_id),
    created_at  BIGINT NOT NULL
);
CREATE INDEX meters_by_feeder ON meters (feeder_id);

-- One row per published version; a version readings refer to (in_use = 1) is
-- never changed again.
CREATE TABLE dither_profiles (
    feeder_id       TEXT NOT NULL REFERENCES feeders (feeder_id),
    version         BIGINT NOT NULL CHECK (version >= 1),
    noise           TEXT NOT NULL CHECK (noise IN ('gaussian', 'logistic')),
    scale_kw        DOUBLE PRECISION NOT NULL CHECK (scale_kw > 0),
    boundaries_kw   TEXT NOT NULL,
    interval_s      BIGINT NOT NULL CHECK (interval_s IN (900, 1800, 3600)),
    send_registers  BIGINT NOT NULL CHECK (send_registers IN (0, 1)),
    created_at      BIGINT NOT NULL,
    in_use          BIGINT NOT NULL DEFAULT 0 CHECK (in_use IN (0, 1)),
    PRIMARY KEY (feeder_id, version)
);

CREATE TABLE ingest_batches (
    batch_id     TEXT PRIMARY KEY NOT NULL,
    gateway_id   TEXT NOT NULL,
    feeder_id    TEXT NOT NULL REFERENCES feeders (feeder_id),
    body_sha256  TEXT NOT NULL,
    received_at  BIGINT NOT NULL,
    ack          TEXT NOT NULL
);

CREATE TABLE readings (
    meter_id         TEXT NOT NULL REFERENCES meters (meter_id),
    interval_start   BIGINT NOT NULL,
    level            BIGINT NOT NULL CHECK (level BETWEEN 0 AND 63),
    profile_version  BIGINT NOT NULL,
    batch_id         TEXT NOT NULL,
    PRIMARY KEY (meter_id, interval_start)
);

CREATE TABLE register_reads (
    meter_id   TEXT NOT NULL REFERENCES meters (meter_id),
    read_at    BIGINT NOT NULL,
    wh_total   BIGINT NOT NULL CHECK (wh_total >= 0),
    batch_id   TEXT NOT NULL,
    PRIMARY KEY (meter_id, read_at)
);

-- Jobs: a worker claims a queued job (or one whose lease ran out) with
-- FOR UPDATE SKIP LOCKED, renews its lease while it works, and may finish the
-- job only while it holds it; results are written in the finishing transaction.
CREATE TABLE recovery_jobs (
    job_id           TEXT PRIMARY KEY NOT NULL,
    feeder_id        TEXT NOT NULL REFERENCES feeders (feeder_id),
    window_start     BIGINT NOT NULL,
    window_end       BIGINT NOT NULL,
    params           TEXT NOT NULL,
    profile_version  BIGINT,
    state            TEXT NOT NULL CHECK (state IN ('queued', 'running', 'done', 'failed')),
    progress         DOUBLE PRECISION NOT NULL DEFAULT 0,
    message          TEXT NOT NULL DEFAULT '',
    created_at       BIGINT NOT NULL,
    started_at       BIGINT,
    finished_at      BIGINT,
    diagnostics      TEXT,
    error            TEXT,
    worker           TEXT,
    lease_until      BIGINT,
    attempts         BIGINT NOT NULL DEFAULT 0
);
CREATE INDEX recovery_jobs_by_state ON recovery_jobs (state, created_at);

CREATE TABLE recovered_intervals (
    job_id          TEXT NOT NULL REFERENCES recovery_jobs (job_id),
    meter_id        TEXT NOT NULL,
    interval_start  BIGINT NOT NULL,
    estimate_kw     DOUBLE PRECISION NOT NULL,
    flag            TEXT NOT NULL CHECK (flag IN ('derived', 'estimated', 'corrected')),
    band_low_kw     DOUBLE PRECISION NOT NULL,
    band_high_kw    DOUBLE PRECISION NOT NULL,
    PRIMARY KEY (job_id, meter_id, interval_start)
);

CREATE TABLE analysis_jobs (
    job_id       TEXT PRIMARY KEY NOT NULL,
    kind         TEXT NOT NULL CHECK (kind IN ('cluster', 'audit', 'calibrate')),
    params       TEXT NOT NULL,
    state        TEXT NOT NULL CHECK (state IN ('queued', 'running', 'done', 'failed')),
    progress     DOUBLE PRECISION NOT NULL DEFAULT 0,
    message      TEXT NOT NULL DEFAULT '',
    created_at   BIGINT NOT NULL,
    started_at   BIGINT,
    finished_at  BIGINT,
    result       TEXT,
    error        TEXT,
    worker       TEXT,
    lease_until  BIGINT,
    attempts     BIGINT NOT NULL DEFAULT 0
);
CREATE INDEX analysis_jobs_by_state ON analysis_jobs (state, created_at);

CREATE TABLE cluster_assignments (
    job_id      TEXT NOT NULL REFERENCES analysis_jobs (job_id),
    meter_id    TEXT NOT NULL,
    feeder_id   TEXT NOT NULL,
    cluster     BIGINT NOT NULL CHECK (cluster >= 0),
    confidence  DOUBLE PRECISION NOT NULL CHECK (confidence >= 0 AND confidence <= 1),
    PRIMARY KEY (job_id, meter_id)
);

-- Provisioned gateways; no key is stored (keys derive from the service's
-- master key and the key generation).
CREATE TABLE gateways (
    gateway_id     TEXT PRIMARY KEY NOT NULL,
    feeder_id      TEXT NOT NULL REFERENCES feeders (feeder_id),
    key_generation BIGINT NOT NULL,
    last_sequence  BIGINT NOT NULL DEFAULT 0,
    created_at     BIGINT NOT NULL
);

CREATE TABLE gateway_sequences (
    gateway_id   TEXT NOT NULL REFERENCES gateways (gateway_id),
    sequence     BIGINT NOT NULL,
    body_sha256  TEXT NOT NULL,
    batch_id     TEXT NOT NULL,
    PRIMARY KEY (gateway_id, sequence)
);
