package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"

	"trialogue/arms"
	"trialogue/arms/flags"
)

// Flags computes the transcript flags of every session of a study, pilot
// and synthetic ones included, under the rules of def (the study's flags
// block over the defaults). The map is keyed by session id; sessions
// without a flag are absent.
func (s *Store) Flags(ctx context.Context, def *arms.Study, study string) (map[int64][]flags.Flag, error) {
	if def == nil || def.ID != study {
		return nil, fmt.Errorf("flags of %q: the study definition given is not this study's", study)
	}
	d, err := s.loadRecords(ctx, study)
	if err != nil {
		return nil, fmt.Errorf("flags of %q: %w", study, err)
	}
	out := map[int64][]flags.Flag{}
	for _, rec := range d.records {
		if f := flags.Compute(def, rec.flagSession()); len(f) > 0 {
			out[rec.ID] = f
		}
	}
	return out, nil
}

// record is a session with everything flags and exports read about it.
type record struct {
	Session
	Pilot     bool
	Synthetic bool
	Reviewed  bool
	Excluded  bool
	Reason    string // of the latest exclusion or inclusion
	Turns     []Turn
	Failures  []flags.Failure
}

// flagSession is what flags.Compute needs of a record.
func (r *record) flagSession() flags.Session {
	fs := flags.Session{Arm: r.Arm, Covariates: r.Covariates, Entered: r.CreatedAt, Finished: r.FinishedAt, Failures: r.Failures}
	for _, t := range r.Turns {
		fs.Turns = append(fs.Turns, flags.Turn{Role: t.Role, Text: t.Text, StartedAt: t.StartedAt, CreatedAt: t.CreatedAt,
			LatencyMS: t.LatencyMS, Retries: t.Retries, Typing: t.Typing})
	}
	return fs
}

// records is a study as flags and exports read it, from one snapshot.
type records struct {
	secret  []byte
	records []*record
}

// loadRecords reads a study's sessions, their review marks, turns and
// failed model calls inside one read transaction, so that all of them
// come from the same moment even while respondents are writing.
func (s *Store) loadRecords(ctx context.Context, study string) (*records, error) {
	tx, err := s.readTx(ctx)
	if err != nil {
		return nil, err
	}
	defer tx.Rollback()
	d := &records{}
	if err := tx.QueryRowContext(ctx, `SELECT secret FROM studies WHERE id = ?`, study).Scan(&d.secret); err != nil {
		if errors.Is(err, sql.ErrNoRows) {
			return nil, fmt.Errorf("study %q: %w", study, ErrNotFound)
		}
		return nil, err
	}
	rows, err := tx.QueryContext(ctx, sessionSelect+` WHERE s.study_id = ? ORDER BY s.id`, study)
	if err != nil {
		return nil, err
	}
	byID := map[int64]*record{}
	for rows.Next() {
		sess, err := scanSession(rows)
		if err != nil {
			rows.Close()
			return nil, err
		}
		rec := &record{Session: sess}
		d.records = append(d.records, rec)
		byID[sess.ID] = rec
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return nil, err
	}

	rows, err = tx.QueryContext(ctx, `SELECT s.id, s.pilot, s.synthetic, COALESCE(r.reviewed, 0), COALESCE(r.excluded, 0), COALESCE(r.reason, '')
		FROM sessions s LEFT JOIN reviews r ON r.session_id = s.id WHERE s.study_id = ?`, study)
	if err != nil {
		return nil, err
	}
	for rows.Next() {
		var id int64
		var pilot, synthetic, reviewed, excluded bool
		var reason string
		if err := rows.Scan(&id, &pilot, &synthetic, &reviewed, &excluded, &reason); err != nil {
			rows.Close()
			return nil, err
		}
		if rec := byID[id]; rec != nil {
			rec.Pilot, rec.Synthetic, rec.Reviewed, rec.Excluded, rec.Reason = pilot, synthetic, reviewed, excluded, reason
		}
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return nil, err
	}

	turns, err := scanTurns(tx.QueryContext(ctx, turnSelect+` WHERE session_id IN (SELECT id FROM sessions WHERE study_id = ?) ORDER BY session_id, idx`, study))
	if err != nil {
		return nil, err
	}
	for _, t := range turns {
		if rec := byID[t.SessionID]; rec != nil {
			rec.Turns = append(rec.Turns, t)
		}
	}

	rows, err = tx.QueryContext(ctx, `SELECT session_id, at, kind, attempts FROM model_failures
		WHERE session_id IN (SELECT id FROM sessions WHERE study_id = ?) ORDER BY id`, study)
	if err != nil {
		return nil, err
	}
	defer rows.Close()
	for rows.Next() {
		var id int64
		var at string
		var f flags.Failure
		if err := rows.Scan(&id, &at, &f.Kind, &f.Attempts); err != nil {
			return nil, err
		}
		if f.At, err = parseTime(at); err != nil {
			return nil, err
		}
		if rec := byID[id]; rec != nil {
			rec.Failures = append(rec.Failures, f)
		}
	}
	if err := rows.Err(); err != nil {
		return nil, err
	}
	return d, nil
}
