-- +goose Up
-- Drift checks: each run plays a study's probe conversations against its
-- endpoints and keeps every reply; the first run on a study version is its
-- baseline.
CREATE TABLE drift_runs (
    id         INTEGER PRIMARY KEY,
    study_id   TEXT    NOT NULL REFERENCES studies (id),
    version    INTEGER NOT NULL,
    study_hash TEXT    NOT NULL,
    at         TEXT    NOT NULL,           -- UTC ms
    baseline   INTEGER NOT NULL DEFAULT 0, -- 1 for the first run on this study hash
    status     TEXT    NOT NULL,           -- baseline, pass, warn or fail
    report     TEXT    NOT NULL            -- JSON: comparisons with the baseline and the previous run
);
CREATE INDEX drift_runs_study ON drift_runs (study_id, study_hash, id);

CREATE TABLE drift_outputs (
    run_id         INTEGER NOT NULL REFERENCES drift_runs (id),
    probe          TEXT    NOT NULL,
    arm            TEXT    NOT NULL,
    repetition     INTEGER NOT NULL,
    turn           INTEGER NOT NULL,
    text           TEXT    NOT NULL,
    model_reported TEXT    NOT NULL,
    fingerprint    TEXT    NOT NULL,
    PRIMARY KEY (run_id, probe, arm, repetition, turn)
);

-- +goose Down
DROP TABLE drift_outputs;
DROP TABLE drift_runs;
