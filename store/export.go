package store

import (
	"bufio"
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"fmt"
	"maps"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/arms/flags"
)

// The files an export writes, in the order they are written.
const (
	ExportSessionsCSV = "sessions.csv"
	ExportTurnsCSV    = "turns.csv"
	ExportTurnsJSONL  = "turns.jsonl"
	ExportCodebook    = "codebook.md"
)

// ExportOptions choose what an export holds.
type ExportOptions struct {
	IncludePilot     bool // sessions marked pilot; left out by default
	IncludeSynthetic bool // synthetic respondents' sessions; left out by default
	// Release writes a shareable copy: rids replaced by a keyed hash, and
	// e-mail addresses, phone numbers, URLs and long digit runs in free
	// text masked (see Mask), with a count of masks per turn.
	Release bool
}

// ExportSummary says what an export wrote.
type ExportSummary struct {
	Dir       string
	Files     []string // file names inside Dir
	Sessions  int      // rows of sessions.csv
	Turns     int      // rows of turns.csv and lines of turns.jsonl
	Pilot     int      // pilot sessions left out
	Synthetic int      // synthetic sessions left out
	Masks     int      // release copies: replacements made in all text
}

// Export writes a study's data for analysis into dir (created if needed):
// sessions.csv, turns.csv, turns.jsonl and codebook.md. The CSV files follow
// RFC 4180 (comma, double quotes, CRLF line ends) in UTF-8 with a header
// row and a stable column order. Every file is written beside its final
// name and renamed into place at the end, so a failed export leaves the
// files of a previous one as they were. An unknown study is ErrNotFound and
// writes nothing.
func (s *Store) Export(ctx context.Context, def *arms.Study, study, dir string, opt ExportOptions) (ExportSummary, error) {
	sum := ExportSummary{Dir: dir}
	if def == nil || def.ID != study {
		return sum, fmt.Errorf("export %q: the study definition given is not this study's", study)
	}
	d, err := s.loadRecords(ctx, study)
	if err != nil {
		return sum, fmt.Errorf("export %q: %w", study, err)
	}
	var phase string
	if err := s.rs.QueryRowContext(ctx, `SELECT phase FROM studies WHERE id = ?`, study).Scan(&phase); err != nil {
		return sum, fmt.Errorf("export %q: %w", study, notFound(err))
	}
	var kept []*record
	for _, rec := range d.records {
		switch {
		case rec.Pilot && !opt.IncludePilot:
			sum.Pilot++
		case rec.Synthetic && !opt.IncludeSynthetic:
			sum.Synthetic++
		default:
			kept = append(kept, rec)
		}
	}
	x := &exporter{def: def, secret: d.secret, opt: opt, sum: &sum}
	files := []struct {
		name  string
		write func(*bytes.Buffer, []*record) error
	}{
		{ExportSessionsCSV, x.sessionsCSV},
		{ExportTurnsCSV, x.turnsCSV},
		{ExportTurnsJSONL, x.turnsJSONL},
	}
	out := map[string][]byte{}
	for _, f := range files {
		var b bytes.Buffer
		if err := f.write(&b, kept); err != nil {
			return sum, fmt.Errorf("export %q: %s: %w", study, f.name, err)
		}
		out[f.name] = b.Bytes()
	}
	sum.Sessions = len(kept)
	for _, rec := range kept {
		sum.Turns += len(rec.Turns)
	}
	sum.Masks = x.masks
	out[ExportCodebook] = x.codebook(kept, phase, s.now())
	sum.Files = []string{ExportSessionsCSV, ExportTurnsCSV, ExportTurnsJSONL, ExportCodebook}
	if err := writeFiles(dir, sum.Files, out); err != nil {
		return sum, fmt.Errorf("export %q: %w", study, err)
	}
	return sum, nil
}

