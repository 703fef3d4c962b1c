-- Who did what on the dashboard: a session and its one-time code carry the
-- name the operator signed in with, and each recorded action names it.
ALTER TABLE dashboard_sessions ADD COLUMN operator_name TEXT NOT NULL DEFAULT 'operator';
ALTER TABLE dashboard_codes ADD COLUMN operator_name TEXT NOT NULL DEFAULT 'operator';
ALTER TABLE dashboard_actions ADD COLUMN operator_name TEXT NOT NULL DEFAULT 'operator';
-- A profile version's history: who published it (the HTTP API, a dashboard
-- operator, or a calibration that published its own recommendation), and when
-- an upload first used it.
ALTER TABLE dither_profiles ADD COLUMN published_by TEXT NOT NULL DEFAULT 'operator (HTTP API)';
ALTER TABLE dither_profiles ADD COLUMN first_used_at BIGINT;
