package store

import (
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"sort"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/arms/codes"
)

// Version is one stored version of a study.
type Version struct {
	Version   int    `json:"version"`
	Hash      string `json:"hash"`
	Canonical string `json:"canonical"`
	CreatedAt string `json:"created_at"`
	Source    string `json:"-"` // the study file, where known
}

// Dataset is everything an auditor checks about a study, from the
// database or from a bundle.
type Dataset struct {
	Study    string
	Versions []Version
	Seed     []byte // nil while sealed
	Secret   []byte // only from the database: ties rids to the chain's keys
	Sessions []Session
	RIDKeys  map[int64]string // session id → rid key, as the chain names respondents
	Turns    []Turn
	Chain    []Record
	// Masked holds the turns whose text a release copy masked, by
	// session and index: their text cannot match its logged hash.
	Masked map[[2]int64]bool
	// FileMismatch lists bundle files whose bytes differ from the manifest.
	FileMismatch []string
}

// Report is the outcome of an audit.
type Report struct {
	Study     string
	Records   int
	Head      Record // the latest chain record
	Chain     *Break // the first break of the chain, or nil
	Mismatch  []string
	Allocated []string // allocation audit findings
	Sealed    bool     // the seed was not available: allocation not audited
	Sessions  int
	Turns     int
}

// OK reports whether every check held.
func (r Report) OK() bool { return r.Chain == nil && len(r.Mismatch) == 0 && len(r.Allocated) == 0 }

// LoadDataset reads everything about a study from the database.
func (s *Store) LoadDataset(ctx context.Context, study string) (*Dataset, error) {
	d := &Dataset{Study: study, RIDKeys: map[int64]string{}}
	if err := s.rs.QueryRowContext(ctx, `SELECT secret, seed FROM studies WHERE id = ?`, study).Scan(&d.Secret, &d.Seed); err != nil {
		return nil, fmt.Errorf("study %q: %w", study, notFound(err))
	}
	rows, err := s.rs.QueryContext(ctx, `SELECT version, hash, canonical, created_at, source FROM study_versions WHERE study_id = ? ORDER BY version`, study)
	if err != nil {
		return nil, fmt.Errorf("versions of %q: %w", study, err)
	}
	for rows.Next() {
		var v Version
		if err := rows.Scan(&v.Version, &v.Hash, &v.Canonical, &v.CreatedAt, &v.Source); err != nil {
			rows.Close()
			return nil, fmt.Errorf("versions of %q: %w", study, err)
		}
		d.Versions = append(d.Versions, v)
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return nil, fmt.Errorf("versions of %q: %w", study, err)
	}
	if d.Sessions, err = s.Sessions(ctx, study); err != nil {
		return nil, err
	}
	for _, sess := range d.Sessions {
		d.RIDKeys[sess.ID] = RIDKey(d.Secret, sess.RID)
	}
	if d.Turns, err = scanTurns(s.rs.QueryContext(ctx, turnSelect+` WHERE session_id IN (SELECT id FROM sessions WHERE study_id = ?) ORDER BY session_id, idx`, study)); err != nil {
		return nil, fmt.Errorf("turns of %q: %w", study, err)
	}
	if d.Chain, err = s.Chain(ctx, study); err != nil {
		return nil, err
	}
	return d, nil
}

