-- Gateway outbox (SQLite, WAL, synchronous = FULL). It holds quantizer levels
-- waiting for upload, never raw readings.

CREATE TABLE pending_levels (
    meter_id         TEXT NOT NULL,
    interval_start   INTEGER NOT NULL,
    level            INTEGER NOT NULL CHECK (level BETWEEN 0 AND 63),
    profile_version  INTEGER NOT NULL,
    -- NULL until the row is claimed by a batch; a claimed row keeps its batch id
    -- across retries so the service can deduplicate.
    batch_id         TEXT,
    PRIMARY KEY (meter_id, interval_start)
);
CREATE INDEX pending_levels_by_batch ON pending_levels (batch_id);

-- Exact midnight register reads, only when the feeder's profile allows them.
CREATE TABLE pending_registers (
    meter_id   TEXT NOT NULL,
    read_at    INTEGER NOT NULL,
    wh_total   INTEGER NOT NULL,
    batch_id   TEXT,
    PRIMARY KEY (meter_id, read_at)
);
CREATE INDEX pending_registers_by_batch ON pending_registers (batch_id);

CREATE TABLE open_batches (
    batch_id    TEXT PRIMARY KEY NOT NULL,
    created_at  INTEGER NOT NULL,
    attempts    INTEGER NOT NULL DEFAULT 0,
    last_error  TEXT
);

-- Batches the service refused for good (4xx). Kept, with the service's reason,
-- for an operator to inspect; nothing is silently dropped.
CREATE TABLE refused_batches (
    batch_id    TEXT PRIMARY KEY NOT NULL,
    status      INTEGER NOT NULL,
    reason      TEXT NOT NULL,
    body        TEXT NOT NULL,
    refused_at  INTEGER NOT NULL
);

-- Per-meter progress. register_mwh is the gateway's own cumulative register
-- (milli-Wh of forwarded intervals), kept only when the profile sends register
-- reads; last_read_at is the latest midnight a read was made for.
CREATE TABLE meter_state (
    meter_id             TEXT PRIMARY KEY NOT NULL,
    last_interval_start  INTEGER NOT NULL,
    register_mwh         INTEGER,
    last_read_at         INTEGER
);

-- How far each input source has been read (byte offset), so a restart resumes.
CREATE TABLE source_progress (
    source    TEXT PRIMARY KEY NOT NULL,
    position  INTEGER NOT NULL
);

-- The last dither profile pulled from the service, for starts while it is unreachable.
CREATE TABLE profile_cache (
    feeder_id  TEXT PRIMARY KEY NOT NULL,
    record     TEXT NOT NULL
);
