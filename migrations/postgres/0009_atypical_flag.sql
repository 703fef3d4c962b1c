-- A fourth flag for recovered intervals: `atypical`, a reading the fit left
-- out as a load the population's shape does not hold, not judged wrong.
ALTER TABLE recovered_intervals DROP CONSTRAINT IF EXISTS recovered_intervals_flag_check;
ALTER TABLE recovered_intervals ADD CONSTRAINT recovered_intervals_flag_check
    CHECK (flag IN ('derived', 'estimated', 'corrected', 'atypical'));
