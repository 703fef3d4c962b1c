-- A profile's register period: none, daily (UTC days), weekly or monthly (in the
-- feeder's time zone). Existing profiles keep what send_registers said.
ALTER TABLE dither_profiles ADD COLUMN register_period TEXT NOT NULL DEFAULT 'none'
    CHECK (register_period IN ('none', 'daily', 'weekly', 'monthly'));
UPDATE dither_profiles SET register_period = 'daily' WHERE send_registers = 1;
