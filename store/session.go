package store

import (
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"trialogue/arms"
	"trialogue/arms/codes"
)

// Session is one respondent's way through a study.
type Session struct {
	ID         int64
	StudyID    string
	RID        string
	Token      string // the respondent's capability: never log it
	Version    int
	StudyHash  string
	Stratum    string
	Slot       int // position in the stratum's allocation sequence
	Arm        string
	ArmCode    string
	Covariates map[string]string
	CreatedAt  time.Time
	FinishedAt time.Time // zero while unfinished
	// Language is the page language the entry link chose; "" means the study's.
	Language string
}

// Finished reports whether the respondent has continued back to the survey.
func (s Session) Finished() bool { return !s.FinishedAt.IsZero() }

// Respondent returns the session's respondent as the study sees it.
func (s Session) Respondent() arms.Respondent {
	return arms.Respondent{RID: s.RID, Covariates: s.Covariates, Language: s.Language}
}

// Assigner gives the arm of a stratum's slot: a pure function of the
// study's seed, so the store only has to hand out slot numbers.
type Assigner func(stratum string, slot int) (arm, armCode string)

// Enter returns rid's session in the study, creating it when rid is new:
// one transaction takes the stratum's next slot, so concurrent entries
// never share or skip one. created reports whether the session is new.
//
// The writes of a study are serialized (on PostgreSQL across replicas by
// the study's lock), so the session looked for is there if it was
// committed. The unique (study, rid) constraint stands behind that: an
// entry that still meets it is undone and tried again, and then finds the
// session the other entry made.
func (s *Store) Enter(ctx context.Context, sv StudyVersion, stratum string, r arms.Respondent, assign Assigner) (sess Session, created bool, err error) {
	return s.enterRetry(ctx, sv, stratum, r, assign, false)
}

// EnterSynthetic is Enter for a synthetic respondent (trialogue simulate):
// a new session is marked synthetic in the same transaction that creates
// it. An existing session is returned as it is.
func (s *Store) EnterSynthetic(ctx context.Context, sv StudyVersion, stratum string, r arms.Respondent, assign Assigner) (sess Session, created bool, err error) {
	return s.enterRetry(ctx, sv, stratum, r, assign, true)
}

func (s *Store) enterRetry(ctx context.Context, sv StudyVersion, stratum string, r arms.Respondent, assign Assigner, synthetic bool) (sess Session, created bool, err error) {
	for try := 0; ; try++ {
		sess, created, err = s.enter(ctx, sv, stratum, r, assign, synthetic)
		if err == nil || !isUnique(err) || try == 2 {
			return sess, created, err
		}
		s.entryRetries.Add(1)
	}
}

func (s *Store) enter(ctx context.Context, sv StudyVersion, stratum string, r arms.Respondent, assign Assigner, synthetic bool) (sess Session, created bool, err error) {
	covs, err := json.Marshal(r.Covariates)
	if err != nil {
		return Session{}, false, fmt.Errorf("enter study %q: %w", sv.ID, err)
	}
	err = s.wr.do(ctx, sv.ID, func(ctx context.Context, tx *Tx) error {
		var err error
		sess, err = sessionWhere(ctx, tx, `s.study_id = ? AND s.rid = ?`, sv.ID, r.RID)
		if err == nil {
			created = false
			return nil
		}
		if !errors.Is(err, ErrNotFound) {
			return err
		}
		pilot, err := entryRule(ctx, tx, sv)
		if err != nil {
			return err
		}
		var slot int
		err = tx.QueryRowContext(ctx, `SELECT next_slot FROM strata WHERE study_id = ? AND stratum = ?`, sv.ID, stratum).Scan(&slot)
		if err != nil && !errors.Is(err, sql.ErrNoRows) {
			return err
		}
		arm, code := assign(stratum, slot)
		now := s.now()
		sess = Session{StudyID: sv.ID, RID: r.RID, Token: codes.NewToken(), Version: sv.Version, StudyHash: sv.Hash,
			Stratum: stratum, Slot: slot, Arm: arm, ArmCode: code, Covariates: r.Covariates, CreatedAt: now, Language: r.Language}
		err = tx.QueryRowContext(ctx, `INSERT INTO sessions (study_id, rid, token, version, study_hash, stratum, slot, arm, arm_code, covariates, created_at, language, pilot, synthetic)
			VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, NULLIF(?, ''), ?, ?) RETURNING id`,
			sv.ID, r.RID, sess.Token, sv.Version, sv.Hash, stratum, slot, arm, code, string(covs), fmtTime(now), r.Language, pilot, boolInt(synthetic)).Scan(&sess.ID)
		if err != nil {
			return err
		}
		_, err = tx.ExecContext(ctx, `INSERT INTO strata (study_id, stratum, next_slot) VALUES (?, ?, ?)
			ON CONFLICT (study_id, stratum) DO UPDATE SET next_slot = excluded.next_slot`, sv.ID, stratum, slot+1)
		if err != nil {
			return err
		}
		if err := appendChain(ctx, tx, sv.ID, EventAssigned, now, assignedEvent(sess, RIDKey(sv.Secret, r.RID), covs)); err != nil {
			return err
		}
		created = true
		return nil
	})
	if err != nil {
		return Session{}, false, fmt.Errorf("enter study %q: %w", sv.ID, err)
	}
	return sess, created, nil
}

