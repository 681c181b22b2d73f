package store

import (
	"bytes"
	"context"
	"crypto/sha256"
	"database/sql"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	"trialogue/arms/canon"
	"trialogue/arms/codes"
)

// Genesis is the previous hash of a study's first chain record.
var Genesis = strings.Repeat("0", 64)

// Kinds of chain records.
const (
	EventVersion  = "version"  // a study version was registered
	EventAssigned = "assigned" // a respondent entered and was assigned an arm
	EventTurn     = "turn"     // a turn was committed
	EventFinished = "finished" // a respondent continued back to the survey
	EventPhase    = "phase"    // the study changed phase
)

// Record is one link of a study's hash chain.
type Record struct {
	Study   string          `json:"study"`
	Seq     int64           `json:"seq"`
	Kind    string          `json:"kind"`
	At      string          `json:"at"`
	Content json.RawMessage `json:"content"` // canonical JSON of {"at","data","kind","seq","study"}
	Prev    string          `json:"prev"`
	Hash    string          `json:"hash"`
}

// chainContent is what a record's hash covers besides the previous hash.
type chainContent struct {
	Study string `json:"study"`
	Seq   int64  `json:"seq"`
	Kind  string `json:"kind"`
	At    string `json:"at"`
	Data  any    `json:"data"`
}

// ChainHash is the hash of a record: the lowercase hex SHA-256 of the
// previous record's hash (hex), a newline, and the record's canonical content.
func ChainHash(prev string, content []byte) string {
	h := sha256.New()
	h.Write([]byte(prev))
	h.Write([]byte{'\n'})
	h.Write(content)
	return hex.EncodeToString(h.Sum(nil))
}

// RIDKey is how the chain names a respondent: a keyed hash of the rid, so
// that a published chain reveals no respondent id, while the holder of the
// study's secret can tie it to one.
func RIDKey(secret []byte, rid string) string {
	return hex.EncodeToString(codes.MAC(secret, []byte("trialogue/rid/v1\x00"+rid)))[:32]
}

// chainHead is the last record of a study's chain: its number and hash.
type chainHead struct {
	seq  int64
	hash string
}

// appendChain adds a record to the study's chain inside a write. The head
// is read once per transaction and then kept in it: the transaction holds
// the study's writes (the single writer on SQLite, the study's lock on
// PostgreSQL), so no one else can move it meanwhile.
func appendChain(ctx context.Context, tx *Tx, study, kind string, at time.Time, data any) error {
	head, ok := tx.heads[study]
	if !ok {
		head.hash = Genesis
		err := tx.QueryRowContext(ctx, `SELECT seq, hash FROM chain WHERE study_id = ? ORDER BY seq DESC LIMIT 1`, study).Scan(&head.seq, &head.hash)
		if err != nil && !errors.Is(err, sql.ErrNoRows) {
			return fmt.Errorf("chain head of %q: %w", study, err)
		}
	}
	seq, prev := head.seq, head.hash
	c := chainContent{Study: study, Seq: seq + 1, Kind: kind, At: fmtTime(at), Data: data}
	// The records' plain shapes have a direct canonical encoder, a tenth of
	// Marshal's time; anything else goes through Marshal.
	content, ok := canon.AppendFlat(nil, map[string]any{"study": c.Study, "seq": c.Seq, "kind": c.Kind, "at": c.At, "data": c.Data})
	if !ok {
		var err error
		if content, err = canon.Marshal(c); err != nil {
			return fmt.Errorf("chain record: %w", err)
		}
	}
	hash := ChainHash(prev, content)
	_, err := tx.ExecContext(ctx, `INSERT INTO chain (study_id, seq, kind, at, content, prev, hash) VALUES (?, ?, ?, ?, ?, ?, ?)`,
		study, c.Seq, kind, c.At, string(content), prev, hash)
	if err != nil {
		return fmt.Errorf("append to chain of %q: %w", study, err)
	}
	if tx.heads == nil {
		tx.heads = map[string]chainHead{}
	}
	tx.heads[study] = chainHead{c.Seq, hash}
	return nil
}

// Chain lists a study's chain records in order of their sequence numbers.
func (s *Store) Chain(ctx context.Context, study string) ([]Record, error) {
	rows, err := s.rs.QueryContext(ctx, `SELECT study_id, seq, kind, at, content, prev, hash FROM chain WHERE study_id = ? ORDER BY seq`, study)
	if err != nil {
		return nil, fmt.Errorf("chain of %q: %w", study, err)
	}
	defer rows.Close()
	var out []Record
	for rows.Next() {
		var r Record
		var content string
		if err := rows.Scan(&r.Study, &r.Seq, &r.Kind, &r.At, &content, &r.Prev, &r.Hash); err != nil {
			return nil, fmt.Errorf("chain of %q: %w", study, err)
		}
		r.Content = json.RawMessage(content)
		out = append(out, r)
	}
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("chain of %q: %w", study, err)
	}
	return out, nil
}

