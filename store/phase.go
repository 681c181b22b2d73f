package store

import (
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"
	"unicode"

	"trialogue/arms"
)

// Phases of a study. A study starts in draft, where the team tries it out;
// a pilot takes a capped number of respondents, whose transcripts are
// reviewed; live is the main fielding, with the design frozen; closed takes
// no new respondents, and its allocation seed may be published.
const (
	PhaseDraft  = "draft"
	PhasePilot  = "pilot"
	PhaseLive   = "live"
	PhaseClosed = "closed"
)

// EventEthics is the chain record of an ethics approval reference being
// entered or changed.
const EventEthics = "ethics"

// Errors of entering a study in a phase that takes no new respondents.
var (
	// ErrStudyClosed means a new respondent tried to enter a closed study.
	ErrStudyClosed = errors.New("the study is closed")
	// ErrPilotFull means the pilot round has taken its cap of respondents.
	ErrPilotFull = errors.New("the pilot has taken all its respondents")
)

// transitions are the phase changes allowed: draft and pilot go back and
// forth while the study is revised; live is reached from a pilot only;
// any phase may close, and closing is final.
var transitions = map[string][]string{
	PhaseDraft: {PhasePilot, PhaseClosed},
	PhasePilot: {PhaseDraft, PhaseLive, PhaseClosed},
	PhaseLive:  {PhaseClosed},
}

// NextPhases lists the phases a study in phase may change to.
func NextPhases(phase string) []string { return transitions[phase] }

// StudyState is a study's phase and the facts the console and the go-live
// checklist need.
type StudyState struct {
	ID          string
	Phase       string
	EthicsRef   string    // the ethics approval reference; "" until entered
	LiveVersion int       // the version that went live; 0 if never live
	LiveAt      time.Time // zero if never live
	ClosedAt    time.Time // zero unless closed
	CreatedAt   time.Time
}

// Phase returns a study's phase.
func (s *Store) Phase(ctx context.Context, study string) (string, error) {
	var phase string
	if err := s.rs.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, study).Scan(&phase); err != nil {
		return "", fmt.Errorf("phase of %q: %w", study, notFound(err))
	}
	return phase, nil
}

const stateSelect = `SELECT id, phase, COALESCE(ethics_ref, ''), COALESCE(live_version, 0), COALESCE(live_at, ''),
	COALESCE(closed_at, ''), created_at FROM studies`

// State returns a study's phase and go-live facts.
func (s *Store) State(ctx context.Context, study string) (StudyState, error) {
	st, err := scanState(s.rs.QueryRowContext(ctx, stateSelect+` WHERE id = ?`, study))
	if err != nil {
		return StudyState{}, fmt.Errorf("study %q: %w", study, notFound(err))
	}
	return st, nil
}

// States lists every study in the database, by id.
func (s *Store) States(ctx context.Context) ([]StudyState, error) {
	rows, err := s.rs.QueryContext(ctx, stateSelect+` ORDER BY id`)
	if err != nil {
		return nil, fmt.Errorf("studies: %w", err)
	}
	defer rows.Close()
	var out []StudyState
	for rows.Next() {
		st, err := scanState(rows)
		if err != nil {
			return nil, fmt.Errorf("studies: %w", err)
		}
		out = append(out, st)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("studies: %w", err)
	}
	return out, nil
}

func scanState(row scanner) (StudyState, error) {
	var st StudyState
	var live, closed, created string
	if err := row.Scan(&st.ID, &st.Phase, &st.EthicsRef, &st.LiveVersion, &live, &closed, &created); err != nil {
		return st, err
	}
	var err error
	for _, t := range []struct {
		v  string
		to *time.Time
	}{{live, &st.LiveAt}, {closed, &st.ClosedAt}, {created, &st.CreatedAt}} {
		if t.v != "" {
			if *t.to, err = parseTime(t.v); err != nil {
				return st, err
			}
		}
	}
	return st, nil
}

// Versions lists a study's versions, oldest first, without their files.
func (s *Store) Versions(ctx context.Context, study string) ([]Version, error) {
	rows, err := s.rs.QueryContext(ctx, `SELECT version, hash, created_at FROM study_versions WHERE study_id = ? ORDER BY version`, study)
	if err != nil {
		return nil, fmt.Errorf("versions of %q: %w", study, err)
	}
	defer rows.Close()
	var out []Version
	for rows.Next() {
		var v Version
		if err := rows.Scan(&v.Version, &v.Hash, &v.CreatedAt); err != nil {
			return nil, fmt.Errorf("versions of %q: %w", study, err)
		}
		out = append(out, v)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("versions of %q: %w", study, err)
	}
	return out, nil
}

