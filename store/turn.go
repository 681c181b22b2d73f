package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/arms/flags"
)

// Roles of a turn.
const (
	RoleAssistant  = "assistant"
	RoleRespondent = "respondent"
)

// Turn is one message of a conversation, with what an auditor needs to
// know about how it came to be.
type Turn struct {
	SessionID        int64
	Index            int // 0-based position in the session
	Role             string
	Text             string
	ClientID         string // respondent turns: the page's id for this send
	StartedAt        time.Time
	CreatedAt        time.Time
	LatencyMS        int64 // model turns: request to last chunk, retries included
	ModelRequested   string
	ModelReported    string
	Fingerprint      string
	Params           string // JSON of the model parameters
	PromptTokens     int
	CompletionTokens int
	Retries          int
	FinishReason     string
	SystemSHA256     string
	RequestSHA256    string
	TextSHA256       string
	StudyHash        string
	// Typing is how a respondent typed the reply, as the page measured it;
	// nil for model turns and for replies sent without measures.
	Typing *flags.Typing
}

// Progress summarises turns for the arm's rules.
func Progress(arm *arms.Arm, turns []Turn, finished bool) arms.Progress {
	var p arms.Progress
	for _, t := range turns {
		if t.Role == RoleRespondent {
			p.Replies++
		} else {
			p.Assistant++
		}
	}
	p.Owed = arm.Owed(p.Replies, p.Assistant)
	p.Finished = finished
	return p
}

// Turns lists a session's turns in order.
func (s *Store) Turns(ctx context.Context, sessionID int64) ([]Turn, error) {
	return turns(ctx, s.rs, sessionID)
}

type queryer interface {
	QueryContext(ctx context.Context, query string, args ...any) (*sql.Rows, error)
}

const turnSelect = `SELECT session_id, idx, role, text, COALESCE(client_id, ''), started_at, created_at, COALESCE(latency_ms, 0),
	COALESCE(model_requested, ''), COALESCE(model_reported, ''), COALESCE(fingerprint, ''), COALESCE(params, ''),
	COALESCE(prompt_tokens, 0), COALESCE(completion_tokens, 0), COALESCE(retries, 0), COALESCE(finish_reason, ''),
	COALESCE(system_sha256, ''), COALESCE(request_sha256, ''), text_sha256, study_hash,
	typing_ms, keystrokes, pastes, hidden_count FROM turns`

func turns(ctx context.Context, q queryer, sessionID int64) ([]Turn, error) {
	out, err := scanTurns(q.QueryContext(ctx, turnSelect+` WHERE session_id = ? ORDER BY idx`, sessionID))
	if err != nil {
		return nil, fmt.Errorf("turns of session %d: %w", sessionID, err)
	}
	return out, nil
}

// scanTurns reads the rows of a turnSelect query.
func scanTurns(rows *sql.Rows, err error) ([]Turn, error) {
	if err != nil {
		return nil, err
	}
	defer rows.Close()
	var out []Turn
	for rows.Next() {
		var t Turn
		var started, created string
		var typing [4]sql.NullInt64
		if err := rows.Scan(&t.SessionID, &t.Index, &t.Role, &t.Text, &t.ClientID, &started, &created, &t.LatencyMS,
			&t.ModelRequested, &t.ModelReported, &t.Fingerprint, &t.Params, &t.PromptTokens, &t.CompletionTokens,
			&t.Retries, &t.FinishReason, &t.SystemSHA256, &t.RequestSHA256, &t.TextSHA256, &t.StudyHash,
			&typing[0], &typing[1], &typing[2], &typing[3]); err != nil {
			return nil, err
		}
		if typing[0].Valid {
			t.Typing = &flags.Typing{TypingMS: typing[0].Int64, Keystrokes: typing[1].Int64, Pastes: typing[2].Int64, HiddenCount: typing[3].Int64}
		}
		if t.StartedAt, err = parseTime(started); err != nil {
			return nil, err
		}
		if t.CreatedAt, err = parseTime(created); err != nil {
			return nil, err
		}
		out = append(out, t)
	}
	return out, rows.Err()
}

