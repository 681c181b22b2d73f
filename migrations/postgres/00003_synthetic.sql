-- +goose Up
-- PostgreSQL: the same as sqlite/00003_synthetic.sql.
-- Sessions of synthetic respondents (trialogue simulate): load tests and
-- dry runs of prompts. They are left out of counts and exports unless asked
-- for. Only a client holding the server's synthetic key can set the mark.
ALTER TABLE sessions ADD COLUMN synthetic INTEGER NOT NULL DEFAULT 0;
CREATE INDEX sessions_synthetic ON sessions (study_id, synthetic);

-- +goose Down
DROP INDEX sessions_synthetic;
ALTER TABLE sessions DROP COLUMN synthetic;
