-- Register reads become advances: the energy of one completed period
-- [period_start, read_at), as gateways now send them (a gateway keeps no running
-- energy total on disk). Stored cumulative reads are converted pairwise:
-- consecutive reads of a meter bound one advance.
CREATE TABLE register_advances (
    meter_id      TEXT NOT NULL REFERENCES meters (meter_id),
    period_start  BIGINT NOT NULL,
    read_at       BIGINT NOT NULL CHECK (read_at > period_start),
    wh            BIGINT NOT NULL CHECK (wh >= 0),
    batch_id      TEXT NOT NULL,
    PRIMARY KEY (meter_id, read_at)
);

INSERT INTO register_advances (meter_id, period_start, read_at, wh, batch_id)
SELECT meter_id, prev_at, read_at, wh_total - prev_wh, batch_id FROM (
    SELECT meter_id, read_at, wh_total, batch_id,
           LAG(read_at) OVER (PARTITION BY meter_id ORDER BY read_at) AS prev_at,
           LAG(wh_total) OVER (PARTITION BY meter_id ORDER BY read_at) AS prev_wh
    FROM register_reads
) AS pairs WHERE prev_at IS NOT NULL AND wh_total >= prev_wh;

DROP TABLE register_reads;
