package store

import (
	"archive/tar"
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"sort"
	"strconv"
	"strings"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/arms/codes"
)

// BundleFormat is the version of the bundle layout this binary writes and reads.
const BundleFormat = 1

// Errors of reading a bundle, checked with errors.Is.
var (
	ErrBundleArchive = errors.New("the bundle is not a complete, readable tar.gz archive")
	ErrBundleFormat  = errors.New("the bundle was written in a newer format")
	ErrBundleMissing = errors.New("a file is missing from the bundle")
)

// Manifest describes a bundle.
type Manifest struct {
	Format  int               `json:"format"`
	Study   string            `json:"study"`
	Written string            `json:"written"`
	Release bool              `json:"release"` // rids removed and personal details masked
	Sealed  bool              `json:"sealed"`  // the allocation seed is withheld until the study is closed
	Head    Record            `json:"head"`
	Files   map[string]string `json:"files"` // name → SHA-256 of its bytes
}

// Bundle is a read bundle.
type Bundle struct {
	Manifest Manifest
	Dataset  *Dataset
}

// bundleSession is a session as a bundle line.
type bundleSession struct {
	ID         int64             `json:"id"`
	RID        string            `json:"rid,omitempty"` // absent from release copies
	RIDKey     string            `json:"rid_key"`
	Stratum    string            `json:"stratum"`
	Slot       int               `json:"slot"`
	Arm        string            `json:"arm"`
	ArmCode    string            `json:"arm_code"`
	Version    int               `json:"version"`
	StudyHash  string            `json:"study_hash"`
	Covariates map[string]string `json:"covariates"`
	CreatedAt  string            `json:"created_at"`
	FinishedAt string            `json:"finished_at,omitempty"`
}

// bundleTurn is a turn as a bundle line.
type bundleTurn struct {
	Session          int64  `json:"session"`
	Index            int    `json:"index"`
	Role             string `json:"role"`
	Text             string `json:"text"`
	Masks            int    `json:"masks,omitempty"` // release copies: replacements made in text
	StartedAt        string `json:"started_at"`
	CreatedAt        string `json:"created_at"`
	LatencyMS        int64  `json:"latency_ms,omitempty"`
	ModelRequested   string `json:"model_requested,omitempty"`
	ModelReported    string `json:"model_reported,omitempty"`
	Fingerprint      string `json:"fingerprint,omitempty"`
	Params           string `json:"params,omitempty"`
	PromptTokens     int    `json:"prompt_tokens,omitempty"`
	CompletionTokens int    `json:"completion_tokens,omitempty"`
	Retries          int    `json:"retries,omitempty"`
	FinishReason     string `json:"finish_reason,omitempty"`
	SystemSHA256     string `json:"system_sha256,omitempty"`
	RequestSHA256    string `json:"request_sha256,omitempty"`
	TextSHA256       string `json:"text_sha256"`
	StudyHash        string `json:"study_hash"`
}

