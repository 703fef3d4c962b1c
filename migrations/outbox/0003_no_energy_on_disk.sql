-- The gateway keeps no energy on disk but completed-period register advances
-- waiting for upload: the running total moves to memory (a crash costs the
-- interrupted period's read, never a level). Unsent cumulative reads of an
-- older outbox are dropped with their table; the service treats them as missing.
ALTER TABLE meter_state DROP COLUMN register_mwh;
ALTER TABLE meter_state DROP COLUMN last_read_at;

DROP TABLE pending_registers;
CREATE TABLE pending_registers (
    meter_id      TEXT NOT NULL,
    period_start  INTEGER NOT NULL,
    read_at       INTEGER NOT NULL,
    wh            INTEGER NOT NULL,
    batch_id      TEXT,
    PRIMARY KEY (meter_id, read_at)
);
CREATE INDEX pending_registers_by_batch ON pending_registers (batch_id);