// Actor is who made a change, as the chain names them: a console user by
// id (the users table holds the address), or the command line.
type Actor struct {
	UserID int64 // 0: the command line
}

// String is the actor as the chain records it.
func (a Actor) String() string {
	if a.UserID == 0 {
		return "command-line"
	}
	return "user:" + strconv.FormatInt(a.UserID, 10)
}

// PhaseChange asks for a study to change phase.
type PhaseChange struct {
	Study string
	// From is the phase the caller saw; if the study has moved on since,
	// the change fails with ErrConflict and changes nothing.
	From string
	To   string
	By   Actor
	// Live only: the version going live, which must still be the newest,
	// and how many of its pilot transcripts must be marked reviewed.
	Version     int
	MinReviewed int
}

// PhaseError is a phase change that the study's phase does not allow.
type PhaseError struct {
	Study, From, To string
}

func (e *PhaseError) Error() string {
	next := transitions[e.From]
	if len(next) == 0 {
		return fmt.Sprintf("study %s is %s and cannot change phase", e.Study, e.From)
	}
	return fmt.Sprintf("study %s is %s: it can change to %s, not to %s", e.Study, e.From, strings.Join(next, " or "), e.To)
}

// ChangePhase moves a study to another phase and logs the change in its
// chain (from, to, who, and the version in force with its hash). Going live
// records the version as the live one, whose design no later file may
// change; closing records the time, from which sessions under way have a
// grace period.
func (s *Store) ChangePhase(ctx context.Context, c PhaseChange) error {
	err := s.wr.do(ctx, c.Study, func(ctx context.Context, tx *Tx) error {
		var phase string
		if err := tx.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, c.Study).Scan(&phase); err != nil {
			return notFound(err)
		}
		if c.From != "" && c.From != phase {
			return fmt.Errorf("the study changed to %s meanwhile: %w", phase, ErrConflict)
		}
		ok := false
		for _, p := range transitions[phase] {
			ok = ok || p == c.To
		}
		if !ok {
			return &PhaseError{Study: c.Study, From: phase, To: c.To}
		}
		var version int
		var hash string
		if err := tx.QueryRowContext(ctx, `SELECT version, hash FROM study_versions WHERE study_id = ? ORDER BY version DESC LIMIT 1`, c.Study).Scan(&version, &hash); err != nil {
			return notFound(err)
		}
		now := s.now()
		switch c.To {
		case PhaseLive:
			if c.Version != version {
				return fmt.Errorf("version %d was registered after version %d was checked: check it again: %w", version, c.Version, ErrConflict)
			}
			var reviewed int
			if err := tx.QueryRowContext(ctx, `SELECT COUNT(*) FROM sessions s JOIN reviews r ON r.session_id = s.id
				WHERE s.study_id = ? AND s.version = ? AND s.pilot = 1 AND r.reviewed = 1`, c.Study, version).Scan(&reviewed); err != nil {
				return err
			}
			if reviewed < c.MinReviewed {
				return &InvalidError{Msg: fmt.Sprintf("%d pilot transcript(s) of version %d are marked reviewed; going live needs %d", reviewed, version, c.MinReviewed)}
			}
			if _, err := tx.ExecContext(ctx, `UPDATE studies SET phase = ?, live_version = ?, live_at = ? WHERE id = ?`, PhaseLive, version, fmtTime(now), c.Study); err != nil {
				return err
			}
		case PhaseClosed:
			if _, err := tx.ExecContext(ctx, `UPDATE studies SET phase = ?, closed_at = ? WHERE id = ?`, PhaseClosed, fmtTime(now), c.Study); err != nil {
				return err
			}
		default:
			if _, err := tx.ExecContext(ctx, `UPDATE studies SET phase = ? WHERE id = ?`, c.To, c.Study); err != nil {
				return err
			}
		}
		return appendChain(ctx, tx, c.Study, EventPhase, now, map[string]any{
			"from": phase, "to": c.To, "by": c.By.String(), "version": version, "study_hash": hash})
	})
	if err != nil {
		return fmt.Errorf("change phase of study %q to %s: %w", c.Study, c.To, err)
	}
	return nil
}

