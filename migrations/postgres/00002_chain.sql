-- +goose Up
-- PostgreSQL's form of sqlite/00002_chain.sql.
CREATE TABLE chain (
    study_id TEXT   NOT NULL REFERENCES studies (id),
    seq      BIGINT NOT NULL,
    kind     TEXT   NOT NULL,
    at       TEXT   NOT NULL,
    content  TEXT   NOT NULL,
    prev     TEXT   NOT NULL,
    hash     TEXT   NOT NULL,
    PRIMARY KEY (study_id, seq)
);

ALTER TABLE studies ADD COLUMN phase TEXT NOT NULL DEFAULT 'draft';
ALTER TABLE studies ADD COLUMN closed_at TEXT;

-- +goose Down
ALTER TABLE studies DROP COLUMN closed_at;
ALTER TABLE studies DROP COLUMN phase;
DROP TABLE chain;
