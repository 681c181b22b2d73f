-- +goose Up
-- PostgreSQL: the same as sqlite/00004_language.sql.
-- The page language a respondent's entry link chose with lang=; NULL means
-- the study's own language. Kept so that reloads show the same language.
ALTER TABLE sessions ADD COLUMN language TEXT;

-- +goose Down
ALTER TABLE sessions DROP COLUMN language;