// Added is the outcome of AddReply.
type Added struct {
	Turn    Turn   // the reply's turn
	Turns   []Turn // every turn of the session, the reply's included
	Existed bool   // the client id was already stored: nothing was added
}

// AddReply commits a respondent's reply. A client id already stored returns
// the stored turn with Existed set and changes nothing, so a resent request
// makes one turn. check sees the session's turns and whether it is finished,
// inside the transaction, and may refuse the reply.
func (s *Store) AddReply(ctx context.Context, sess Session, text, clientID string, check func(done []Turn, finished bool) error) (Added, error) {
	return s.AddTypedReply(ctx, sess, text, clientID, nil, check)
}

// AddTypedReply is AddReply with the typing measures the respondent page
// sent (nil for none), stored with the turn. A resent client id keeps the
// measures of the first send.
func (s *Store) AddTypedReply(ctx context.Context, sess Session, text, clientID string, typing *flags.Typing, check func(done []Turn, finished bool) error) (Added, error) {
	if typing != nil {
		if err := typing.Check(); err != nil {
			return Added{}, fmt.Errorf("add reply: %w", err)
		}
	}
	var a Added
	err := s.wr.do(ctx, sess.StudyID, func(ctx context.Context, tx *Tx) error {
		a = Added{}
		var finished bool
		if err := tx.QueryRowContext(ctx, `SELECT finished_at IS NOT NULL FROM sessions WHERE id = ?`, sess.ID).Scan(&finished); err != nil {
			return err
		}
		done, err := turns(ctx, tx, sess.ID)
		if err != nil {
			return err
		}
		a.Turns = done
		if clientID != "" {
			for _, d := range done {
				if d.Role == RoleRespondent && d.ClientID == clientID {
					a.Turn, a.Existed = d, true
					return nil
				}
			}
		}
		if err := check(done, finished); err != nil {
			return err
		}
		now := s.now()
		a.Turn = Turn{SessionID: sess.ID, Index: len(done), Role: RoleRespondent, Text: text, ClientID: clientID,
			StartedAt: now, CreatedAt: now, TextSHA256: codes.SHA256Hex([]byte(text)), StudyHash: sess.StudyHash, Typing: typing}
		a.Turns = append(done, a.Turn)
		if err := insertTurn(ctx, tx, a.Turn); err != nil {
			return err
		}
		return appendChain(ctx, tx, sess.StudyID, EventTurn, now, turnEvent(a.Turn))
	})
	if err != nil {
		return Added{}, fmt.Errorf("add reply: %w", err)
	}
	return a, nil
}

// AddModelTurn commits a model turn at index t.Index. If that index is taken
// (another request answered first) it returns ErrConflict and changes nothing.
func (s *Store) AddModelTurn(ctx context.Context, t Turn) (Turn, error) {
	t.Role = RoleAssistant
	t.TextSHA256 = codes.SHA256Hex([]byte(t.Text))
	key, err := s.studyKey(ctx, t.SessionID)
	if err != nil {
		return Turn{}, fmt.Errorf("add model turn: %w", err)
	}
	err = s.wr.do(ctx, key, func(ctx context.Context, tx *Tx) error {
		var n int
		var study string
		err := tx.QueryRowContext(ctx, `SELECT (SELECT COUNT(*) FROM turns WHERE session_id = s.id), s.study_id FROM sessions s WHERE s.id = ?`,
			t.SessionID).Scan(&n, &study)
		if errors.Is(err, sql.ErrNoRows) {
			return fmt.Errorf("session %d: %w", t.SessionID, ErrNotFound)
		}
		if err != nil {
			return err
		}
		if n != t.Index {
			return fmt.Errorf("turn %d of session %d (it has %d turns): %w", t.Index, t.SessionID, n, ErrConflict)
		}
		t.CreatedAt = s.now()
		if err := insertTurn(ctx, tx, t); err != nil {
			return err
		}
		return appendChain(ctx, tx, study, EventTurn, t.CreatedAt, turnEvent(t))
	})
	if err != nil {
		return Turn{}, fmt.Errorf("add model turn: %w", err)
	}
	return t, nil
}