// writeFiles writes each file beside its final name, syncs it, and only
// when all are written renames them into place.
func writeFiles(dir string, names []string, data map[string][]byte) error {
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return err
	}
	tmp := make([]string, 0, len(names))
	defer func() {
		for _, t := range tmp {
			os.Remove(t) // gone already after a rename
		}
	}()
	for _, name := range names {
		f, err := os.CreateTemp(dir, "."+name+".*")
		if err != nil {
			return err
		}
		tmp = append(tmp, f.Name())
		_, err = f.Write(data[name])
		if err == nil {
			err = f.Sync()
		}
		if cerr := f.Close(); err == nil {
			err = cerr
		}
		if err != nil {
			return fmt.Errorf("write %s: %w", name, err)
		}
	}
	for i, name := range names {
		if err := os.Rename(tmp[i], filepath.Join(dir, name)); err != nil {
			return fmt.Errorf("write %s: %w", name, err)
		}
	}
	return nil
}

// exporter turns records into the export's rows.
type exporter struct {
	def    *arms.Study
	secret []byte
	opt    ExportOptions
	sum    *ExportSummary
	masks  int
}

// column is one column of an export file, as the codebook describes it.
type column struct {
	Name, Type, Meaning string
}

// Types of the codebook.
const (
	typeInt       = "integer"
	typeDecimal   = "decimal"
	typeText      = "text"
	typeTime      = "timestamp"
	typeBool      = "0/1"
	typeHash      = "hex SHA-256"
	typeCovariate = "as the covariate" // see the covariates table
)

// covColumn and flagColumn name the columns of covariates and flags; the
// prefixes keep them clear of the fixed columns whatever the study names
// its covariates.
func covColumn(name string) string  { return "cov_" + name }
func flagColumn(code string) string { return "flag_" + code }

func (x *exporter) sessionColumns() []column {
	rid := "respondent id, as the survey passed it in the entry link"
	code := "completion code the respondent was shown when finishing (computed for every session, so a code typed without finishing can be caught)"
	if x.opt.Release {
		rid = "keyed hash of the respondent id (HMAC-SHA-256 with the study's secret, 32 hex digits; the same key the hash chain and bundles use): the study team can tie it to a respondent, nobody else can"
		code = "empty in release copies: the code would tie a row to the survey's own records"
	}
	cols := []column{
		{"session", typeInt, "session number inside this Trialogue database; joins turns.csv"},
		{"rid", typeText, rid},
		{"phase", typeText, "pilot (entered before the study went live and marked as pilot) or live"},
		{"synthetic", typeBool, "1 for a synthetic respondent of trialogue simulate (present only when the export includes them)"},
		{"arm", typeText, "treatment arm assigned, by name"},
		{"arm_code", typeText, "neutral arm code sent back to the survey"},
		{"stratum", typeText, "randomization stratum, as covariate=value joined by |; all when the study has no strata"},
	}
	for _, c := range x.def.Covariates {
		cols = append(cols, column{covColumn(c.Name), typeCovariate, fmt.Sprintf("covariate %s as the entry link gave it (see Covariates); empty when not given", c.Name)})
	}
	cols = append(cols,
		column{"version", typeInt, "study version the session ran under (1 for the first file registered)"},
		column{"version_hash", typeHash, "SHA-256 of that version's canonical study file"},
		column{"language", typeText, "language of the respondent's page"},
		column{"entered_at", typeTime, "when the respondent entered (ISO 8601, UTC, milliseconds)"},
		column{"finished_at", typeTime, "when the respondent continued back to the survey; empty if they did not"},
		column{"finished", typeBool, "1 if the respondent continued back to the survey"},
		column{"duration_s", typeDecimal, "seconds from entry to finishing; empty if unfinished"},
		column{"replies", typeInt, "respondent replies"},
		column{"model_messages", typeInt, "messages the model wrote"},
		column{"words_respondent", typeInt, "words in all replies (runs of letters or digits; each Han or hiragana character counts as one)"},
		column{"words_model", typeInt, "words in all model messages, counted the same way"},
		column{"completion_code", typeText, code},
		column{"model_failures", typeInt, "model calls that failed after every retry (the respondent saw Try again)"},
		column{"retries", typeInt, "retries of model calls that then succeeded"},
	)
	for _, d := range flags.Describe(x.def) {
		cols = append(cols, column{flagColumn(d.Code), typeBool, "transcript flag " + d.Code + ": " + d.Meaning})
	}
	return append(cols,
		column{"reviewed", typeBool, "1 if a reviewer marked the transcript read"},
		column{"excluded", typeBool, "1 if a reviewer excluded the session from analysis (nothing is deleted)"},
		column{"review_reason", typeText, "the reason given with the latest exclusion, or with taking the session back in"},
	)
}

