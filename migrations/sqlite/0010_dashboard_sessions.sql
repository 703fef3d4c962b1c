-- Dashboard sign-in in the database: every serve process on it knows the same
-- sessions, and they hold across restarts. Only SHA-256 digests of the secrets
-- are stored, so reading these tables lets no one sign in.
CREATE TABLE dashboard_sessions (
    token_sha256 TEXT PRIMARY KEY,
    created_at BIGINT NOT NULL,
    expires_at BIGINT NOT NULL
);
CREATE TABLE dashboard_codes (
    code_sha256 TEXT PRIMARY KEY,
    expires_at BIGINT NOT NULL
);