// WriteBundle writes a study's replication bundle to w: the study files,
// versions and hashes, the allocation (seed and sequences once the study is
// closed), sessions, turns and the chain, with a README on checking each.
func (s *Store) WriteBundle(ctx context.Context, study string, w io.Writer, release bool) (Manifest, error) {
	d, err := s.LoadDataset(ctx, study)
	if err != nil {
		return Manifest{}, err
	}
	var phase string
	if err := s.rs.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, study).Scan(&phase); err != nil {
		return Manifest{}, fmt.Errorf("bundle %q: %w", study, err)
	}
	m := Manifest{Format: BundleFormat, Study: study, Written: fmtTime(s.now()), Release: release, Sealed: phase != PhaseClosed, Files: map[string]string{}}
	if n := len(d.Chain); n > 0 {
		m.Head = d.Chain[n-1]
	}
	files := map[string][]byte{}
	put := func(name string, b []byte) {
		files[name] = b
		m.Files[name] = codes.SHA256Hex(b)
	}
	versions, err := json.MarshalIndent(d.Versions, "", "  ")
	if err != nil {
		return m, fmt.Errorf("bundle %q: %w", study, err)
	}
	put("study/versions.json", versions)
	for _, v := range d.Versions {
		src, err := s.StudySource(ctx, study, v.Version)
		if err != nil {
			return m, err
		}
		put(fmt.Sprintf("study/v%d/study.yaml", v.Version), src)
		put(fmt.Sprintf("study/v%d/canonical.json", v.Version), []byte(v.Canonical))
	}
	if !m.Sealed {
		put("allocation/seed.txt", []byte(hex.EncodeToString(d.Seed)+"\n"))
		seq, err := sequences(d)
		if err != nil {
			return m, fmt.Errorf("bundle %q: %w", study, err)
		}
		put("allocation/sequence.csv", seq)
	}
	var lines bytes.Buffer
	for _, sess := range d.Sessions {
		b := bundleSession{ID: sess.ID, RID: sess.RID, RIDKey: d.RIDKeys[sess.ID], Stratum: sess.Stratum, Slot: sess.Slot, Arm: sess.Arm,
			ArmCode: sess.ArmCode, Version: sess.Version, StudyHash: sess.StudyHash, Covariates: sess.Covariates, CreatedAt: fmtTime(sess.CreatedAt)}
		if release {
			b.RID = ""
		}
		if sess.Finished() {
			b.FinishedAt = fmtTime(sess.FinishedAt)
		}
		if err := jsonLine(&lines, b); err != nil {
			return m, err
		}
	}
	put("sessions.jsonl", bytes.Clone(lines.Bytes()))
	lines.Reset()
	for _, t := range d.Turns {
		b := bundleTurn{Session: t.SessionID, Index: t.Index, Role: t.Role, Text: t.Text, StartedAt: fmtTime(t.StartedAt), CreatedAt: fmtTime(t.CreatedAt),
			LatencyMS: t.LatencyMS, ModelRequested: t.ModelRequested, ModelReported: t.ModelReported, Fingerprint: t.Fingerprint, Params: t.Params,
			PromptTokens: t.PromptTokens, CompletionTokens: t.CompletionTokens, Retries: t.Retries, FinishReason: t.FinishReason,
			SystemSHA256: t.SystemSHA256, RequestSHA256: t.RequestSHA256, TextSHA256: t.TextSHA256, StudyHash: t.StudyHash}
		if release && t.Role == RoleRespondent {
			b.Text, b.Masks = Mask(t.Text)
		}
		if err := jsonLine(&lines, b); err != nil {
			return m, err
		}
	}
	put("turns.jsonl", bytes.Clone(lines.Bytes()))
	lines.Reset()
	for _, r := range d.Chain {
		if err := jsonLine(&lines, r); err != nil {
			return m, err
		}
	}
	put("chain.jsonl", bytes.Clone(lines.Bytes()))
	lines.Reset()
	runs, err := s.DriftRuns(ctx, study)
	if err != nil {
		return m, err
	}
	for _, r := range runs {
		if err := jsonLine(&lines, map[string]any{"id": r.ID, "version": r.Version, "study_hash": r.StudyHash, "at": fmtTime(r.At),
			"baseline": r.Baseline, "status": r.Status, "report": json.RawMessage(r.Report)}); err != nil {
			return m, err
		}
	}
	put("drift/reports.jsonl", bytes.Clone(lines.Bytes()))
	put("README.md", []byte(bundleReadme(m)))
	manifest, err := json.MarshalIndent(m, "", "  ")
	if err != nil {
		return m, fmt.Errorf("bundle %q: %w", study, err)
	}
	files["manifest.json"] = manifest

	gz := gzip.NewWriter(w)
	tw := tar.NewWriter(gz)
	names := make([]string, 0, len(files))
	for n := range files {
		names = append(names, n)
	}
	sort.Strings(names)
	// the manifest first, so a reader learns the format before anything else
	names = append([]string{"manifest.json"}, remove(names, "manifest.json")...)
	mod := s.now()
	for _, n := range names {
		if err := tw.WriteHeader(&tar.Header{Name: study + "/" + n, Mode: 0o644, Size: int64(len(files[n])), ModTime: mod, Format: tar.FormatPAX}); err != nil {
			return m, fmt.Errorf("bundle %q: %w", study, err)
		}
		if _, err := tw.Write(files[n]); err != nil {
			return m, fmt.Errorf("bundle %q: %w", study, err)
		}
	}
	if err := tw.Close(); err != nil {
		return m, fmt.Errorf("bundle %q: %w", study, err)
	}
	if err := gz.Close(); err != nil {
		return m, fmt.Errorf("bundle %q: %w", study, err)
	}
	return m, nil
}

