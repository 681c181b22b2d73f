-- +goose Up
-- The per-study hash chain: every event that matters, in order. Each
-- record's hash is the SHA-256 of the previous record's hash and its own
-- canonical content (RFC 8785 JSON), so any edit, deletion, insertion or
-- reordering breaks the chain from that record on.
CREATE TABLE chain (
    study_id TEXT    NOT NULL REFERENCES studies (id),
    seq      INTEGER NOT NULL,  -- 1, 2, 3, ... per study
    kind     TEXT    NOT NULL,  -- version, assigned, turn, finished, phase
    at       TEXT    NOT NULL,  -- UTC ms
    content  TEXT    NOT NULL,  -- canonical JSON: {"at","data","kind","seq","study"}
    prev     TEXT    NOT NULL,  -- hash of record seq-1; 64 zeros for the first
    hash     TEXT    NOT NULL,  -- hex SHA-256 of prev || "\n" || content
    PRIMARY KEY (study_id, seq)
);

-- A study's phase; only draft and closed are set for now. Closed studies
-- take no new respondents, and their allocation seed may be published.
ALTER TABLE studies ADD COLUMN phase TEXT NOT NULL DEFAULT 'draft';
ALTER TABLE studies ADD COLUMN closed_at TEXT;

-- +goose Down
ALTER TABLE studies DROP COLUMN closed_at;
ALTER TABLE studies DROP COLUMN phase;
DROP TABLE chain;
