package store

import (
	"context"
	"fmt"
)

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
