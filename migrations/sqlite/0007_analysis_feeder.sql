-- The feeder an analysis job concerns (audits and calibrations; a clustering
-- when all its recoveries are of one feeder), so workers sharded by feeder
-- claim only their own. NULL: town-wide, for an unsharded worker.
ALTER TABLE analysis_jobs ADD COLUMN feeder_id TEXT;
