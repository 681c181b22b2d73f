-- +goose Up
-- The researcher console: accounts, their login sessions, the study's
-- go-live facts, pilot marking, reviews and exclusions, and what the
-- respondent page records about how each reply was typed.

CREATE TABLE users (
    id            INTEGER PRIMARY KEY,
    email         TEXT    NOT NULL UNIQUE,
    role          TEXT    NOT NULL CHECK (role IN ('owner', 'viewer')),
    password_hash TEXT    NOT NULL,  -- argon2id or bcrypt, never the password
    created_at    TEXT    NOT NULL
);

CREATE TABLE console_sessions (
    token_hash TEXT    PRIMARY KEY,  -- SHA-256 of the cookie value
    user_id    INTEGER NOT NULL REFERENCES users (id),
    created_at TEXT    NOT NULL,
    seen_at    TEXT    NOT NULL      -- for idle expiry
);

-- Failed logins, for slowing them per account and per address.
CREATE TABLE login_failures (
    id      INTEGER PRIMARY KEY,
    email   TEXT NOT NULL,
    address TEXT NOT NULL,
    at      TEXT NOT NULL
);
CREATE INDEX login_failures_email ON login_failures (email, at);
CREATE INDEX login_failures_address ON login_failures (address, at);

-- What the go-live checklist needs beyond the study file.
ALTER TABLE studies ADD COLUMN ethics_ref TEXT;        -- ethics approval reference
ALTER TABLE studies ADD COLUMN live_version INTEGER;   -- the version frozen when the study went live
ALTER TABLE studies ADD COLUMN live_at TEXT;

-- Sessions entered while the study was in pilot.
ALTER TABLE sessions ADD COLUMN pilot INTEGER NOT NULL DEFAULT 0;

-- A reviewer's decision on a session; exclusion never deletes anything.
CREATE TABLE reviews (
    session_id INTEGER PRIMARY KEY REFERENCES sessions (id),
    reviewed   INTEGER NOT NULL DEFAULT 0,
    note       TEXT    NOT NULL DEFAULT '',
    excluded   INTEGER NOT NULL DEFAULT 0,
    reason     TEXT    NOT NULL DEFAULT '',
    by_user    INTEGER REFERENCES users (id),
    at         TEXT    NOT NULL
);

-- How a respondent typed each reply, as the page measured it.
ALTER TABLE turns ADD COLUMN typing_ms INTEGER;   -- first keystroke to send
ALTER TABLE turns ADD COLUMN keystrokes INTEGER;
ALTER TABLE turns ADD COLUMN pastes INTEGER;
ALTER TABLE turns ADD COLUMN hidden_count INTEGER; -- times the tab was hidden while writing

-- +goose Down
ALTER TABLE turns DROP COLUMN hidden_count;
ALTER TABLE turns DROP COLUMN pastes;
ALTER TABLE turns DROP COLUMN keystrokes;
ALTER TABLE turns DROP COLUMN typing_ms;
DROP TABLE reviews;
ALTER TABLE sessions DROP COLUMN pilot;
ALTER TABLE studies DROP COLUMN live_at;
ALTER TABLE studies DROP COLUMN live_version;
ALTER TABLE studies DROP COLUMN ethics_ref;
DROP INDEX login_failures_address;
DROP INDEX login_failures_email;
DROP TABLE login_failures;
DROP TABLE console_sessions;
DROP TABLE users;
