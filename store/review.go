package store

import (
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"
	"unicode/utf8"

	"trialogue/arms/codes"
)

// EventReview is the chain record of a reviewer's decision on a session.
const EventReview = "review"

// What a reviewer may decide about a session. Nothing is ever deleted:
// an excluded session stays, with its reason, and may be included again.
const (
	ReviewMark    = "reviewed" // the transcript was read
	ReviewNote    = "note"     // a note replaces the previous one ("" clears it)
	ReviewExclude = "exclude"  // leave the session out of the analysis, for a reason
	ReviewInclude = "include"  // take an excluded session back in, for a reason
)

// MaxReviewText bounds a note or a reason, in characters.
const MaxReviewText = 4000

// Review is where a session's review stands: the latest decision of each
// kind. The chain holds every decision in order.
type Review struct {
	SessionID int64
	Reviewed  bool
	Note      string
	Excluded  bool
	Reason    string // why the session is excluded, or was taken back in
	ByUser    int64  // who decided last
	ByEmail   string
	At        time.Time // zero: never reviewed
}

// ReviewAction is one reviewer's decision.
type ReviewAction struct {
	Session int64
	Action  string // one of the Review constants
	Text    string // the note, or the reason of an exclusion or inclusion
	By      Actor
}

// Review applies a reviewer's decision to a session of a study and logs it
// in the study's chain, with the SHA-256 of the note or reason (the chain
// is published; the text stays in the database). Marking a reviewed session
// reviewed again changes nothing.
func (s *Store) Review(ctx context.Context, study string, a ReviewAction) (Review, error) {
	text := strings.TrimSpace(a.Text)
	switch a.Action {
	case ReviewMark, ReviewNote:
	case ReviewExclude, ReviewInclude:
		if text == "" {
			return Review{}, &InvalidError{Msg: "give a reason: an exclusion, or taking a session back in, is logged with why"}
		}
	default:
		return Review{}, &InvalidError{Msg: fmt.Sprintf("unknown review decision %q", a.Action)}
	}
	if !utf8.ValidString(text) || utf8.RuneCountInString(text) > MaxReviewText {
		return Review{}, &InvalidError{Msg: fmt.Sprintf("a note or reason is valid text of at most %d characters", MaxReviewText)}
	}
	var out Review
	err := s.wr.do(ctx, study, func(ctx context.Context, tx *Tx) error {
		var owner string
		if err := tx.QueryRowContext(ctx, `SELECT study_id FROM sessions WHERE id = ?`, a.Session).Scan(&owner); err != nil || owner != study {
			if err == nil || errors.Is(err, sql.ErrNoRows) {
				return fmt.Errorf("session %d of study %s: %w", a.Session, study, ErrNotFound)
			}
			return err
		}
		cur, err := review(ctx, tx, a.Session)
		if err != nil {
			return err
		}
		next := cur
		switch a.Action {
		case ReviewMark:
			if cur.Reviewed {
				out = cur
				return nil
			}
			next.Reviewed = true
		case ReviewNote:
			next.Note = text
		case ReviewExclude:
			next.Excluded, next.Reason = true, text
		case ReviewInclude:
			if !cur.Excluded {
				return &InvalidError{Msg: fmt.Sprintf("session %d is not excluded", a.Session)}
			}
			next.Excluded, next.Reason = false, text
		}
		now := s.now()
		_, err = tx.ExecContext(ctx, `INSERT INTO reviews (session_id, reviewed, note, excluded, reason, by_user, at) VALUES (?, ?, ?, ?, ?, ?, ?)
			ON CONFLICT (session_id) DO UPDATE SET reviewed = excluded.reviewed, note = excluded.note, excluded = excluded.excluded,
			reason = excluded.reason, by_user = excluded.by_user, at = excluded.at`,
			a.Session, next.Reviewed, next.Note, next.Excluded, next.Reason, sql.NullInt64{Int64: a.By.UserID, Valid: a.By.UserID != 0}, fmtTime(now))
		if err != nil {
			return err
		}
		data := map[string]any{"session": a.Session, "action": a.Action, "by": a.By.String()}
		if a.Action != ReviewMark {
			data["text_sha256"] = codes.SHA256Hex([]byte(text))
		}
		if err := appendChain(ctx, tx, study, EventReview, now, data); err != nil {
			return err
		}
		out, err = review(ctx, tx, a.Session)
		return err
	})
	if err != nil {
		return Review{}, fmt.Errorf("review session %d: %w", a.Session, err)
	}
	return out, nil
}

const reviewSelect = `SELECT r.session_id, r.reviewed, r.note, r.excluded, r.reason, COALESCE(r.by_user, 0), COALESCE(u.email, ''), r.at
	FROM reviews r LEFT JOIN users u ON u.id = r.by_user`

