-- +goose Up
-- The step that tunes PostgreSQL's statistics (postgres/00008_planner.sql);
-- SQLite plans these lookups by their unique indexes without statistics.
SELECT 1;

-- +goose Down
SELECT 1;
