-- Each feeder's privacy and accuracy targets, set by its operator: the
-- strongest attacker's event F1 for one captured meter at most this, and the
-- utility's median daily-energy error at most that (a fraction).
CREATE TABLE feeder_targets (
    feeder_id TEXT PRIMARY KEY,
    event_f1_max DOUBLE PRECISION NOT NULL,
    daily_energy_error_max DOUBLE PRECISION NOT NULL,
    updated_at BIGINT NOT NULL
);
