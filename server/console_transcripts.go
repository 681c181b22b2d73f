package server

import (
	"fmt"
	"net/http"
	"net/url"
	"slices"
	"sort"
	"strconv"
	"strings"

	"github.com/go-chi/chi/v5"

	"trialogue/arms/flags"
	"trialogue/store"
)

// transcriptsPerPage is how many sessions the transcript list shows at once.
const transcriptsPerPage = 50

// transcriptsPage is the data of the transcript list.
type transcriptsPage struct {
	consolePage
	Cohort, Arm, Completed, Reviewed, Excluded, Search string
	Flag                                               string
	Cohorts                                            []store.Cohort
	Arms                                               []string
	FlagCodes                                          []string
	Legend                                             []flags.Definition
	Rows                                               []transcriptRow
	Total                                              int
	From, To                                           int
	Prev, Next                                         string // addresses of the neighbouring pages
}

// transcriptRow is one session in the list.
type transcriptRow struct {
	ID                    int64
	Link                  string
	Entered, LastActivity string
	Arm, Code, Stratum    string
	Cohort                string
	Replies               int
	Finished              bool
	Reviewed, Excluded    bool
	Reason                string
	Flags                 []flags.Flag
}

// handleTranscripts lists a study's sessions with filters and text search.
//
// GET /console/studies/{study}/sessions[?cohort=&arm=&completed=yes|no&reviewed=yes|no&excluded=yes|no&flag=CODE&q=TEXT&page=N]
func (s *Server) handleTranscripts(w http.ResponseWriter, r *http.Request) {
	cs := consoleStudyOf(r.Context())
	q := r.URL.Query()
	cohort, err := cohortOf(r, cs)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	pageNo := 1
	if v := q.Get("page"); v != "" {
		if pageNo, err = strconv.Atoi(v); err != nil || pageNo < 1 || pageNo > 1_000_000 {
			s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("%q is not a page number.", v)})
			return
		}
	}
	arm := q.Get("arm")
	if _, ok := cs.Def.Arms[arm]; arm != "" && !ok {
		s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("The study has no arm %q.", arm)})
		return
	}
	search := strings.TrimSpace(q.Get("q"))
	if len(search) > 200 {
		s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: "Search for at most 200 characters."})
		return
	}
	for _, k := range []string{"completed", "reviewed", "excluded"} {
		if v := q.Get(k); v != "" && v != "yes" && v != "no" {
			s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("%s must be yes, no or empty, not %q.", k, v)})
			return
		}
	}
	flag := q.Get("flag")
	if flag != "" && !slices.Contains(flags.Codes, flag) {
		s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("%q is not a flag: use one of %s.", flag, strings.Join(flags.Codes, ", "))})
		return
	}
	f := store.SessionFilter{Cohort: cohort, Arm: arm, Completed: q.Get("completed"), Reviewed: q.Get("reviewed"),
		Excluded: q.Get("excluded"), Search: search, Limit: transcriptsPerPage, Offset: (pageNo - 1) * transcriptsPerPage}
	found, err := s.store.Flags(r.Context(), cs.Def, cs.Def.ID)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	if flag != "" {
		f.IDs = []int64{}
		for id, fl := range found {
			if slices.ContainsFunc(fl, func(x flags.Flag) bool { return x.Code == flag }) {
				f.IDs = append(f.IDs, id)
			}
		}
	}
	rows, total, err := s.store.ListSessions(r.Context(), cs.Def.ID, f)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	page := transcriptsPage{consolePage: s.page(r, "Transcripts · "+cs.Def.Title, "sessions"), Cohort: string(cohort), Arm: arm,
		Completed: f.Completed, Reviewed: f.Reviewed, Excluded: f.Excluded, Search: search, Flag: flag, Cohorts: store.Cohorts,
		Arms: cs.Def.ArmOrder, FlagCodes: flags.Codes, Legend: flags.Describe(cs.Def), Total: total}
	base := "/console/studies/" + cs.Def.ID + "/sessions/"
	for _, row := range rows {
		page.Rows = append(page.Rows, transcriptRow{ID: row.ID, Link: base + strconv.FormatInt(row.ID, 10),
			Entered: fmtTime(row.CreatedAt), LastActivity: fmtTime(row.LastActivity), Arm: row.Arm, Code: row.ArmCode,
			Stratum: row.Stratum, Cohort: cohortName(row), Replies: row.Replies, Finished: row.Finished(),
			Reviewed: row.Review.Reviewed, Excluded: row.Review.Excluded, Reason: row.Review.Reason, Flags: found[row.ID]})
	}
	if len(rows) > 0 {
		page.From, page.To = f.Offset+1, f.Offset+len(rows)
	}
	link := func(n int) string {
		v := url.Values{}
		for _, k := range []string{"cohort", "arm", "completed", "reviewed", "excluded", "flag", "q"} {
			if x := q.Get(k); x != "" {
				v.Set(k, x)
			}
		}
		v.Set("cohort", string(cohort))
		v.Set("page", strconv.Itoa(n))
		return "?" + v.Encode()
	}
	if pageNo > 1 {
		page.Prev = link(pageNo - 1)
	}
	if page.To < total {
		page.Next = link(pageNo + 1)
	}
	s.renderConsole(w, r, http.StatusOK, "console_sessions", page)
}

// cohortName says which cohort a session belongs to.
func cohortName(row store.SessionRow) string {
	switch {
	case row.Synthetic:
		return string(store.CohortSynthetic)
	case row.Pilot:
		return string(store.CohortPilot)
	}
	return string(store.CohortMain)
}

