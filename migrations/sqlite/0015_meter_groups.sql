-- Groups of meters an operator names (a transformer, a portfolio, a customer
-- class); a meter may sit in several. Replaced whole by each definition.
CREATE TABLE meter_groups (
    group_name TEXT NOT NULL,
    meter_id TEXT NOT NULL REFERENCES meters (meter_id),
    defined_at BIGINT NOT NULL,
    PRIMARY KEY (group_name, meter_id)
);
