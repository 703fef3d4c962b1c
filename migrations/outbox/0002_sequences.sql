-- Signed uploads: every batch gets the gateway's next sequence number when it is
-- formed, kept across retries so that a retry is recognised as the same upload.
ALTER TABLE open_batches ADD COLUMN sequence INTEGER;
CREATE TABLE upload_sequence (
    id    INTEGER PRIMARY KEY CHECK (id = 1),
    last  INTEGER NOT NULL
);
INSERT INTO upload_sequence (id, last) VALUES (1, 0);
