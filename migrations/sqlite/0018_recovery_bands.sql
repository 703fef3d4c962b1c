-- A recovery's band model (README, "Group loads and their bands"): each
-- meter's spread and the bootstrap's shifts, as one JSON document written
-- before the job is marked done. Group loads, band and daily energies read
-- it instead of refitting the spreads per request.
CREATE TABLE recovery_bands (
    job_id TEXT PRIMARY KEY REFERENCES recovery_jobs (job_id),
    body TEXT NOT NULL
);