// CloseStudy closes a study from the command line and logs the change in
// its chain; closing a closed study changes nothing.
func (s *Store) CloseStudy(ctx context.Context, study string) error {
	phase, err := s.Phase(ctx, study)
	if err != nil {
		return fmt.Errorf("close study %q: %w", study, err)
	}
	if phase == PhaseClosed {
		return nil
	}
	err = s.ChangePhase(ctx, PhaseChange{Study: study, From: phase, To: PhaseClosed})
	if errors.Is(err, ErrConflict) {
		return s.CloseStudy(ctx, study) // the phase changed meanwhile: look again
	}
	return err
}

// PhaseEvent is one phase change as the chain logged it.
type PhaseEvent struct {
	Seq       int64
	At        string
	From, To  string
	By        string
	Version   int
	StudyHash string
}

// PhaseHistory lists a study's phase changes from its chain, oldest first.
func (s *Store) PhaseHistory(ctx context.Context, study string) ([]PhaseEvent, error) {
	rows, err := s.rs.QueryContext(ctx, `SELECT seq, at, content FROM chain WHERE study_id = ? AND kind = ? ORDER BY seq`, study, EventPhase)
	if err != nil {
		return nil, fmt.Errorf("phase history of %q: %w", study, err)
	}
	defer rows.Close()
	var out []PhaseEvent
	for rows.Next() {
		var e PhaseEvent
		var content string
		if err := rows.Scan(&e.Seq, &e.At, &content); err != nil {
			return nil, fmt.Errorf("phase history of %q: %w", study, err)
		}
		var c struct {
			Data struct {
				From      string `json:"from"`
				To        string `json:"to"`
				By        string `json:"by"`
				Version   int    `json:"version"`
				StudyHash string `json:"study_hash"`
			} `json:"data"`
		}
		if err := json.Unmarshal([]byte(content), &c); err != nil {
			return nil, fmt.Errorf("phase history of %q: record %d: %w", study, e.Seq, err)
		}
		e.From, e.To, e.By, e.Version, e.StudyHash = c.Data.From, c.Data.To, c.Data.By, c.Data.Version, c.Data.StudyHash
		out = append(out, e)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("phase history of %q: %w", study, err)
	}
	return out, nil
}

// MaxEthicsRef bounds an ethics approval reference, in characters.
const MaxEthicsRef = 200

// SetEthicsRef records the study's ethics approval reference (a board's
// protocol number) and logs it in the chain. A closed study keeps the one
// it had.
func (s *Store) SetEthicsRef(ctx context.Context, study, ref string, by Actor) error {
	ref = strings.TrimSpace(ref)
	switch {
	case ref == "":
		return &InvalidError{Msg: "the ethics approval reference is empty"}
	case len([]rune(ref)) > MaxEthicsRef:
		return &InvalidError{Msg: fmt.Sprintf("the ethics approval reference is longer than %d characters", MaxEthicsRef)}
	case strings.IndexFunc(ref, unicode.IsControl) >= 0:
		return &InvalidError{Msg: "the ethics approval reference holds a control character such as a line break"}
	}
	err := s.wr.do(ctx, study, func(ctx context.Context, tx *Tx) error {
		var phase, old string
		if err := tx.QueryRowContext(ctx, `SELECT phase, COALESCE(ethics_ref, '') FROM studies WHERE id = ?`, study).Scan(&phase, &old); err != nil {
			return notFound(err)
		}
		if phase == PhaseClosed {
			return &InvalidError{Msg: "the study is closed: its ethics approval reference stays as it was"}
		}
		if old == ref {
			return nil
		}
		if _, err := tx.ExecContext(ctx, `UPDATE studies SET ethics_ref = ? WHERE id = ?`, ref, study); err != nil {
			return err
		}
		return appendChain(ctx, tx, study, EventEthics, s.now(), map[string]string{"ref": ref, "by": by.String()})
	})
	if err != nil {
		return fmt.Errorf("ethics reference of study %q: %w", study, err)
	}
	return nil
}

