-- A fourth flag for recovered intervals: `atypical`, a reading the fit left
-- out as a load the population's shape does not hold, not judged wrong.
-- SQLite cannot change a CHECK constraint in place, so the table is rebuilt.
CREATE TABLE recovered_intervals_new (
    job_id          TEXT NOT NULL REFERENCES recovery_jobs (job_id),
    meter_id        TEXT NOT NULL,
    interval_start  INTEGER NOT NULL,
    estimate_kw     REAL NOT NULL,
    flag            TEXT NOT NULL CHECK (flag IN ('derived', 'estimated', 'corrected', 'atypical')),
    band_low_kw     REAL NOT NULL,
    band_high_kw    REAL NOT NULL,
    PRIMARY KEY (job_id, meter_id, interval_start)
) WITHOUT ROWID;
INSERT INTO recovered_intervals_new SELECT job_id, meter_id, interval_start, estimate_kw, flag, band_low_kw, band_high_kw
    FROM recovered_intervals;
DROP TABLE recovered_intervals;
ALTER TABLE recovered_intervals_new RENAME TO recovered_intervals;