func remove(list []string, x string) []string {
	out := list[:0:0]
	for _, v := range list {
		if v != x {
			out = append(out, v)
		}
	}
	return out
}

func jsonLine(b *bytes.Buffer, v any) error {
	line, err := json.Marshal(v)
	if err != nil {
		return fmt.Errorf("bundle line: %w", err)
	}
	b.Write(line)
	b.WriteByte('\n')
	return nil
}

// sequences writes each stratum's allocation sequence, regenerated from the
// seed, to the end of the block holding its last used slot.
func sequences(d *Dataset) ([]byte, error) {
	if len(d.Versions) == 0 {
		return nil, errors.New("no study version")
	}
	def, err := arms.FromCanonical([]byte(d.Versions[len(d.Versions)-1].Canonical))
	if err != nil {
		return nil, err
	}
	plan, err := assign.NewPlan(d.Seed, def.Scheme())
	if err != nil {
		return nil, err
	}
	used := map[string]int{}
	for _, s := range d.Sessions {
		if s.Slot+1 > used[s.Stratum] {
			used[s.Stratum] = s.Slot + 1
		}
	}
	var b strings.Builder
	b.WriteString("stratum,slot,block,position,block_size,arm,arm_code,used\n")
	for _, st := range def.StrataKeys() {
		n := used[st]
		for i := 0; ; i++ {
			sl := plan.Slot(st, i)
			if i >= n && sl.Position == 0 {
				break
			}
			fmt.Fprintf(&b, "%s,%d,%d,%d,%d,%s,%s,%t\n", csvField(st), i, sl.Block, sl.Position, sl.BlockSize, sl.Arm, def.Arms[sl.Arm].Code, i < n)
		}
	}
	return []byte(b.String()), nil
}

func csvField(s string) string {
	if strings.ContainsAny(s, ",\"\n") {
		return `"` + strings.ReplaceAll(s, `"`, `""`) + `"`
	}
	return s
}

