-- +goose Up
-- A password that Trialogue generated (trialogue user add without
-- --password-stdin) is good for one login: the first login must replace it.
ALTER TABLE users ADD COLUMN must_change INTEGER NOT NULL DEFAULT 0;

-- Pilot rounds count their respondents from the round's start, and the
-- transcript list filters on the pilot mark.
CREATE INDEX sessions_pilot ON sessions (study_id, pilot, created_at);

-- Expired console sessions are found by user when a password changes.
CREATE INDEX console_sessions_user ON console_sessions (user_id);

-- +goose Down
DROP INDEX console_sessions_user;
DROP INDEX sessions_pilot;
ALTER TABLE users DROP COLUMN must_change;