// Check verifies the chain, ties every session and turn to its chain
// record, checks version hashes and, when the seed is known, audits the
// allocation: every assignment must be the arm that the seed's sequence
// puts at its slot, with no slot used twice or skipped.
func (d *Dataset) Check() Report {
	r := Report{Study: d.Study, Records: len(d.Chain), Sessions: len(d.Sessions), Turns: len(d.Turns), Sealed: d.Seed == nil}
	if n := len(d.Chain); n > 0 {
		r.Head = d.Chain[n-1]
	}
	r.Chain = VerifyChain(d.Chain)
	bad := func(format string, args ...any) { r.Mismatch = append(r.Mismatch, fmt.Sprintf(format, args...)) }

	// What the chain says, by kind.
	type key struct {
		session int64
		index   int
	}
	assigned := map[int64]map[string]any{}
	turns := map[key]map[string]any{}
	finished := map[int64]bool{}
	versions := map[int]string{}
	for _, rec := range d.Chain {
		var c struct {
			Kind string         `json:"kind"`
			Data map[string]any `json:"data"`
		}
		if err := json.Unmarshal(rec.Content, &c); err != nil {
			continue // VerifyChain reports it
		}
		id := int64(num(c.Data["session"]))
		switch c.Kind {
		case EventAssigned:
			assigned[id] = c.Data
		case EventTurn:
			turns[key{id, int(num(c.Data["index"]))}] = c.Data
		case EventFinished:
			finished[id] = true
		case EventVersion:
			versions[int(num(c.Data["version"]))], _ = c.Data["hash"].(string)
		}
	}
	for _, f := range d.FileMismatch {
		bad("bundle file %s: its bytes differ from the hash in manifest.json", f)
	}
	for _, v := range d.Versions {
		if got := codes.SHA256Hex([]byte(v.Canonical)); got != v.Hash {
			bad("study version %d: its canonical form hashes to %s, not to its recorded hash %s", v.Version, short(got), short(v.Hash))
		}
		if v.Source != "" {
			def, err := arms.Parse(fmt.Sprintf("version %d", v.Version), []byte(v.Source))
			if err != nil {
				bad("study version %d: its study file no longer parses: %v", v.Version, err)
			} else if h, err := def.Hash(); err != nil || h != v.Hash {
				bad("study version %d: its study file hashes to %s, not to its recorded hash %s", v.Version, short(h), short(v.Hash))
			}
		}
		if h, ok := versions[v.Version]; !ok || h != v.Hash {
			bad("study version %d: the chain does not log it with hash %s", v.Version, short(v.Hash))
		}
	}
	seen := map[int64]bool{}
	for _, s := range d.Sessions {
		seen[s.ID] = true
		a, ok := assigned[s.ID]
		if !ok {
			bad("session %d: no assignment of it is in the chain (inserted after the fact?)", s.ID)
			continue
		}
		covs, _ := json.Marshal(s.Covariates)
		switch {
		case a["arm"] != s.Arm || a["arm_code"] != s.ArmCode:
			bad("session %d: arm %s (%s) differs from the logged assignment %v (%v)", s.ID, s.Arm, s.ArmCode, a["arm"], a["arm_code"])
		case a["stratum"] != s.Stratum || int(num(a["slot"])) != s.Slot:
			bad("session %d: stratum %s slot %d differ from the logged %v slot %v", s.ID, s.Stratum, s.Slot, a["stratum"], a["slot"])
		case d.RIDKeys[s.ID] != "" && a["rid_key"] != d.RIDKeys[s.ID]:
			bad("session %d: its respondent id differs from the logged one", s.ID)
		case a["covariates_sha256"] != codes.SHA256Hex(covs):
			bad("session %d: its covariates differ from the logged ones", s.ID)
		case a["study_hash"] != s.StudyHash || int(num(a["version"])) != s.Version:
			bad("session %d: its study version differs from the logged one", s.ID)
		}
		if s.Finished() != finished[s.ID] {
			bad("session %d: finished is %t, the chain says %t", s.ID, s.Finished(), finished[s.ID])
		}
	}
	for id := range assigned {
		if !seen[id] {
			bad("session %d: logged in the chain but missing from the sessions", id)
		}
	}
	have := map[key]bool{}
	for _, t := range d.Turns {
		k := key{t.SessionID, t.Index}
		have[k] = true
		c, ok := turns[k]
		switch {
		case !ok:
			bad("turn %d of session %d: not in the chain (inserted after the fact?)", t.Index, t.SessionID)
		case !d.Masked[[2]int64{t.SessionID, int64(t.Index)}] && codes.SHA256Hex([]byte(t.Text)) != c["text_sha256"]:
			bad("turn %d of session %d: its text was changed after it was logged", t.Index, t.SessionID)
		case t.TextSHA256 != c["text_sha256"] || t.RequestSHA256 != str(c["request_sha256"]) || t.SystemSHA256 != str(c["system_sha256"]):
			bad("turn %d of session %d: its recorded hashes differ from the logged ones", t.Index, t.SessionID)
		case t.Role != c["role"] || t.ModelReported != str(c["model_reported"]):
			bad("turn %d of session %d: its role or model differs from the logged one", t.Index, t.SessionID)
		}
	}
	var missing []key
	for k := range turns {
		if !have[k] {
			missing = append(missing, k)
		}
	}
	sort.Slice(missing, func(i, j int) bool {
		if missing[i].session != missing[j].session {
			return missing[i].session < missing[j].session
		}
		return missing[i].index < missing[j].index
	})
	for _, k := range missing {
		bad("turn %d of session %d: logged in the chain but missing from the turns", k.index, k.session)
	}
	if d.Seed != nil {
		r.Allocated = d.auditAllocation()
	}
	return r
}