// ReadBundle reads a bundle written by WriteBundle.
func ReadBundle(path string) (*Bundle, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("open bundle: %w", err)
	}
	defer f.Close()
	gz, err := gzip.NewReader(bufio.NewReader(f))
	if err != nil {
		return nil, fmt.Errorf("%s: %w (%v)", path, ErrBundleArchive, err)
	}
	tr := tar.NewReader(gz)
	files := map[string][]byte{}
	prefix := ""
	for {
		h, err := tr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("%s: %w (after %d files: %v)", path, ErrBundleArchive, len(files), err)
		}
		if h.Typeflag != tar.TypeReg {
			continue
		}
		if h.Size > 1<<30 {
			return nil, fmt.Errorf("%s: %w (%s is %d bytes)", path, ErrBundleArchive, h.Name, h.Size)
		}
		b, err := io.ReadAll(tr)
		if err != nil {
			return nil, fmt.Errorf("%s: %w (in %s: %v)", path, ErrBundleArchive, h.Name, err)
		}
		dir, name, ok := strings.Cut(h.Name, "/")
		if !ok {
			return nil, fmt.Errorf("%s: %w (unexpected file %s)", path, ErrBundleArchive, h.Name)
		}
		if prefix == "" {
			prefix = dir
		}
		files[name] = b
	}
	if _, err := io.Copy(io.Discard, gz); err != nil {
		return nil, fmt.Errorf("%s: %w (%v)", path, ErrBundleArchive, err)
	}
	need := func(name string) ([]byte, error) {
		b, ok := files[name]
		if !ok {
			return nil, fmt.Errorf("%s: %w: %s", path, ErrBundleMissing, name)
		}
		return b, nil
	}
	mb, err := need("manifest.json")
	if err != nil {
		return nil, err
	}
	var m Manifest
	if err := json.Unmarshal(mb, &m); err != nil {
		return nil, fmt.Errorf("%s: manifest.json: %w", path, err)
	}
	if m.Format > BundleFormat {
		return nil, fmt.Errorf("%s: %w: format %d, this trialogue reads up to %d", path, ErrBundleFormat, m.Format, BundleFormat)
	}
	d := &Dataset{Study: m.Study, RIDKeys: map[int64]string{}, Masked: map[[2]int64]bool{}}
	b := &Bundle{Manifest: m, Dataset: d}
	required := []string{"study/versions.json", "sessions.jsonl", "turns.jsonl", "chain.jsonl"}
	if !m.Sealed {
		required = append(required, "allocation/seed.txt")
	}
	for _, name := range required {
		if _, err := need(name); err != nil {
			return nil, err
		}
	}
	names := make([]string, 0, len(m.Files))
	for n := range m.Files {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		got, ok := files[n]
		if !ok {
			return nil, fmt.Errorf("%s: %w: %s (listed in the manifest)", path, ErrBundleMissing, n)
		}
		if codes.SHA256Hex(got) != m.Files[n] {
			d.FileMismatch = append(d.FileMismatch, n)
		}
	}
	if err := json.Unmarshal(files["study/versions.json"], &d.Versions); err != nil {
		return nil, fmt.Errorf("%s: study/versions.json: %w", path, err)
	}
	for i, v := range d.Versions {
		name := fmt.Sprintf("study/v%d/study.yaml", v.Version)
		src, err := need(name)
		if err != nil {
			return nil, err
		}
		d.Versions[i].Source = string(src)
	}
	if !m.Sealed {
		seed, err := hex.DecodeString(strings.TrimSpace(string(files["allocation/seed.txt"])))
		if err != nil {
			return nil, fmt.Errorf("%s: allocation/seed.txt: not a hex seed: %w", path, err)
		}
		d.Seed = seed
	}
	err = eachLine(files["sessions.jsonl"], func(n int, line []byte) error {
		var bs bundleSession
		if err := json.Unmarshal(line, &bs); err != nil {
			return fmt.Errorf("sessions.jsonl line %d: %w", n, err)
		}
		sess := Session{ID: bs.ID, StudyID: m.Study, RID: bs.RID, Version: bs.Version, StudyHash: bs.StudyHash, Stratum: bs.Stratum,
			Slot: bs.Slot, Arm: bs.Arm, ArmCode: bs.ArmCode, Covariates: bs.Covariates}
		var err error
		if sess.CreatedAt, err = parseTime(bs.CreatedAt); err != nil {
			return fmt.Errorf("sessions.jsonl line %d: %w", n, err)
		}
		if bs.FinishedAt != "" {
			if sess.FinishedAt, err = parseTime(bs.FinishedAt); err != nil {
				return fmt.Errorf("sessions.jsonl line %d: %w", n, err)
			}
		}
		d.RIDKeys[bs.ID] = bs.RIDKey
		d.Sessions = append(d.Sessions, sess)
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	err = eachLine(files["turns.jsonl"], func(n int, line []byte) error {
		var bt bundleTurn
		if err := json.Unmarshal(line, &bt); err != nil {
			return fmt.Errorf("turns.jsonl line %d: %w", n, err)
		}
		t := Turn{SessionID: bt.Session, Index: bt.Index, Role: bt.Role, Text: bt.Text, LatencyMS: bt.LatencyMS, ModelRequested: bt.ModelRequested,
			ModelReported: bt.ModelReported, Fingerprint: bt.Fingerprint, Params: bt.Params, PromptTokens: bt.PromptTokens,
			CompletionTokens: bt.CompletionTokens, Retries: bt.Retries, FinishReason: bt.FinishReason, SystemSHA256: bt.SystemSHA256,
			RequestSHA256: bt.RequestSHA256, TextSHA256: bt.TextSHA256, StudyHash: bt.StudyHash}
		var err error
		if t.StartedAt, err = parseTime(bt.StartedAt); err != nil {
			return fmt.Errorf("turns.jsonl line %d: %w", n, err)
		}
		if t.CreatedAt, err = parseTime(bt.CreatedAt); err != nil {
			return fmt.Errorf("turns.jsonl line %d: %w", n, err)
		}
		if bt.Masks > 0 {
			d.Masked[[2]int64{bt.Session, int64(bt.Index)}] = true
		}
		d.Turns = append(d.Turns, t)
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	err = eachLine(files["chain.jsonl"], func(n int, line []byte) error {
		var r Record
		if err := json.Unmarshal(line, &r); err != nil {
			return fmt.Errorf("chain.jsonl line %d: %w", n, err)
		}
		d.Chain = append(d.Chain, r)
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return b, nil
}

func eachLine(b []byte, fn func(n int, line []byte) error) error {
	sc := bufio.NewScanner(bytes.NewReader(b))
	sc.Buffer(make([]byte, 0, 1<<20), 64<<20)
	n := 0
	for sc.Scan() {
		n++
		if len(bytes.TrimSpace(sc.Bytes())) == 0 {
			continue
		}
		if err := fn(n, sc.Bytes()); err != nil {
			return err
		}
	}
	return sc.Err()
}

func bundleReadme(m Manifest) string {
	seed := "allocation/seed.txt holds the allocation seed (hex) and allocation/sequence.csv each stratum's sequence regenerated from it."
	if m.Sealed {
		seed = "The allocation seed is SEALED: the study was not closed when this bundle was written, so the seed and the sequences are withheld (they would reveal future assignments). A bundle written after closing holds them."
	}
	return `# Replication bundle of study ` + m.Study + `

Written ` + m.Written + ` by Trialogue (bundle format ` + strconv.Itoa(m.Format) + `)` + map[bool]string{true: `, as a release copy: respondent ids are removed (sessions keep only rid_key, a keyed hash) and e-mail addresses, URLs, phone numbers and long digit runs in respondents' text are masked ("masks" counts them per turn).`, false: `.`}[m.Release] + `

## Files
- manifest.json: format, study, chain head, and the SHA-256 of every other file.
- study/versions.json: every version of the study file with its hash (SHA-256 of its RFC 8785 canonical JSON) and canonical form; study/vN/study.yaml and study/vN/canonical.json for each version N.
- ` + seed + `
- sessions.jsonl: one JSON object per session (arm, stratum, slot, covariates, version, times).
- turns.jsonl: one JSON object per turn with its text and audit fields (model requested and reported, fingerprint, parameters, token counts, retries, hashes).
- chain.jsonl: the study's hash chain, one record per line, in order.

## How to check each part
1. Run ` + "`trialogue verify THIS-FILE.tar.gz`" + ` (exit 0 when everything holds). By hand:
2. The chain: for each record in order, hash = hex(SHA-256(prev + "\n" + content)); prev of the first record is 64 zeros and every other prev is the hash of the record before it. The last hash is the head: ` + m.Head.Hash + ` (record ` + strconv.FormatInt(m.Head.Seq, 10) + `, ` + m.Head.At + `); compare it with any head published earlier.
3. Records against the chain: every session has an "assigned" record with its arm, stratum, slot and the SHA-256 of its covariates' JSON; every turn has a "turn" record whose text_sha256 is the SHA-256 of the turn's text (UTF-8).
4. Study versions: the SHA-256 of each canonical.json equals its hash in versions.json and in the chain's "version" records.
5. The allocation audit (when the seed is present): regenerate each stratum's sequence from the seed with the algorithm documented in Trialogue's arms/assign package, and check that each session's arm is the one at its slot, with no slot used twice or skipped.
`
}