// turnEvent is what the chain logs of a turn: its place, its hashes and the
// model that wrote it; the text itself stays in the turns table, tied to the
// chain by its hash.
func turnEvent(t Turn) map[string]any {
	return map[string]any{
		"session": t.SessionID, "index": t.Index, "role": t.Role, "text_sha256": t.TextSHA256,
		"system_sha256": t.SystemSHA256, "request_sha256": t.RequestSHA256, "model_requested": t.ModelRequested,
		"model_reported": t.ModelReported, "fingerprint": t.Fingerprint, "retries": t.Retries, "study_hash": t.StudyHash,
	}
}

func insertTurn(ctx context.Context, tx *Tx, t Turn) error {
	var typing [4]sql.NullInt64
	if t.Typing != nil {
		for i, v := range []int64{t.Typing.TypingMS, t.Typing.Keystrokes, t.Typing.Pastes, t.Typing.HiddenCount} {
			typing[i] = sql.NullInt64{Int64: v, Valid: true}
		}
	}
	_, err := tx.ExecContext(ctx, `INSERT INTO turns (session_id, idx, role, text, client_id, started_at, created_at, latency_ms,
		model_requested, model_reported, fingerprint, params, prompt_tokens, completion_tokens, retries, finish_reason,
		system_sha256, request_sha256, text_sha256, study_hash, typing_ms, keystrokes, pastes, hidden_count)
		VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)`,
		t.SessionID, t.Index, t.Role, t.Text, nullString(t.ClientID), fmtTime(t.StartedAt), fmtTime(t.CreatedAt), nullInt(t.LatencyMS, t.Role),
		nullString(t.ModelRequested), nullString(t.ModelReported), nullString(t.Fingerprint), nullString(t.Params),
		nullInt(int64(t.PromptTokens), t.Role), nullInt(int64(t.CompletionTokens), t.Role), nullInt(int64(t.Retries), t.Role),
		nullString(t.FinishReason), nullString(t.SystemSHA256), nullString(t.RequestSHA256), t.TextSHA256, t.StudyHash,
		typing[0], typing[1], typing[2], typing[3])
	return err
}

// RecordFailure logs a model call that failed after every retry.
func (s *Store) RecordFailure(ctx context.Context, sessionID int64, kind string, status, attempts int) error {
	err := s.wr.do(ctx, "", func(ctx context.Context, tx *Tx) error {
		_, err := tx.ExecContext(ctx, `INSERT INTO model_failures (session_id, at, kind, status, attempts) VALUES (?, ?, ?, ?, ?)`,
			sessionID, fmtTime(s.now()), kind, status, attempts)
		return err
	})
	if err != nil {
		return fmt.Errorf("record model failure: %w", err)
	}
	return nil
}

// LastFailure returns when a session's model call last failed after every
// retry; the zero time if never.
func (s *Store) LastFailure(ctx context.Context, sessionID int64) (time.Time, error) {
	var at sql.NullString
	if err := s.rs.QueryRowContext(ctx, `SELECT MAX(at) FROM model_failures WHERE session_id = ?`, sessionID).Scan(&at); err != nil {
		return time.Time{}, fmt.Errorf("model failures: %w", err)
	}
	if !at.Valid {
		return time.Time{}, nil
	}
	return parseTime(at.String)
}

func nullString(v string) sql.NullString { return sql.NullString{String: v, Valid: v != ""} }

// nullInt stores model-turn figures and leaves them NULL on respondent turns.
func nullInt(v int64, role string) sql.NullInt64 {
	return sql.NullInt64{Int64: v, Valid: role == RoleAssistant}
}
