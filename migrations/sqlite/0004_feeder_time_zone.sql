-- The IANA time zone a feeder's customers are settled in: interval exports carry
-- local times in it. Existing feeders keep UTC.
ALTER TABLE feeders ADD COLUMN time_zone TEXT NOT NULL DEFAULT 'UTC';