// SessionByToken returns the session a respondent token opens.
func (s *Store) SessionByToken(ctx context.Context, token string) (Session, error) {
	return sessionWhere(ctx, s.rs, `s.token = ?`, token)
}

// SessionByRID returns rid's session in a study.
func (s *Store) SessionByRID(ctx context.Context, study, rid string) (Session, error) {
	return sessionWhere(ctx, s.rs, `s.study_id = ? AND s.rid = ?`, study, rid)
}

// Sessions lists all of a study's sessions in order of entry, synthetic
// ones included: what an audit needs.
func (s *Store) Sessions(ctx context.Context, study string) ([]Session, error) {
	return s.SessionsOf(ctx, study, WithSynthetic)
}

// Finish marks the session finished; finishing twice keeps the first time.
func (s *Store) Finish(ctx context.Context, id int64) (time.Time, error) {
	var at string
	key, err := s.studyKey(ctx, id)
	if err != nil {
		return time.Time{}, fmt.Errorf("finish session: %w", err)
	}
	err = s.wr.do(ctx, key, func(ctx context.Context, tx *Tx) error {
		now := s.now()
		res, err := tx.ExecContext(ctx, `UPDATE sessions SET finished_at = ? WHERE id = ? AND finished_at IS NULL`, fmtTime(now), id)
		if err != nil {
			return err
		}
		var study string
		err = tx.QueryRowContext(ctx, `SELECT finished_at, study_id FROM sessions WHERE id = ?`, id).Scan(&at, &study)
		if errors.Is(err, sql.ErrNoRows) {
			return ErrNotFound
		}
		if err != nil {
			return err
		}
		if n, err := res.RowsAffected(); err != nil || n == 0 {
			return err // finished before: nothing new to log
		}
		return appendChain(ctx, tx, study, EventFinished, now, map[string]int64{"session": id})
	})
	if err != nil {
		return time.Time{}, fmt.Errorf("finish session: %w", err)
	}
	return parseTime(at)
}

// assignedEvent is what the chain logs of an assignment.
func assignedEvent(sess Session, ridKey string, covariates []byte) map[string]any {
	return map[string]any{
		"session": sess.ID, "rid_key": ridKey, "stratum": sess.Stratum, "slot": sess.Slot, "arm": sess.Arm,
		"arm_code": sess.ArmCode, "version": sess.Version, "study_hash": sess.StudyHash,
		"covariates_sha256": codes.SHA256Hex(covariates),
	}
}

const sessionSelect = `SELECT s.id, s.study_id, s.rid, s.token, s.version, s.study_hash, s.stratum, s.slot, s.arm, s.arm_code,
	s.covariates, s.created_at, s.finished_at, COALESCE(s.language, '') FROM sessions s`

type querier interface {
	QueryRowContext(ctx context.Context, query string, args ...any) *sql.Row
}

type scanner interface{ Scan(dest ...any) error }

func sessionWhere(ctx context.Context, q querier, where string, args ...any) (Session, error) {
	sess, err := scanSession(q.QueryRowContext(ctx, sessionSelect+" WHERE "+where, args...))
	if errors.Is(err, sql.ErrNoRows) {
		return Session{}, fmt.Errorf("session: %w", ErrNotFound)
	}
	if err != nil {
		return Session{}, fmt.Errorf("session: %w", err)
	}
	return sess, nil
}

func scanSession(row scanner) (Session, error) {
	var sess Session
	var covs, created string
	var finished sql.NullString
	if err := row.Scan(&sess.ID, &sess.StudyID, &sess.RID, &sess.Token, &sess.Version, &sess.StudyHash, &sess.Stratum,
		&sess.Slot, &sess.Arm, &sess.ArmCode, &covs, &created, &finished, &sess.Language); err != nil {
		return Session{}, err
	}
	if err := json.Unmarshal([]byte(covs), &sess.Covariates); err != nil {
		return Session{}, fmt.Errorf("covariates of session %d: %w", sess.ID, err)
	}
	var err error
	if sess.CreatedAt, err = parseTime(created); err != nil {
		return Session{}, err
	}
	if finished.Valid {
		if sess.FinishedAt, err = parseTime(finished.String); err != nil {
			return Session{}, err
		}
	}
	return sess, nil
}

// studyKey is the study a session belongs to, which the writer needs before
// the write on PostgreSQL, to take the study's lock first; SQLite's single
// writer needs none ("").
func (s *Store) studyKey(ctx context.Context, sessionID int64) (string, error) {
	if s.d.lockStudy == "" {
		return "", nil
	}
	var study string
	err := s.rs.QueryRowContext(ctx, `SELECT study_id FROM sessions WHERE id = ?`, sessionID).Scan(&study)
	if errors.Is(err, sql.ErrNoRows) {
		return "", fmt.Errorf("session %d: %w", sessionID, ErrNotFound)
	}
	return study, err
}

// boolInt is a flag as the schema stores it: INTEGER 0 or 1 in both engines.
func boolInt(b bool) int {
	if b {
		return 1
	}
	return 0
}