// Head is a chain's latest record: its hash is a commitment to everything
// logged so far, which a researcher can publish with its time.
type Head struct {
	Seq  int64
	Hash string
	At   string
}

// ChainHead returns the latest record of a study's chain.
func (s *Store) ChainHead(ctx context.Context, study string) (Head, error) {
	var h Head
	err := s.rs.QueryRowContext(ctx, `SELECT seq, hash, at FROM chain WHERE study_id = ? ORDER BY seq DESC LIMIT 1`, study).Scan(&h.Seq, &h.Hash, &h.At)
	if errors.Is(err, sql.ErrNoRows) {
		return h, fmt.Errorf("chain of %q: %w", study, ErrNotFound)
	}
	if err != nil {
		return h, fmt.Errorf("chain of %q: %w", study, err)
	}
	return h, nil
}

// How a chain broke.
const (
	BreakEdited    = "edited content"
	BreakMissing   = "missing record"
	BreakReordered = "reordered records"
	BreakInserted  = "inserted record"
)

// Break describes the first place where a chain does not hold.
type Break struct {
	Seq      int64  // the record's sequence number as stored
	Position int    // 0-based position in the order checked
	How      string // one of the Break constants
	Detail   string
}

func (b *Break) Error() string {
	return fmt.Sprintf("chain record %d (position %d): %s: %s", b.Seq, b.Position+1, b.How, b.Detail)
}

// VerifyChain checks records in the order given (by sequence number from
// the database, by line from a bundle) and returns the first break, or nil
// when the chain holds. Each record must hash to its stored hash and link to
// the record before it; where a link fails, the record it links to tells how:
// a later record (reordered), one further back (records inserted between),
// or none (a record is missing).
func VerifyChain(recs []Record) *Break {
	pos := make(map[string]int, len(recs))
	for i, r := range recs {
		if _, dup := pos[r.Hash]; !dup {
			pos[r.Hash] = i
		}
	}
	prev := Genesis
	for i, r := range recs {
		if got := ChainHash(r.Prev, r.Content); got != r.Hash {
			return &Break{r.Seq, i, BreakEdited, "its content or hash was changed: the content hashes to " + got[:16] + "…, the record says " + short(r.Hash)}
		}
		if r.Prev != prev {
			j, known := pos[r.Prev]
			switch {
			case known && j > i:
				return &Break{r.Seq, i, BreakReordered, fmt.Sprintf("it follows record %d, which comes after it", recs[j].Seq)}
			case known && j < i-1:
				return &Break{recs[j+1].Seq, j + 1, BreakInserted, fmt.Sprintf("record %d links to record %d, so the %d record(s) between them were inserted", r.Seq, recs[j].Seq, i-1-j)}
			case r.Prev == Genesis:
				return &Break{r.Seq, i, BreakReordered, "it claims to be the first record but is not"}
			default:
				return &Break{r.Seq, i, BreakMissing, "the record it follows (hash " + short(r.Prev) + ") is not in the chain"}
			}
		}
		var c struct {
			Study string `json:"study"`
			Seq   int64  `json:"seq"`
			Kind  string `json:"kind"`
			At    string `json:"at"`
		}
		dec := json.NewDecoder(bytes.NewReader(r.Content))
		if err := dec.Decode(&c); err != nil {
			return &Break{r.Seq, i, BreakEdited, "its content is not valid JSON: " + err.Error()}
		}
		if c.Seq != r.Seq || c.Kind != r.Kind || c.At != r.At || c.Study != r.Study {
			return &Break{r.Seq, i, BreakEdited, fmt.Sprintf("its stored sequence, kind, time or study (%d, %s, %s, %s) differ from its hashed content (%d, %s, %s, %s)",
				r.Seq, r.Kind, r.At, r.Study, c.Seq, c.Kind, c.At, c.Study)}
		}
		if c.Seq != int64(i)+1 {
			return &Break{r.Seq, i, BreakMissing, fmt.Sprintf("sequence number %d stands at position %d", c.Seq, i+1)}
		}
		prev = r.Hash
	}
	return nil
}

func short(h string) string {
	if len(h) > 16 {
		return h[:16] + "…"
	}
	return h
}
