package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"time"

	"trialogue/arms/drift"
)

// DriftRun is one drift check of a study version.
type DriftRun struct {
	ID        int64
	Study     string
	Version   int
	StudyHash string
	At        time.Time
	Baseline  bool
	Status    string // baseline, pass, warn or fail
	Report    string // JSON
	Outputs   []drift.Output
}

// SaveDriftRun stores a drift run with its outputs. The first run on a
// study hash is marked as its baseline, whatever the caller says.
func (s *Store) SaveDriftRun(ctx context.Context, r DriftRun) (DriftRun, error) {
	err := s.wr.do(ctx, r.Study, func(ctx context.Context, tx *Tx) error {
		var n int
		if err := tx.QueryRowContext(ctx, `SELECT COUNT(*) FROM drift_runs WHERE study_id = ? AND study_hash = ?`, r.Study, r.StudyHash).Scan(&n); err != nil {
			return err
		}
		r.Baseline = n == 0
		if r.Baseline {
			r.Status = "baseline"
		}
		r.At = s.now()
		err := tx.QueryRowContext(ctx, `INSERT INTO drift_runs (study_id, version, study_hash, at, baseline, status, report) VALUES (?, ?, ?, ?, ?, ?, ?) RETURNING id`,
			r.Study, r.Version, r.StudyHash, fmtTime(r.At), boolInt(r.Baseline), r.Status, r.Report).Scan(&r.ID)
		if err != nil {
			return err
		}
		for _, o := range r.Outputs {
			if _, err := tx.ExecContext(ctx, `INSERT INTO drift_outputs (run_id, probe, arm, repetition, turn, text, model_reported, fingerprint) VALUES (?, ?, ?, ?, ?, ?, ?, ?)`,
				r.ID, o.Probe, o.Arm, o.Run, o.Turn, o.Text, o.ModelReported, o.Fingerprint); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return DriftRun{}, fmt.Errorf("save drift run of %q: %w", r.Study, err)
	}
	return r, nil
}

// DriftRuns lists a study's drift runs, oldest first, without outputs.
func (s *Store) DriftRuns(ctx context.Context, study string) ([]DriftRun, error) {
	rows, err := s.rs.QueryContext(ctx, `SELECT id, study_id, version, study_hash, at, baseline, status, report FROM drift_runs WHERE study_id = ? ORDER BY id`, study)
	if err != nil {
		return nil, fmt.Errorf("drift runs of %q: %w", study, err)
	}
	defer rows.Close()
	var out []DriftRun
	for rows.Next() {
		var r DriftRun
		var at string
		if err := rows.Scan(&r.ID, &r.Study, &r.Version, &r.StudyHash, &at, &r.Baseline, &r.Status, &r.Report); err != nil {
			return nil, fmt.Errorf("drift runs of %q: %w", study, err)
		}
		if r.At, err = parseTime(at); err != nil {
			return nil, err
		}
		out = append(out, r)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("drift runs of %q: %w", study, err)
	}
	return out, nil
}

// DriftReference returns the baseline and the latest run on a study hash,
// with their outputs; ErrNotFound when no run exists yet.
func (s *Store) DriftReference(ctx context.Context, study, hash string) (baseline, latest DriftRun, err error) {
	load := func(order string) (DriftRun, error) {
		var r DriftRun
		var at string
		err := s.rs.QueryRowContext(ctx, `SELECT id, study_id, version, study_hash, at, baseline, status, report FROM drift_runs
			WHERE study_id = ? AND study_hash = ? ORDER BY id `+order+` LIMIT 1`, study, hash).
			Scan(&r.ID, &r.Study, &r.Version, &r.StudyHash, &at, &r.Baseline, &r.Status, &r.Report)
		if errors.Is(err, sql.ErrNoRows) {
			return r, ErrNotFound
		}
		if err != nil {
			return r, err
		}
		if r.At, err = parseTime(at); err != nil {
			return r, err
		}
		rows, err := s.rs.QueryContext(ctx, `SELECT probe, arm, repetition, turn, text, model_reported, fingerprint FROM drift_outputs WHERE run_id = ? ORDER BY probe, arm, repetition, turn`, r.ID)
		if err != nil {
			return r, err
		}
		defer rows.Close()
		for rows.Next() {
			var o drift.Output
			if err := rows.Scan(&o.Probe, &o.Arm, &o.Run, &o.Turn, &o.Text, &o.ModelReported, &o.Fingerprint); err != nil {
				return r, err
			}
			r.Outputs = append(r.Outputs, o)
		}
		return r, rows.Err()
	}
	if baseline, err = load("ASC"); err != nil {
		return baseline, latest, fmt.Errorf("drift baseline of %q: %w", study, err)
	}
	if latest, err = load("DESC"); err != nil {
		return baseline, latest, fmt.Errorf("latest drift run of %q: %w", study, err)
	}
	return baseline, latest, nil
}
