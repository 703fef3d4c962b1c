-- Durable jobs: a worker claims a queued job (or one whose lease ran out, its
-- worker having died) by writing its id and a lease end; it renews the lease
-- while it works and may only finish the job while it still holds it.
ALTER TABLE recovery_jobs ADD COLUMN worker TEXT;
ALTER TABLE recovery_jobs ADD COLUMN lease_until INTEGER;
ALTER TABLE recovery_jobs ADD COLUMN attempts INTEGER NOT NULL DEFAULT 0;
ALTER TABLE analysis_jobs ADD COLUMN worker TEXT;
ALTER TABLE analysis_jobs ADD COLUMN lease_until INTEGER;
ALTER TABLE analysis_jobs ADD COLUMN attempts INTEGER NOT NULL DEFAULT 0;
CREATE INDEX recovery_jobs_by_state ON recovery_jobs (state, created_at);
CREATE INDEX analysis_jobs_by_state ON analysis_jobs (state, created_at);
