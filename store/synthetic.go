package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
)

// Synthetic chooses whether listings and counts include the sessions of
// synthetic respondents (load tests and dry runs of `trialogue simulate`).
type Synthetic int

// The choices of Synthetic. The zero value leaves synthetic sessions out,
// so that a caller who forgets to choose never mixes them with real data.
const (
	RealOnly      Synthetic = iota // respondents only (the default)
	WithSynthetic                  // respondents and synthetic sessions
	SyntheticOnly                  // synthetic sessions only
)

func (f Synthetic) where() (string, error) {
	switch f {
	case RealOnly:
		return " AND s.synthetic = 0", nil
	case WithSynthetic:
		return "", nil
	case SyntheticOnly:
		return " AND s.synthetic = 1", nil
	}
	return "", fmt.Errorf("synthetic filter %d is not one of RealOnly, WithSynthetic, SyntheticOnly", int(f))
}

// MarkSynthetic marks a session as a synthetic respondent's.
func (s *Store) MarkSynthetic(ctx context.Context, sessionID int64) error {
	err := s.wr.do(ctx, "", func(ctx context.Context, tx *Tx) error {
		res, err := tx.ExecContext(ctx, `UPDATE sessions SET synthetic = 1 WHERE id = ?`, sessionID)
		if err != nil {
			return err
		}
		if n, err := res.RowsAffected(); err != nil {
			return err
		} else if n == 0 {
			return ErrNotFound
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("mark session %d synthetic: %w", sessionID, err)
	}
	return nil
}

// IsSynthetic reports whether a session is a synthetic respondent's.
func (s *Store) IsSynthetic(ctx context.Context, sessionID int64) (bool, error) {
	var v bool
	err := s.rs.QueryRowContext(ctx, `SELECT synthetic FROM sessions WHERE id = ?`, sessionID).Scan(&v)
	if errors.Is(err, sql.ErrNoRows) {
		return false, fmt.Errorf("session %d: %w", sessionID, ErrNotFound)
	}
	if err != nil {
		return false, fmt.Errorf("session %d: %w", sessionID, err)
	}
	return v, nil
}

// SessionsOf lists a study's sessions in order of entry, with or without
// the synthetic ones.
func (s *Store) SessionsOf(ctx context.Context, study string, f Synthetic) ([]Session, error) {
	cond, err := f.where()
	if err != nil {
		return nil, err
	}
	rows, err := s.rs.QueryContext(ctx, sessionSelect+` WHERE s.study_id = ?`+cond+` ORDER BY s.id`, study)
	if err != nil {
		return nil, fmt.Errorf("sessions of %q: %w", study, err)
	}
	defer rows.Close()
	var out []Session
	for rows.Next() {
		sess, err := scanSession(rows)
		if err != nil {
			return nil, fmt.Errorf("sessions of %q: %w", study, err)
		}
		out = append(out, sess)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("sessions of %q: %w", study, err)
	}
	return out, nil
}

// ArmCounts counts a study's sessions per arm name, with or without the
// synthetic ones.
func (s *Store) ArmCounts(ctx context.Context, study string, f Synthetic) (map[string]int, error) {
	cond, err := f.where()
	if err != nil {
		return nil, err
	}
	rows, err := s.rs.QueryContext(ctx, `SELECT s.arm, COUNT(*) FROM sessions s WHERE s.study_id = ?`+cond+` GROUP BY s.arm`, study)
	if err != nil {
		return nil, fmt.Errorf("arm counts of %q: %w", study, err)
	}
	defer rows.Close()
	out := map[string]int{}
	for rows.Next() {
		var arm string
		var n int
		if err := rows.Scan(&arm, &n); err != nil {
			return nil, fmt.Errorf("arm counts of %q: %w", study, err)
		}
		out[arm] = n
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("arm counts of %q: %w", study, err)
	}
	return out, nil
}