// auditAllocation regenerates each stratum's sequence from the seed.
func (d *Dataset) auditAllocation() []string {
	var out []string
	plans := map[int]*assign.Plan{}
	defs := map[int]*arms.Study{}
	for _, v := range d.Versions {
		def, err := arms.FromCanonical([]byte(v.Canonical))
		if err != nil {
			out = append(out, fmt.Sprintf("study version %d: %v", v.Version, err))
			continue
		}
		p, err := assign.NewPlan(d.Seed, def.Scheme())
		if err != nil {
			out = append(out, fmt.Sprintf("study version %d: %v", v.Version, err))
			continue
		}
		plans[v.Version], defs[v.Version] = p, def
	}
	slots := map[string]map[int]int64{}
	for _, s := range d.Sessions {
		p, ok := plans[s.Version]
		if !ok {
			out = append(out, fmt.Sprintf("session %d: its study version %d is not available", s.ID, s.Version))
			continue
		}
		if want := p.Slot(s.Stratum, s.Slot).Arm; want != s.Arm {
			out = append(out, fmt.Sprintf("session %d: slot %d of stratum %s is arm %s by the seed's sequence, but the session has %s", s.ID, s.Slot, s.Stratum, want, s.Arm))
		}
		if wantCode := defs[s.Version].Arms[s.Arm]; wantCode != nil && wantCode.Code != s.ArmCode {
			out = append(out, fmt.Sprintf("session %d: arm %s has code %s, but the session has %s", s.ID, s.Arm, wantCode.Code, s.ArmCode))
		}
		if slots[s.Stratum] == nil {
			slots[s.Stratum] = map[int]int64{}
		}
		if other, dup := slots[s.Stratum][s.Slot]; dup {
			out = append(out, fmt.Sprintf("sessions %d and %d share slot %d of stratum %s", other, s.ID, s.Slot, s.Stratum))
		}
		slots[s.Stratum][s.Slot] = s.ID
	}
	strata := make([]string, 0, len(slots))
	for k := range slots {
		strata = append(strata, k)
	}
	sort.Strings(strata)
	for _, st := range strata {
		for i := 0; i < len(slots[st]); i++ {
			if _, ok := slots[st][i]; !ok {
				out = append(out, fmt.Sprintf("stratum %s: slot %d was skipped", st, i))
				break
			}
		}
	}
	return out
}

func num(v any) float64 {
	f, _ := v.(float64)
	return f
}

func str(v any) string {
	s, _ := v.(string)
	return s
}

// notFound maps "no rows" to ErrNotFound.
func notFound(err error) error {
	if errors.Is(err, sql.ErrNoRows) {
		return ErrNotFound
	}
	return err
}