func scanReview(row scanner) (Review, error) {
	var r Review
	var at string
	if err := row.Scan(&r.SessionID, &r.Reviewed, &r.Note, &r.Excluded, &r.Reason, &r.ByUser, &r.ByEmail, &at); err != nil {
		return r, err
	}
	var err error
	r.At, err = parseTime(at)
	return r, err
}

// review reads a session's review; a session never reviewed has the zero Review.
func review(ctx context.Context, q querier, session int64) (Review, error) {
	r, err := scanReview(q.QueryRowContext(ctx, reviewSelect+` WHERE r.session_id = ?`, session))
	if errors.Is(err, sql.ErrNoRows) {
		return Review{SessionID: session}, nil
	}
	return r, err
}

// ReviewOf returns a session's review; the zero Review if none.
func (s *Store) ReviewOf(ctx context.Context, session int64) (Review, error) {
	r, err := review(ctx, s.rs, session)
	if err != nil {
		return Review{}, fmt.Errorf("review of session %d: %w", session, err)
	}
	return r, nil
}

// ReviewedPilots counts the pilot sessions of a study version that are
// marked reviewed.
func (s *Store) ReviewedPilots(ctx context.Context, study string, version int) (int, error) {
	var n int
	err := s.rs.QueryRowContext(ctx, `SELECT COUNT(*) FROM sessions s JOIN reviews r ON r.session_id = s.id
		WHERE s.study_id = ? AND s.version = ? AND s.pilot = 1 AND r.reviewed = 1`, study, version).Scan(&n)
	if err != nil {
		return 0, fmt.Errorf("reviewed pilot sessions of %q: %w", study, err)
	}
	return n, nil
}

// SessionFilter chooses sessions for the transcript list.
type SessionFilter struct {
	Cohort    Cohort
	Arm       string // "" for all
	Completed string // "yes", "no" or "" for all
	Reviewed  string // "yes", "no" or ""
	Excluded  string // "yes", "no" or ""
	// Search finds sessions whose respondent id or any turn contains the
	// text (case-insensitive: for ASCII letters on SQLite, for all letters on
	// PostgreSQL).
	Search string
	// IDs, when not nil, keeps only these sessions (a filter computed
	// outside SQL, such as a transcript flag).
	IDs    []int64
	Limit  int // default 100
	Offset int
}

// SessionRow is a session as the transcript list shows it.
type SessionRow struct {
	Session
	Pilot        bool
	Synthetic    bool
	Replies      int // respondent turns
	Turns        int
	LastActivity time.Time // the latest turn, or entry
	Review       Review
}