func (x *exporter) turnColumns() []column {
	text := "the turn's text exactly as stored (in turns.csv, line breaks are written as CRLF, as RFC 4180 writes them)"
	hash := "SHA-256 of the text as stored; ties the turn to the study's hash chain"
	if x.opt.Release {
		text = "the turn's text with e-mail addresses, URLs, phone numbers and runs of six or more digits replaced by [email], [url], [phone] and [number]"
		hash = "SHA-256 of the unmasked text; empty where masks > 0, since the hash would let anyone test guesses of what was masked"
	}
	return []column{
		{"session", typeInt, "session number; joins sessions.csv"},
		{"rid", typeText, "respondent id (a keyed hash in release copies), as in sessions.csv"},
		{"arm", typeText, "the session's arm"},
		{"index", typeInt, "position of the turn in its session, from 0"},
		{"role", typeText, "respondent (a reply) or assistant (a model message)"},
		{"text", typeText, text},
		{"words", typeInt, "words in the text"},
		{"masks", typeInt, "replacements made in the text of a release copy; 0 otherwise"},
		{"client_id", typeText, "replies: the page's random id for the send, which makes a resent reply one turn"},
		{"started_at", typeTime, "model messages: when the request to the model began; replies: when stored"},
		{"created_at", typeTime, "when the turn was stored, before anyone saw it"},
		{"latency_ms", typeInt, "model messages: milliseconds from request to last chunk, retries included"},
		{"model_requested", typeText, "model messages: the model name asked for"},
		{"model_reported", typeText, "model messages: the model name the endpoint reported"},
		{"fingerprint", typeText, "model messages: the system fingerprint the endpoint reported"},
		{"params", typeText, "model messages: JSON of the model parameters sent"},
		{"prompt_tokens", typeInt, "model messages: input tokens the endpoint counted"},
		{"completion_tokens", typeInt, "model messages: output tokens the endpoint counted"},
		{"retries", typeInt, "model messages: attempts beyond the first"},
		{"finish_reason", typeText, "model messages: why the model stopped (stop, length, ...)"},
		{"system_sha256", typeHash, "model messages: SHA-256 of the rendered system prompt"},
		{"request_sha256", typeHash, "model messages: SHA-256 of the exact request body sent"},
		{"text_sha256", typeHash, hash},
		{"study_hash", typeHash, "hash of the study version the turn was written under"},
		{"typing_ms", typeInt, "replies: milliseconds from the first change of the reply box (a key, a paste or a drop) to sending; empty when the page sent no typing measures"},
		{"keystrokes", typeInt, "replies: changes typed into the reply box (one per key press; a word swiped or picked from suggestions on a phone counts once)"},
		{"pastes", typeInt, "replies: paste and drop events into the reply box"},
		{"hidden_count", typeInt, "replies: times the page was hidden (another tab or app in front) since the previous reply was sent or the page opened"},
	}
}

// rid is how the export names a respondent.
func (x *exporter) rid(rec *record) string {
	if x.opt.Release {
		return RIDKey(x.secret, rec.RID)
	}
	return rec.RID
}

// mask masks free text in release copies and says how many masks it made.
func (x *exporter) mask(text string) (string, int) {
	if !x.opt.Release {
		return text, 0
	}
	return Mask(text)
}

