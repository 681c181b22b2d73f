package store

import (
	"context"
	"database/sql"
	"fmt"
	"slices"
	"time"
)

// Cohort chooses which sessions the console counts and lists: the main
// fielding (entered while live), the pilot (entered before going live),
// synthetic respondents, or all. Synthetic sessions are in no cohort but
// their own and all.
type Cohort string

// The cohorts.
const (
	CohortMain      Cohort = "main"
	CohortPilot     Cohort = "pilot"
	CohortSynthetic Cohort = "synthetic"
	CohortAll       Cohort = "all"
)

// Cohorts lists the cohorts in the order the console offers them.
var Cohorts = []Cohort{CohortMain, CohortPilot, CohortSynthetic, CohortAll}

func (c Cohort) where() (string, error) {
	switch c {
	case CohortMain:
		return " AND s.pilot = 0 AND s.synthetic = 0", nil
	case CohortPilot:
		return " AND s.pilot = 1 AND s.synthetic = 0", nil
	case CohortSynthetic:
		return " AND s.synthetic = 1", nil
	case CohortAll:
		return "", nil
	}
	return "", &InvalidError{Msg: fmt.Sprintf("cohort must be main, pilot, synthetic or all, not %q", string(c))}
}

// MonitorSession is one session as the monitor counts it.
type MonitorSession struct {
	ID           int64
	Arm          string
	Stratum      string
	CreatedAt    time.Time
	LastActivity time.Time // the latest turn, or entry
	Finished     bool
}

// TokenUse sums the tokens of an arm's model turns.
type TokenUse struct {
	Input, Output int64
}

// Snapshot is what the live monitor counts of a study's fielding, read in
// one transaction.
type Snapshot struct {
	Sessions []MonitorSession
	Tokens   map[string]TokenUse // by arm
	// Latencies of every model turn, and of those of the last hour, in
	// milliseconds, sorted.
	Latencies, HourLatencies []int64
	HourRetries              int // retries of model turns committed in the last hour
	HourFailures             int // model calls that failed after every retry in the last hour
}

// Monitor reads a cohort's sessions, model latencies, token use, retries
// and failures; since is the start of the last hour.
func (s *Store) Monitor(ctx context.Context, study string, c Cohort, since time.Time) (Snapshot, error) {
	cond, err := c.where()
	if err != nil {
		return Snapshot{}, err
	}
	f := Snapshot{Tokens: map[string]TokenUse{}}
	tx, err := s.readTx(ctx)
	if err != nil {
		return f, fmt.Errorf("monitor %q: %w", study, err)
	}
	defer tx.Rollback()
	fail := func(err error) (Snapshot, error) { return Snapshot{}, fmt.Errorf("monitor %q: %w", study, err) }

	rows, err := tx.QueryContext(ctx, `SELECT s.id, s.arm, s.stratum, s.created_at, s.finished_at IS NOT NULL,
		COALESCE((SELECT MAX(t.created_at) FROM turns t WHERE t.session_id = s.id), s.created_at)
		FROM sessions s WHERE s.study_id = ?`+cond+` ORDER BY s.id`, study)
	if err != nil {
		return fail(err)
	}
	for rows.Next() {
		var m MonitorSession
		var created, last string
		if err := rows.Scan(&m.ID, &m.Arm, &m.Stratum, &created, &m.Finished, &last); err != nil {
			rows.Close()
			return fail(err)
		}
		if m.CreatedAt, err = parseTime(created); err == nil {
			m.LastActivity, err = parseTime(last)
		}
		if err != nil {
			rows.Close()
			return fail(err)
		}
		f.Sessions = append(f.Sessions, m)
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return fail(err)
	}

	rows, err = tx.QueryContext(ctx, `SELECT s.arm, t.latency_ms, t.created_at, COALESCE(t.retries, 0), COALESCE(t.prompt_tokens, 0), COALESCE(t.completion_tokens, 0)
		FROM turns t JOIN sessions s ON s.id = t.session_id
		WHERE s.study_id = ? AND t.role = 'assistant'`+cond, study)
	if err != nil {
		return fail(err)
	}
	hour := fmtTime(since)
	for rows.Next() {
		var arm, at string
		var lat sql.NullInt64
		var retries int
		var in, out int64
		if err := rows.Scan(&arm, &lat, &at, &retries, &in, &out); err != nil {
			rows.Close()
			return fail(err)
		}
		u := f.Tokens[arm]
		u.Input += in
		u.Output += out
		f.Tokens[arm] = u
		if lat.Valid {
			f.Latencies = append(f.Latencies, lat.Int64)
		}
		if at >= hour {
			f.HourRetries += retries
			if lat.Valid {
				f.HourLatencies = append(f.HourLatencies, lat.Int64)
			}
		}
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return fail(err)
	}
	slices.Sort(f.Latencies)
	slices.Sort(f.HourLatencies)

	if err := tx.QueryRowContext(ctx, `SELECT COUNT(*) FROM model_failures m JOIN sessions s ON s.id = m.session_id
		WHERE s.study_id = ? AND m.at >= ?`+cond, study, hour).Scan(&f.HourFailures); err != nil {
		return fail(err)
	}
	return f, nil
}