// transcriptPage is the data of one transcript.
type transcriptPage struct {
	consolePage
	ID                int64
	RID               string
	Arm, Code, Kind   string
	Stratum, Cohort   string
	Language          string
	Covariates        []keyValue
	Version           int
	StudyHash         string
	Entered, Finished string
	Turns             []turnView
	Failures          []failureView
	Flags             []flags.Flag
	Review            reviewView
	CanChange         bool
	Action            string // the review form's address
}

type keyValue struct{ Key, Value string }

// turnView is one turn with what an auditor needs.
type turnView struct {
	Index                          int
	Role, Who                      string
	Text                           string
	Started, Committed             string
	LatencyMS                      int64
	Requested, Reported            string
	Fingerprint, FinishReason      string
	Params                         string
	Retries                        int
	PromptTokens, CompletionTokens int
	SystemSHA, RequestSHA, TextSHA string
	Model                          bool
	Typing                         string // the page's typing measures, for replies
}

type failureView struct {
	At, Kind string
	Status   int
	Attempts int
}

type reviewView struct {
	Reviewed, Excluded bool
	Note, Reason       string
	By, At             string
}

// handleTranscript shows one session: every turn with its timestamps,
// latency, model, fingerprint and hashes, all as text; and its review.
//
// GET /console/studies/{study}/sessions/{session}
func (s *Server) handleTranscript(w http.ResponseWriter, r *http.Request) {
	ctx := r.Context()
	cs := consoleStudyOf(ctx)
	id, err := strconv.ParseInt(chi.URLParam(r, "session"), 10, 64)
	if err != nil {
		s.consoleFail(w, r, &Error{Status: http.StatusNotFound, Msg: "There is no such session."})
		return
	}
	row, err := s.store.SessionInStudy(ctx, cs.Def.ID, id)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	turns, err := s.store.Turns(ctx, id)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	found, err := s.store.Flags(ctx, cs.Def, cs.Def.ID)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	failures, err := s.store.FailuresOf(ctx, id)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	u := consoleUser(ctx)
	page := transcriptPage{consolePage: s.page(r, fmt.Sprintf("Session %d · %s", id, cs.Def.Title), "sessions"),
		ID: id, RID: row.RID, Arm: row.Arm, Code: row.ArmCode, Stratum: row.Stratum, Cohort: cohortName(row),
		Language: row.Language, Version: row.Version, StudyHash: row.StudyHash, Entered: fmtTime(row.CreatedAt),
		Finished: fmtTime(row.FinishedAt), CanChange: u.CanChange(), Flags: found[id],
		Action: fmt.Sprintf("/console/studies/%s/sessions/%d/review", cs.Def.ID, id)}
	if a := cs.Def.Arms[row.Arm]; a != nil {
		page.Kind = a.Kind
	}
	keys := make([]string, 0, len(row.Covariates))
	for k := range row.Covariates {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		page.Covariates = append(page.Covariates, keyValue{k, row.Covariates[k]})
	}
	for _, t := range turns {
		v := turnView{Index: t.Index, Role: t.Role, Text: t.Text, Started: fmtTime(t.StartedAt), Committed: fmtTime(t.CreatedAt),
			LatencyMS: t.LatencyMS, Requested: t.ModelRequested, Reported: t.ModelReported, Fingerprint: t.Fingerprint,
			FinishReason: t.FinishReason, Params: t.Params, Retries: t.Retries, PromptTokens: t.PromptTokens,
			CompletionTokens: t.CompletionTokens, SystemSHA: t.SystemSHA256, RequestSHA: t.RequestSHA256, TextSHA: t.TextSHA256,
			Model: t.Role == store.RoleAssistant, Who: "Respondent"}
		if v.Model {
			v.Who = "Model"
		}
		if t.Typing != nil {
			v.Typing = typingText(*t.Typing)
		}
		page.Turns = append(page.Turns, v)
	}
	for _, f := range failures {
		page.Failures = append(page.Failures, failureView{At: fmtTime(f.At), Kind: f.Kind, Status: f.Status, Attempts: f.Attempts})
	}
	rv := row.Review
	page.Review = reviewView{Reviewed: rv.Reviewed, Excluded: rv.Excluded, Note: rv.Note, Reason: rv.Reason, By: rv.ByEmail, At: fmtTime(rv.At)}
	s.renderConsole(w, r, http.StatusOK, "console_session", page)
}

// typingText writes the typing measures of a reply.
func typingText(t flags.Typing) string {
	return fmt.Sprintf("typed in %d ms, %s, %s, page hidden %s", t.TypingMS, plural(int(t.Keystrokes), "keystroke"),
		plural(int(t.Pastes), "paste"), plural(int(t.HiddenCount), "time"))
}

// handleReview records a reviewer's decision on a session.
//
// POST /console/studies/{study}/sessions/{session}/review (action=reviewed|note|exclude|include, text)
func (s *Server) handleReview(w http.ResponseWriter, r *http.Request) {
	if err := parseConsoleForm(w, r); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	cs := consoleStudyOf(r.Context())
	id, err := strconv.ParseInt(chi.URLParam(r, "session"), 10, 64)
	if err != nil {
		s.consoleFail(w, r, &Error{Status: http.StatusNotFound, Msg: "There is no such session."})
		return
	}
	u := consoleUser(r.Context())
	a := store.ReviewAction{Session: id, Action: r.PostForm.Get("action"), Text: r.PostForm.Get("text"), By: store.Actor{UserID: u.ID}}
	if _, err := s.store.Review(r.Context(), cs.Def.ID, a); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	http.Redirect(w, r, fmt.Sprintf("/console/studies/%s/sessions/%d?done=review", cs.Def.ID, id), http.StatusSeeOther)
}