func (x *exporter) sessionsCSV(b *bytes.Buffer, recs []*record) error {
	cols := x.sessionColumns()
	w := newCSV(b)
	if err := w.Write(names(cols)); err != nil {
		return err
	}
	for _, rec := range recs {
		row := make([]string, 0, len(cols))
		phase := "live"
		if rec.Pilot {
			phase = "pilot"
		}
		row = append(row, strconv.FormatInt(rec.ID, 10), x.rid(rec), phase, bit(rec.Synthetic), rec.Arm, rec.ArmCode, rec.Stratum)
		for _, c := range x.def.Covariates {
			v := rec.Covariates[c.Name]
			if c.Type == arms.TypeText {
				var n int
				v, n = x.mask(v)
				x.masks += n
			}
			row = append(row, v)
		}
		lang := rec.Language
		if lang == "" {
			lang = x.def.Language
		}
		finished, duration := "", ""
		if rec.Finished() {
			finished = fmtTime(rec.FinishedAt)
			duration = strconv.FormatFloat(rec.FinishedAt.Sub(rec.CreatedAt).Seconds(), 'f', 3, 64)
		}
		var replies, model, wordsR, wordsM, retries int
		for _, t := range rec.Turns {
			if t.Role == RoleRespondent {
				replies++
				wordsR += arms.CountWords(t.Text)
			} else {
				model++
				wordsM += arms.CountWords(t.Text)
				retries += t.Retries
			}
		}
		code := codes.Completion(x.secret, rec.StudyID, rec.RID)
		if x.opt.Release {
			code = ""
		}
		row = append(row, strconv.Itoa(rec.Version), rec.StudyHash, lang, fmtTime(rec.CreatedAt), finished, bit(rec.Finished()), duration,
			strconv.Itoa(replies), strconv.Itoa(model), strconv.Itoa(wordsR), strconv.Itoa(wordsM), code,
			strconv.Itoa(len(rec.Failures)), strconv.Itoa(retries))
		raised := map[string]bool{}
		for _, f := range flags.Compute(x.def, rec.flagSession()) {
			raised[f.Code] = true
		}
		for _, code := range flags.Codes {
			row = append(row, bit(raised[code]))
		}
		reason, n := x.mask(rec.Reason)
		x.masks += n
		row = append(row, bit(rec.Reviewed), bit(rec.Excluded), reason)
		if len(row) != len(cols) {
			return fmt.Errorf("session %d: %d values for %d columns", rec.ID, len(row), len(cols))
		}
		if err := w.Write(csvSafe(row)); err != nil {
			return err
		}
	}
	w.Flush()
	return w.Error()
}

// turnValues is one turn's row, nil where nothing was logged, and the
// masks made in its text.
func (x *exporter) turnValues(rec *record, t Turn) ([]any, int) {
	text, masks := x.mask(t.Text)
	model := t.Role == RoleAssistant
	opt := func(v any) any {
		if model {
			return v
		}
		return nil
	}
	optStr := func(v string) any {
		if v == "" {
			return nil
		}
		return v
	}
	hash := any(t.TextSHA256)
	if masks > 0 {
		hash = nil
	}
	var typing [4]any
	if t.Typing != nil {
		typing = [4]any{t.Typing.TypingMS, t.Typing.Keystrokes, t.Typing.Pastes, t.Typing.HiddenCount}
	}
	return []any{rec.ID, x.rid(rec), rec.Arm, t.Index, t.Role, text, arms.CountWords(t.Text), masks, optStr(t.ClientID),
		fmtTime(t.StartedAt), fmtTime(t.CreatedAt), opt(t.LatencyMS), optStr(t.ModelRequested), optStr(t.ModelReported),
		optStr(t.Fingerprint), optStr(t.Params), opt(t.PromptTokens), opt(t.CompletionTokens), opt(t.Retries),
		optStr(t.FinishReason), optStr(t.SystemSHA256), optStr(t.RequestSHA256), hash, t.StudyHash,
		typing[0], typing[1], typing[2], typing[3]}, masks
}

func (x *exporter) turnsCSV(b *bytes.Buffer, recs []*record) error {
	cols := x.turnColumns()
	w := newCSV(b)
	if err := w.Write(names(cols)); err != nil {
		return err
	}
	for _, rec := range recs {
		for _, t := range rec.Turns {
			vals, masks := x.turnValues(rec, t)
			if len(vals) != len(cols) {
				return fmt.Errorf("turn %d of session %d: %d values for %d columns", t.Index, rec.ID, len(vals), len(cols))
			}
			x.masks += masks // counted here only: turns.jsonl holds the same turns
			row := make([]string, len(vals))
			for i, v := range vals {
				if v != nil {
					row[i] = fmt.Sprint(v)
				}
			}
			if err := w.Write(csvSafe(row)); err != nil {
				return err
			}
		}
	}
	w.Flush()
	return w.Error()
}

