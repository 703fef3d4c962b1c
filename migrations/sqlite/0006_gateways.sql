-- Provisioned gateways. No key is stored: a gateway's key is derived from the
-- service's master key and its key generation (provisioning again rotates it).
CREATE TABLE gateways (
    gateway_id     TEXT PRIMARY KEY NOT NULL,
    feeder_id      TEXT NOT NULL REFERENCES feeders (feeder_id),
    key_generation INTEGER NOT NULL,
    last_sequence  INTEGER NOT NULL DEFAULT 0,
    created_at     INTEGER NOT NULL
);

-- Every accepted signed upload: its sequence number and body, so that a replay
-- is recognised and a reused number with another body refused.
CREATE TABLE gateway_sequences (
    gateway_id   TEXT NOT NULL REFERENCES gateways (gateway_id),
    sequence     INTEGER NOT NULL,
    body_sha256  TEXT NOT NULL,
    batch_id     TEXT NOT NULL,
    PRIMARY KEY (gateway_id, sequence)
) WITHOUT ROWID;
