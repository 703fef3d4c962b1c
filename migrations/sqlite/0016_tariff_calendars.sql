-- Each feeder's tariff calendars, versioned: a version is never changed; a
-- new calendar is the next version. The body is the calendar file as given
-- (README, "Tariff calendars"), checked before it is stored.
CREATE TABLE tariff_calendars (
    feeder_id TEXT NOT NULL REFERENCES feeders (feeder_id),
    version BIGINT NOT NULL,
    name TEXT NOT NULL,
    body TEXT NOT NULL,
    created_at BIGINT NOT NULL,
    PRIMARY KEY (feeder_id, version)
);
