package store

import (
	"context"
	"errors"
	"fmt"
)

// Phases of a study. Only closing is implemented for now; a closed study
// takes no new respondents and its allocation seed may be published.
const (
	PhaseDraft  = "draft"
	PhaseClosed = "closed"
)

// ErrStudyClosed means a new respondent tried to enter a closed study.
var ErrStudyClosed = errors.New("the study is closed")

// Phase returns a study's phase.
func (s *Store) Phase(ctx context.Context, study string) (string, error) {
	var phase string
	if err := s.rs.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, study).Scan(&phase); err != nil {
		return "", fmt.Errorf("phase of %q: %w", study, notFound(err))
	}
	return phase, nil
}

// CloseStudy closes a study and logs the change in its chain; closing a
// closed study changes nothing.
func (s *Store) CloseStudy(ctx context.Context, study string) error {
	err := s.wr.do(ctx, func(ctx context.Context, tx *Tx) error {
		var phase string
		if err := tx.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, study).Scan(&phase); err != nil {
			return notFound(err)
		}
		if phase == PhaseClosed {
			return nil
		}
		now := s.now()
		if _, err := tx.ExecContext(ctx, `UPDATE studies SET phase = ?, closed_at = ? WHERE id = ?`, PhaseClosed, fmtTime(now), study); err != nil {
			return err
		}
		return appendChain(ctx, tx, study, EventPhase, now, map[string]string{"from": phase, "to": PhaseClosed})
	})
	if err != nil {
		return fmt.Errorf("close study %q: %w", study, err)
	}
	return nil
}
