package store

import (
	"context"
	"fmt"

	"trialogue/arms"
	"trialogue/arms/analysis"
	"trialogue/arms/analysis/textmap"
)

// Design is what an analysis reads from the store, as plain values: a
// study's newest version, rebuilt from its canonical form, and every
// respondent assigned under any version.
type Design struct {
	Study   *arms.Study
	Version StudyVersion
	Units   []analysis.Unit
}

// Design reads a study's design for the effects analysis and the arms map.
// A study the database does not hold is ErrNotFound. It reads only.
func (s *Store) Design(ctx context.Context, id string) (*Design, error) {
	sv, err := s.Study(ctx, id)
	if err != nil {
		return nil, err
	}
	canon, err := s.StudyCanonical(ctx, id, sv.Version)
	if err != nil {
		return nil, err
	}
	study, err := arms.FromCanonical(canon)
	if err != nil {
		return nil, fmt.Errorf("study %s version %d as stored: %w", id, sv.Version, err)
	}
	sessions, err := s.Sessions(ctx, id)
	if err != nil {
		return nil, err
	}
	units := make([]analysis.Unit, len(sessions))
	for i, ss := range sessions {
		units[i] = analysis.Unit{RID: ss.RID, Arm: ss.Arm, Stratum: ss.Stratum, Slot: ss.Slot, Finished: ss.Finished(), Covariates: ss.Covariates}
	}
	return &Design{Study: study, Version: sv, Units: units}, nil
}

// MapDocs lists a study's model messages as the arms map reads them, with
// each message's session id, in the order of ModelMessages.
func (s *Store) MapDocs(ctx context.Context, study string) ([]textmap.Doc, []int64, error) {
	msgs, err := s.ModelMessages(ctx, study)
	if err != nil {
		return nil, nil, err
	}
	docs := make([]textmap.Doc, len(msgs))
	sessions := make([]int64, len(msgs))
	for i, m := range msgs {
		docs[i] = textmap.Doc{Arm: m.Arm, Text: m.Text}
		sessions[i] = m.SessionID
	}
	return docs, sessions, nil
}

// ModelMessage is one model-written turn with the arm of its session, for
// the arms map.
type ModelMessage struct {
	SessionID int64
	Arm       string
	Index     int // the turn's position in its session
	Text      string
}

// ModelMessages lists every model turn of a study, by session in order of
// entry, then by turn. It reads only.
func (s *Store) ModelMessages(ctx context.Context, study string) ([]ModelMessage, error) {
	rows, err := s.rs.QueryContext(ctx, `SELECT s.id, s.arm, t.idx, t.text FROM turns t
		JOIN sessions s ON s.id = t.session_id
		WHERE s.study_id = ? AND t.role = 'assistant' ORDER BY s.id, t.idx`, study)
	if err != nil {
		return nil, fmt.Errorf("model messages of %q: %w", study, err)
	}
	defer rows.Close()
	var out []ModelMessage
	for rows.Next() {
		var m ModelMessage
		if err := rows.Scan(&m.SessionID, &m.Arm, &m.Index, &m.Text); err != nil {
			return nil, fmt.Errorf("model messages of %q: %w", study, err)
		}
		out = append(out, m)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("model messages of %q: %w", study, err)
	}
	return out, nil
}
