-- +goose Up
-- PostgreSQL plans a query from table statistics, which autovacuum
-- refreshes after 10% of a table has changed (PostgreSQL manual, "The
-- Autovacuum Daemon"). Until a growing table is first analyzed, the planner
-- may look a respondent up by a study-wide index and read every session of
-- the study; these tables are analyzed after every 2% of change instead,
-- and at least every 200 rows.
ALTER TABLE sessions SET (autovacuum_analyze_scale_factor = 0.02, autovacuum_analyze_threshold = 200);
ALTER TABLE turns    SET (autovacuum_analyze_scale_factor = 0.02, autovacuum_analyze_threshold = 200);
ALTER TABLE chain    SET (autovacuum_analyze_scale_factor = 0.02, autovacuum_analyze_threshold = 200);

-- +goose Down
ALTER TABLE chain    RESET (autovacuum_analyze_scale_factor, autovacuum_analyze_threshold);
ALTER TABLE turns    RESET (autovacuum_analyze_scale_factor, autovacuum_analyze_threshold);
ALTER TABLE sessions RESET (autovacuum_analyze_scale_factor, autovacuum_analyze_threshold);