// entryRule decides, inside the entry's write, whether a new respondent may
// enter and whether the session is a pilot one: sessions entered before
// the study goes live (in draft, where the team tries it out, or in a
// pilot) are marked pilot; a pilot round takes at most the version's pilot
// cap of respondents, counted from the round's start.
func entryRule(ctx context.Context, tx *Tx, sv StudyVersion) (pilot bool, err error) {
	var phase string
	if err := tx.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, sv.ID).Scan(&phase); err != nil {
		return false, err
	}
	switch phase {
	case PhaseClosed:
		return false, ErrStudyClosed
	case PhaseLive:
		return false, nil
	case PhasePilot:
	default:
		return true, nil
	}
	var canonical string
	if err := tx.QueryRowContext(ctx, `SELECT canonical FROM study_versions WHERE study_id = ? AND version = ?`,
		sv.ID, sv.Version).Scan(&canonical); err != nil {
		return false, err
	}
	var c struct {
		Fielding struct {
			PilotCap *int64 `json:"pilot_cap"`
		} `json:"fielding"`
	}
	if err := json.Unmarshal([]byte(canonical), &c); err != nil {
		return false, fmt.Errorf("study version %d: %w", sv.Version, err)
	}
	cap := sql.NullInt64{Valid: c.Fielding.PilotCap != nil}
	if cap.Valid {
		cap.Int64 = *c.Fielding.PilotCap
	}
	limit := int64(arms.DefaultPilotCap)
	if cap.Valid && cap.Int64 > 0 {
		limit = cap.Int64
	}
	var start string
	if err := tx.QueryRowContext(ctx, `SELECT at FROM chain WHERE study_id = ? AND kind = ? ORDER BY seq DESC LIMIT 1`, sv.ID, EventPhase).Scan(&start); err != nil {
		return false, err
	}
	var n int64
	if err := tx.QueryRowContext(ctx, `SELECT COUNT(*) FROM sessions WHERE study_id = ? AND pilot = 1 AND synthetic = 0 AND created_at >= ?`, sv.ID, start).Scan(&n); err != nil {
		return false, err
	}
	if n >= limit {
		return false, ErrPilotFull
	}
	return true, nil
}

// PilotRound counts the respondents of the study's current pilot round and
// returns when the round began; zero and the zero time unless in pilot.
func (s *Store) PilotRound(ctx context.Context, study string) (int, time.Time, error) {
	st, err := s.State(ctx, study)
	if err != nil || st.Phase != PhasePilot {
		return 0, time.Time{}, err
	}
	var start string
	if err := s.rs.QueryRowContext(ctx, `SELECT at FROM chain WHERE study_id = ? AND kind = ? ORDER BY seq DESC LIMIT 1`, study, EventPhase).Scan(&start); err != nil {
		return 0, time.Time{}, fmt.Errorf("pilot round of %q: %w", study, notFound(err))
	}
	var n int
	if err := s.rs.QueryRowContext(ctx, `SELECT COUNT(*) FROM sessions WHERE study_id = ? AND pilot = 1 AND synthetic = 0 AND created_at >= ?`, study, start).Scan(&n); err != nil {
		return 0, time.Time{}, fmt.Errorf("pilot round of %q: %w", study, err)
	}
	t, err := parseTime(start)
	return n, t, err
}

// FrozenError is a study file that changes what the live version froze.
type FrozenError struct {
	Study       string
	LiveVersion int
	Changes     []string // field: what changed
}

func (e *FrozenError) Error() string {
	return fmt.Sprintf("study %s went live with version %d, whose design cannot change while respondents are assigned to it; this file changes %s. Undo these changes, or run the revision as a new study with its own id",
		e.Study, e.LiveVersion, strings.Join(e.Changes, "; "))
}

// checkFrozen refuses, inside a registration, a new version of a study that
// has gone live if it changes the live version's design.
func checkFrozen(ctx context.Context, tx *Tx, st *arms.Study) error {
	var live sql.NullInt64
	err := tx.QueryRowContext(ctx, `SELECT live_version FROM studies WHERE id = ?`, st.ID).Scan(&live)
	if errors.Is(err, sql.ErrNoRows) || (err == nil && !live.Valid) {
		return nil
	}
	if err != nil {
		return err
	}
	var canonical string
	if err := tx.QueryRowContext(ctx, `SELECT canonical FROM study_versions WHERE study_id = ? AND version = ?`, st.ID, live.Int64).Scan(&canonical); err != nil {
		return fmt.Errorf("live version %d: %w", live.Int64, notFound(err))
	}
	old, err := arms.FromCanonical([]byte(canonical))
	if err != nil {
		return fmt.Errorf("live version %d: %w", live.Int64, err)
	}
	if changes := old.FrozenChanges(st); len(changes) > 0 {
		return &FrozenError{Study: st.ID, LiveVersion: int(live.Int64), Changes: changes}
	}
	return nil
}

// ClosedFor reports how long ago a study closed; ok is false while it is open.
func (st StudyState) ClosedFor(now time.Time) (d time.Duration, ok bool) {
	if st.Phase != PhaseClosed || st.ClosedAt.IsZero() {
		return 0, false
	}
	return now.Sub(st.ClosedAt), true
}
