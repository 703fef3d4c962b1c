-- Meterveil service schema (SQLite). Nothing here can hold a raw reading:
-- interval data is stored only as quantizer levels, with the profile version
-- that made them. Register reads are exact cumulative Wh, sent only where the
-- feeder's profile allows it.

CREATE TABLE feeders (
    feeder_id   TEXT PRIMARY KEY NOT NULL,
    name        TEXT NOT NULL DEFAULT '',
    created_at  INTEGER NOT NULL
);

CREATE TABLE meters (
    meter_id    TEXT PRIMARY KEY NOT NULL,
    feeder_id   TEXT NOT NULL REFERENCES feeders (feeder_id),
    created_at  INTEGER NOT NULL
);
CREATE INDEX meters_by_feeder ON meters (feeder_id);

-- One row per published version. A version that readings refer to (in_use = 1)
-- is never changed again.
CREATE TABLE dither_profiles (
    feeder_id       TEXT NOT NULL REFERENCES feeders (feeder_id),
    version         INTEGER NOT NULL CHECK (version >= 1),
    noise           TEXT NOT NULL CHECK (noise IN ('gaussian', 'logistic')),
    scale_kw        REAL NOT NULL CHECK (scale_kw > 0),
    boundaries_kw   TEXT NOT NULL,
    interval_s      INTEGER NOT NULL CHECK (interval_s IN (900, 1800, 3600)),
    send_registers  INTEGER NOT NULL CHECK (send_registers IN (0, 1)),
    created_at      INTEGER NOT NULL,
    in_use          INTEGER NOT NULL DEFAULT 0 CHECK (in_use IN (0, 1)),
    PRIMARY KEY (feeder_id, version)
);

-- Every acknowledged batch, so a re-send returns the same acknowledgement.
CREATE TABLE ingest_batches (
    batch_id     TEXT PRIMARY KEY NOT NULL,
    gateway_id   TEXT NOT NULL,
    feeder_id    TEXT NOT NULL REFERENCES feeders (feeder_id),
    body_sha256  TEXT NOT NULL,
    received_at  INTEGER NOT NULL,
    ack          TEXT NOT NULL
);

CREATE TABLE readings (
    meter_id         TEXT NOT NULL REFERENCES meters (meter_id),
    interval_start   INTEGER NOT NULL,
    level            INTEGER NOT NULL CHECK (level BETWEEN 0 AND 63),
    profile_version  INTEGER NOT NULL,
    batch_id         TEXT NOT NULL,
    PRIMARY KEY (meter_id, interval_start)
) WITHOUT ROWID;

CREATE TABLE register_reads (
    meter_id   TEXT NOT NULL REFERENCES meters (meter_id),
    read_at    INTEGER NOT NULL,
    wh_total   INTEGER NOT NULL CHECK (wh_total >= 0),
    batch_id   TEXT NOT NULL,
    PRIMARY KEY (meter_id, read_at)
) WITHOUT ROWID;