// ListSessions lists a study's sessions that pass a filter, newest first,
// and how many pass in all.
func (s *Store) ListSessions(ctx context.Context, study string, f SessionFilter) ([]SessionRow, int, error) {
	cond, err := f.Cohort.where()
	if err != nil {
		return nil, 0, err
	}
	where := ` WHERE s.study_id = ?` + cond
	args := []any{study}
	yesNo := func(name, v, expr string) error {
		switch v {
		case "":
		case "yes":
			where += " AND " + expr
		case "no":
			where += " AND NOT " + expr
		default:
			return &InvalidError{Msg: fmt.Sprintf("%s must be yes, no or empty, not %q", name, v)}
		}
		return nil
	}
	if err := errors.Join(
		yesNo("completed", f.Completed, "(s.finished_at IS NOT NULL)"),
		yesNo("reviewed", f.Reviewed, "(COALESCE(r.reviewed, 0) = 1)"),
		yesNo("excluded", f.Excluded, "(COALESCE(r.excluded, 0) = 1)"),
	); err != nil {
		return nil, 0, err
	}
	if f.Arm != "" {
		where += ` AND s.arm = ?`
		args = append(args, f.Arm)
	}
	if q := strings.TrimSpace(f.Search); q != "" {
		like := "%" + strings.NewReplacer(`\`, `\\`, `%`, `\%`, `_`, `\_`).Replace(q) + "%"
		where += ` AND (s.rid ` + s.d.like + ` ? ESCAPE '\' OR EXISTS (SELECT 1 FROM turns t WHERE t.session_id = s.id AND t.text ` + s.d.like + ` ? ESCAPE '\'))`
		args = append(args, like, like)
	}
	if f.IDs != nil {
		ids, err := json.Marshal(f.IDs)
		if err != nil {
			return nil, 0, err
		}
		where += ` AND ` + s.d.idList("s.id")
		args = append(args, string(ids))
	}
	from := ` FROM sessions s LEFT JOIN reviews r ON r.session_id = s.id` + where
	var total int
	if err := s.r.QueryRowContext(ctx, s.sql(`SELECT COUNT(*)`+from), args...).Scan(&total); err != nil {
		return nil, 0, fmt.Errorf("sessions of %q: %w", study, err)
	}
	if f.Limit <= 0 {
		f.Limit = 100
	}
	rows, err := s.r.QueryContext(ctx, s.sql(`SELECT s.id, s.study_id, s.rid, s.token, s.version, s.study_hash, s.stratum, s.slot, s.arm, s.arm_code,
		s.covariates, s.created_at, s.finished_at, COALESCE(s.language, ''), s.pilot, s.synthetic,
		(SELECT COUNT(*) FROM turns t WHERE t.session_id = s.id AND t.role = 'respondent'),
		(SELECT COUNT(*) FROM turns t WHERE t.session_id = s.id),
		COALESCE((SELECT MAX(t.created_at) FROM turns t WHERE t.session_id = s.id), s.created_at),
		COALESCE(r.reviewed, 0), COALESCE(r.note, ''), COALESCE(r.excluded, 0), COALESCE(r.reason, ''), COALESCE(r.by_user, 0),
		COALESCE((SELECT email FROM users u WHERE u.id = r.by_user), ''), COALESCE(r.at, '')`+from+
		` ORDER BY s.id DESC LIMIT ? OFFSET ?`), append(args, f.Limit, max(f.Offset, 0))...)
	if err != nil {
		return nil, 0, fmt.Errorf("sessions of %q: %w", study, err)
	}
	defer rows.Close()
	var out []SessionRow
	for rows.Next() {
		row, err := scanSessionRow(rows)
		if err != nil {
			return nil, 0, fmt.Errorf("sessions of %q: %w", study, err)
		}
		out = append(out, row)
	}
	if err := rows.Err(); err != nil {
		return nil, 0, fmt.Errorf("sessions of %q: %w", study, err)
	}
	return out, total, nil
}

// SessionInStudy returns one session of a study as the list shows it.
func (s *Store) SessionInStudy(ctx context.Context, study string, id int64) (SessionRow, error) {
	rows, _, err := s.ListSessions(ctx, study, SessionFilter{Cohort: CohortAll, IDs: []int64{id}, Limit: 1})
	if err != nil {
		return SessionRow{}, err
	}
	if len(rows) == 0 {
		return SessionRow{}, fmt.Errorf("session %d of study %s: %w", id, study, ErrNotFound)
	}
	return rows[0], nil
}

func scanSessionRow(rows *sql.Rows) (SessionRow, error) {
	var r SessionRow
	var covs, created, last, reviewAt string
	var finished sql.NullString
	if err := rows.Scan(&r.ID, &r.StudyID, &r.RID, &r.Token, &r.Version, &r.StudyHash, &r.Stratum, &r.Slot, &r.Arm, &r.ArmCode,
		&covs, &created, &finished, &r.Language, &r.Pilot, &r.Synthetic, &r.Replies, &r.Turns, &last,
		&r.Review.Reviewed, &r.Review.Note, &r.Review.Excluded, &r.Review.Reason, &r.Review.ByUser, &r.Review.ByEmail, &reviewAt); err != nil {
		return r, err
	}
	if err := json.Unmarshal([]byte(covs), &r.Covariates); err != nil {
		return r, fmt.Errorf("covariates of session %d: %w", r.ID, err)
	}
	var err error
	if r.CreatedAt, err = parseTime(created); err != nil {
		return r, err
	}
	if finished.Valid {
		if r.FinishedAt, err = parseTime(finished.String); err != nil {
			return r, err
		}
	}
	if r.LastActivity, err = parseTime(last); err != nil {
		return r, err
	}
	r.Review.SessionID = r.ID
	if reviewAt != "" {
		if r.Review.At, err = parseTime(reviewAt); err != nil {
			return r, err
		}
	}
	return r, nil
}

// Failure is a model call that failed after every retry.
type Failure struct {
	At       time.Time
	Kind     string
	Status   int
	Attempts int
}

// FailuresOf lists a session's failed model calls, oldest first.
func (s *Store) FailuresOf(ctx context.Context, session int64) ([]Failure, error) {
	rows, err := s.rs.QueryContext(ctx, `SELECT at, kind, status, attempts FROM model_failures WHERE session_id = ? ORDER BY id`, session)
	if err != nil {
		return nil, fmt.Errorf("model failures of session %d: %w", session, err)
	}
	defer rows.Close()
	var out []Failure
	for rows.Next() {
		var f Failure
		var at string
		if err := rows.Scan(&at, &f.Kind, &f.Status, &f.Attempts); err != nil {
			return nil, fmt.Errorf("model failures of session %d: %w", session, err)
		}
		if f.At, err = parseTime(at); err != nil {
			return nil, err
		}
		out = append(out, f)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("model failures of session %d: %w", session, err)
	}
	return out, nil
}