func (x *exporter) turnsJSONL(b *bytes.Buffer, recs []*record) error {
	cols := x.turnColumns()
	for _, rec := range recs {
		for _, t := range rec.Turns {
			vals, _ := x.turnValues(rec, t)
			b.WriteByte('{')
			for i, v := range vals {
				if i > 0 {
					b.WriteByte(',')
				}
				k, err := json.Marshal(cols[i].Name)
				if err != nil {
					return err
				}
				val, err := json.Marshal(v)
				if err != nil {
					return err
				}
				b.Write(k)
				b.WriteByte(':')
				b.Write(val)
			}
			b.WriteString("}\n")
		}
	}
	return nil
}

// newCSV writes RFC 4180 records: CRLF line ends, fields quoted when they
// hold a comma, a double quote or a line break.
func newCSV(b *bytes.Buffer) *csv.Writer {
	w := csv.NewWriter(b)
	w.UseCRLF = true
	return w
}

// csvSafe writes every line break inside a field as one LF, which the
// writer turns into CRLF: encoding/csv with UseCRLF drops a lone CR, and a
// reader would turn a CRLF already there into LF anyway. So every line
// break in a field reads back the same way.
func csvSafe(row []string) []string {
	for i, v := range row {
		if strings.ContainsRune(v, '\r') {
			row[i] = strings.ReplaceAll(strings.ReplaceAll(v, "\r\n", "\n"), "\r", "\n")
		}
	}
	return row
}

func names(cols []column) []string {
	out := make([]string, len(cols))
	for i, c := range cols {
		out[i] = c.Name
	}
	return out
}

func bit(b bool) string {
	if b {
		return "1"
	}
	return "0"
}

