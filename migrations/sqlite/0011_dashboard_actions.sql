-- What operators did from the dashboard: when, which session (its digest),
-- which action, and its details.
CREATE TABLE dashboard_actions (
    at BIGINT NOT NULL,
    session_sha256 TEXT NOT NULL,
    action TEXT NOT NULL,
    detail TEXT NOT NULL
);
