-- +goose Up
-- Studies and their versions. A version is a study file's content,
-- identified by the SHA-256 of its canonical JSON form.
CREATE TABLE studies (
    id         TEXT PRIMARY KEY,
    secret     BLOB NOT NULL,  -- HMAC key of completion codes; never exported
    seed       BLOB NOT NULL,  -- allocation seed
    created_at TEXT NOT NULL   -- UTC, RFC 3339 with milliseconds
);

CREATE TABLE study_versions (
    study_id   TEXT    NOT NULL REFERENCES studies (id),
    version    INTEGER NOT NULL,
    hash       TEXT    NOT NULL,
    canonical  TEXT    NOT NULL,
    source     TEXT    NOT NULL,  -- the study file as given
    created_at TEXT    NOT NULL,
    PRIMARY KEY (study_id, version),
    UNIQUE (study_id, hash)
);

-- The next free slot of each stratum's allocation sequence.
CREATE TABLE strata (
    study_id  TEXT    NOT NULL REFERENCES studies (id),
    stratum   TEXT    NOT NULL,
    next_slot INTEGER NOT NULL,
    PRIMARY KEY (study_id, stratum)
);

CREATE TABLE sessions (
    id          INTEGER PRIMARY KEY,
    study_id    TEXT    NOT NULL REFERENCES studies (id),
    rid         TEXT    NOT NULL,
    token       TEXT    NOT NULL UNIQUE,
    version     INTEGER NOT NULL,
    study_hash  TEXT    NOT NULL,
    stratum     TEXT    NOT NULL,
    slot        INTEGER NOT NULL,
    arm         TEXT    NOT NULL,
    arm_code    TEXT    NOT NULL,
    covariates  TEXT    NOT NULL,  -- JSON object
    created_at  TEXT    NOT NULL,
    finished_at TEXT,
    UNIQUE (study_id, rid),
    UNIQUE (study_id, stratum, slot),
    FOREIGN KEY (study_id, version) REFERENCES study_versions (study_id, version)
);

-- Every turn, respondent's and model's, with what an auditor needs.
CREATE TABLE turns (
    session_id        INTEGER NOT NULL REFERENCES sessions (id),
    idx               INTEGER NOT NULL,
    role              TEXT    NOT NULL CHECK (role IN ('assistant', 'respondent')),
    text              TEXT    NOT NULL,
    client_id         TEXT,             -- respondent turns: the page's id for the send, for idempotency
    started_at        TEXT    NOT NULL, -- UTC ms; model turns: when the request began
    created_at        TEXT    NOT NULL, -- UTC ms; when the turn was committed
    latency_ms        INTEGER,          -- model turns: request to last chunk, retries included
    model_requested   TEXT,
    model_reported    TEXT,
    fingerprint       TEXT,
    params            TEXT,             -- JSON of the model parameters
    prompt_tokens     INTEGER,
    completion_tokens INTEGER,
    retries           INTEGER,
    finish_reason     TEXT,
    system_sha256     TEXT,
    request_sha256    TEXT,
    text_sha256       TEXT    NOT NULL,
    study_hash        TEXT    NOT NULL,
    PRIMARY KEY (session_id, idx),
    UNIQUE (session_id, client_id)
);

-- Model calls that failed after every retry: the respondent saw a Retry control.
CREATE TABLE model_failures (
    id         INTEGER PRIMARY KEY,
    session_id INTEGER NOT NULL REFERENCES sessions (id),
    at         TEXT    NOT NULL,
    kind       TEXT    NOT NULL,
    status     INTEGER NOT NULL,
    attempts   INTEGER NOT NULL
);
CREATE INDEX model_failures_session ON model_failures (session_id);

-- +goose Down
DROP TABLE model_failures;
DROP TABLE turns;
DROP TABLE sessions;
DROP TABLE strata;
DROP TABLE study_versions;
DROP TABLE studies;