// codebook describes every file and column, the covariates with their
// allowed values, the arms and the flags.
func (x *exporter) codebook(recs []*record, phase string, now time.Time) []byte {
	var b bytes.Buffer
	w := bufio.NewWriter(&b)
	p := func(format string, args ...any) { fmt.Fprintf(w, format, args...) }
	def := x.def
	p("# Codebook: %s (%s)\n\n", mdText(def.Title), mdText(def.ID))
	p("Exported by `trialogue export` at %s (UTC). The study is in phase %s.\n\n", fmtTime(now), phase)
	p("- Sessions: %d; turns: %d.\n", x.sum.Sessions, x.sum.Turns)
	p("- Pilot sessions: %s.\n", inOrOut(x.opt.IncludePilot, x.sum.Pilot, "--include-pilot"))
	p("- Synthetic sessions (trialogue simulate): %s.\n", inOrOut(x.opt.IncludeSynthetic, x.sum.Synthetic, "--include-synthetic"))
	if x.opt.Release {
		p("- Release copy: respondent ids are keyed hashes, completion codes are left out, and e-mail addresses, URLs, phone numbers and runs of six or more digits in replies, model messages, text covariates and review reasons are masked (%d masks in all).\n", x.sum.Masks)
	} else {
		p("- Full copy, with respondent ids and their text as stored: handle it under the study's data-protection rules (`--release` writes a shareable copy).\n")
	}
	versions := map[int]string{}
	for _, rec := range recs {
		versions[rec.Version] = rec.StudyHash
	}
	if len(versions) > 0 {
		nums := slices.Sorted(maps.Keys(versions))
		vs := make([]string, len(nums))
		for i, v := range nums {
			vs[i] = fmt.Sprintf("%d (`%s`)", v, versions[v])
		}
		p("- Study versions in the data: %s.\n", strings.Join(vs, ", "))
	}
	p("\n## Files\n\n")
	p("- `%s`: one row per session.\n", ExportSessionsCSV)
	p("- `%s`: one row per turn (a respondent's reply or a model message), in order of session and index.\n", ExportTurnsCSV)
	p("- `%s`: the same turns, one JSON object per line, with the same names; numbers are JSON numbers and an empty cell is null.\n", ExportTurnsJSONL)
	p("- `%s`: this file.\n\n", ExportCodebook)
	p("The CSV files follow RFC 4180: UTF-8 without a byte-order mark, a header row, comma-separated, fields in double quotes when they hold a comma, a quote or a line break, CRLF line ends. An empty cell means no value (for example a model field of a reply). Cells are written as stored: a spreadsheet may read text beginning with `=` as a formula, so open them with R, Stata or pandas, or import every column as text. R: `read.csv(\"sessions.csv\", encoding = \"UTF-8\", na.strings = \"\")`; pandas: `pd.read_csv(\"turns.csv\", keep_default_na=False)` (so that a reply reading \"NA\" stays text).\n")
	table := func(title string, cols []column) {
		p("\n## %s\n\n| column | type | meaning |\n| --- | --- | --- |\n", title)
		for _, c := range cols {
			p("| `%s` | %s | %s |\n", c.Name, c.Type, mdText(c.Meaning))
		}
	}
	table("Columns of "+ExportSessionsCSV, x.sessionColumns())
	table("Columns of "+ExportTurnsCSV+" and "+ExportTurnsJSONL, x.turnColumns())

	p("\n## Covariates\n\nThe `cov_` columns of %s, as the study file declares them.\n\n| covariate | column | type | allowed values | required | stratum |\n| --- | --- | --- | --- | --- | --- |\n", ExportSessionsCSV)
	for _, c := range def.Covariates {
		var allowed string
		switch c.Type {
		case arms.TypeChoice:
			vals := make([]string, len(c.Values))
			for i, v := range c.Values {
				vals[i] = "`" + mdText(v) + "`"
			}
			allowed = strings.Join(vals, ", ")
		case arms.TypeInteger:
			allowed = "whole numbers"
			switch {
			case c.Min != nil && c.Max != nil:
				allowed = fmt.Sprintf("whole numbers from %d to %d", *c.Min, *c.Max)
			case c.Min != nil:
				allowed = fmt.Sprintf("whole numbers from %d", *c.Min)
			case c.Max != nil:
				allowed = fmt.Sprintf("whole numbers up to %d", *c.Max)
			}
		case arms.TypeText:
			allowed = fmt.Sprintf("free text of at most %d characters", c.MaxLen)
			if x.opt.Release {
				allowed += " (masked in release copies)"
			}
		}
		stratum := "no"
		for _, s := range def.Strata {
			if s == c.Name {
				stratum = "yes"
			}
		}
		req := "no"
		if c.Required {
			req = "yes"
		}
		p("| %s | `%s` | %s | %s | %s | %s |\n", mdText(c.Name), covColumn(c.Name), c.Type, allowed, req, stratum)
	}

	p("\n## Arms\n\n| arm | code | kind | allocation ratio |\n| --- | --- | --- | --- |\n")
	for _, name := range def.ArmOrder {
		a := def.Arms[name]
		if a == nil {
			continue
		}
		p("| %s | %s | %s | %d |\n", mdText(name), mdText(a.Code), a.Kind, def.Allocation.Arms[name])
	}

	p("\n## Flags\n\nThe `flag_` columns are signs for a reviewer, computed from each transcript by plain rules, not verdicts. Under this study's settings:\n\n| column | raised when |\n| --- | --- |\n")
	for _, d := range flags.Describe(def) {
		p("| `%s` | %s |\n", flagColumn(d.Code), mdText(d.Meaning))
	}
	w.Flush()
	return b.Bytes()
}

func inOrOut(included bool, leftOut int, flag string) string {
	if included {
		return "included"
	}
	return fmt.Sprintf("left out (%d; `%s` adds them)", leftOut, flag)
}

// mdText makes text safe inside a Markdown table cell.
func mdText(s string) string {
	return strings.NewReplacer("|", `\|`, "\r\n", " ", "\n", " ", "\r", " ").Replace(s)
}
