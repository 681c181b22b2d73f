package server

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"slices"
	"sort"
	"strconv"
	"strings"
	"time"

	"trialogue/arms"
	"trialogue/arms/drift"
	"trialogue/store"
)

// driftFreshness is how recent a drift check must be for going live.
const driftFreshness = 24 * time.Hour

// checkItem is one line of the go-live checklist.
type checkItem struct {
	OK     bool
	Text   string // what is checked
	Detail string // where it stands, or what to do
}

// checklist is the go-live checklist of a study's newest version: every
// item must hold before the version may go live.
func (s *Server) checklist(ctx context.Context, cs *consoleStudy) ([]checkItem, error) {
	def, f := cs.Def, cs.Def.Fielding
	if f == nil {
		f = &arms.Fielding{}
	}
	var out []checkItem
	add := func(ok bool, text, detail string) { out = append(out, checkItem{OK: ok, Text: text, Detail: detail}) }

	add(cs.State.Phase == store.PhasePilot, "The study is in pilot",
		map[bool]string{true: "Going live ends the pilot.", false: "A study goes live from a pilot; it is " + cs.State.Phase + "."}[cs.State.Phase == store.PhasePilot])
	if cs.State.EthicsRef != "" {
		add(true, "Ethics approval reference entered", cs.State.EthicsRef)
	} else {
		add(false, "Ethics approval reference entered", "Enter the reference of the board's approval below.")
	}
	present := func(key, text, what string) {
		if strings.TrimSpace(text) != "" {
			add(true, what+" in the study file", fmt.Sprintf("fielding.%s: %d characters.", key, len([]rune(text))))
		} else {
			add(false, what+" in the study file", fmt.Sprintf("Add the text respondents are given under fielding.%s.", key))
		}
	}
	present("consent", f.Consent, "Consent text")
	present("debriefing", f.Debriefing, "Debriefing text")
	switch f.AIDisclosure {
	case arms.DisclosurePage:
		add(true, "AI disclosure recorded", "page: the respondent page tells respondents that an AI model writes the replies.")
	case arms.DisclosureDebriefing:
		add(true, "AI disclosure recorded", "debriefing: respondents learn in the debriefing that an AI model wrote the replies; the ethics board must have approved this.")
	default:
		add(false, "AI disclosure recorded", "Set fielding.ai_disclosure to page or debriefing.")
	}
	reviewed, err := s.store.ReviewedPilots(ctx, def.ID, cs.Version.Version)
	if err != nil {
		return nil, err
	}
	need := def.PilotReviews()
	add(reviewed >= need, fmt.Sprintf("At least %d pilot transcripts of version %d marked reviewed", need, cs.Version.Version),
		fmt.Sprintf("%d marked reviewed.", reviewed))
	probs, err := s.studyFileProblems(ctx, cs)
	if err != nil {
		return nil, err
	}
	if len(probs) == 0 {
		add(true, "No errors in the study file", fmt.Sprintf("Version %d parses and validates, with every page text translated.", cs.Version.Version))
	} else {
		add(false, "No errors in the study file", strings.Join(probs, " "))
	}
	if len(def.Probes) == 0 {
		add(true, "Drift check", "The study has no probes, so no drift check is needed.")
	} else {
		ok, detail, err := s.driftFresh(ctx, cs)
		if err != nil {
			return nil, err
		}
		add(ok, "A drift check passed in the last 24 hours", detail)
	}
	return out, nil
}

// driftFresh looks for a drift run of the version's hash in the last day
// that passed (or set the baseline, the first run on a version).
func (s *Server) driftFresh(ctx context.Context, cs *consoleStudy) (bool, string, error) {
	runs, err := s.store.DriftRuns(ctx, cs.Def.ID)
	if err != nil {
		return false, "", err
	}
	cmd := fmt.Sprintf("Run: trialogue drift --db %s --study %s", s.store.Path(), cs.Def.ID)
	since := s.Now().Add(-driftFreshness)
	var last *store.DriftRun
	for i := range runs {
		r := &runs[i]
		if r.StudyHash != cs.Version.Hash {
			continue
		}
		last = r
		if !r.At.Before(since) && (r.Status == "baseline" || r.Status == drift.Pass) {
			return true, fmt.Sprintf("Run %d at %s: %s.", r.ID, fmtTime(r.At), r.Status), nil
		}
	}
	if last == nil {
		return false, "No drift check of this version yet. " + cmd, nil
	}
	return false, fmt.Sprintf("The latest run on this version (%d at %s) is %s or older than a day. %s", last.ID, fmtTime(last.At), last.Status, cmd), nil
}

// studyFileProblems checks a version's stored file as `trialogue check`
// does: it parses and validates, names only known page texts and has every
// page text translated into each page language.
func (s *Server) studyFileProblems(ctx context.Context, cs *consoleStudy) ([]string, error) {
	src, err := s.store.StudySource(ctx, cs.Def.ID, cs.Version.Version)
	if err != nil {
		return nil, err
	}
	def, err := arms.Parse(fmt.Sprintf("version %d", cs.Version.Version), src)
	var probs *arms.Problems
	if errors.As(err, &probs) {
		var out []string
		for _, p := range probs.List {
			out = append(out, fmt.Sprintf("line %d, column %d: %s.", p.Line, p.Col, strings.TrimSuffix(p.Msg, ".")))
		}
		return out, nil
	}
	if err != nil {
		return []string{err.Error()}, nil
	}
	var out []string
	known := s.assets.TextKeys()
	var unknown []string
	for k := range def.Texts {
		if !known[k] {
			unknown = append(unknown, k)
		}
	}
	sort.Strings(unknown)
	if len(unknown) > 0 {
		out = append(out, fmt.Sprintf("texts: unknown key(s) %s.", strings.Join(unknown, ", ")))
	}
	for _, lang := range def.PageLanguages() {
		if miss := s.assets.Missing(lang, def.TextOverrides(lang)); len(miss) > 0 {
			out = append(out, fmt.Sprintf("language %s: no translation for %s.", lang, strings.Join(miss, ", ")))
		}
	}
	return out, nil
}

// studyPage is the data of a study's overview.
type studyPage struct {
	consolePage
	Title, ID, Language string
	Phase               string
	Served              bool
	Version             int
	Hash                string
	Versions            []versionRow
	EthicsRef           string
	LiveVersion         int
	LiveAt, ClosedAt    string
	Head                store.Head
	HeadAt              string
	Checklist           []checkItem
	Ready               bool
	Next                []phaseAction
	History             []historyRow
	PilotCap            int
	PilotRound          int
	PilotSince          string
	Fielding            fieldingView
	CanChange           bool
	Cautions            []string
}

type versionRow struct {
	Version   int
	Hash      string
	CreatedAt string
	Live      bool
	Current   bool
}

type phaseAction struct {
	To, Label, Note string
	Disabled        bool
	Confirm         bool // closing is final: ask to confirm
}

type historyRow struct {
	At, From, To, By string
	Version          int
	Hash             string
}

// fieldingView shows the fielding block as the study file sets it.
type fieldingView struct {
	PilotReviews  int
	AIDisclosure  string
	DropoutAfter  string
	CloseGrace    string
	Consent       string
	Debriefing    string
	Prices        []string
	ProbeCount    int
	HasProbes     bool
	ArmCount      int
	StrataCount   int
	CovariateList string
}

// handleStudy shows a study: its phase and the way to the next one, the
// go-live checklist, versions, phase history and chain head.
//
// GET /console/studies/{study}
func (s *Server) handleStudy(w http.ResponseWriter, r *http.Request) {
	ctx := r.Context()
	cs := consoleStudyOf(ctx)
	def := cs.Def
	u := consoleUser(ctx)
	page := studyPage{consolePage: s.page(r, def.Title, "overview"), Title: def.Title, ID: def.ID, Language: def.Language,
		Phase: cs.State.Phase, Served: cs.Served, Version: cs.Version.Version, Hash: cs.Version.Hash,
		EthicsRef: cs.State.EthicsRef, LiveVersion: cs.State.LiveVersion, LiveAt: fmtTime(cs.State.LiveAt), ClosedAt: fmtTime(cs.State.ClosedAt),
		PilotCap: def.PilotCap(), CanChange: u.CanChange(), Cautions: consoleCautions}
	versions, err := s.store.Versions(ctx, def.ID)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	for i := len(versions) - 1; i >= 0; i-- {
		v := versions[i]
		page.Versions = append(page.Versions, versionRow{Version: v.Version, Hash: v.Hash, CreatedAt: fmtStored(v.CreatedAt),
			Live: v.Version == cs.State.LiveVersion, Current: v.Version == cs.Version.Version})
	}
	if page.Head, err = s.store.ChainHead(ctx, def.ID); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	page.HeadAt = fmtStored(page.Head.At)
	if page.Checklist, err = s.checklist(ctx, cs); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	page.Ready = !slices.ContainsFunc(page.Checklist, func(c checkItem) bool { return !c.OK })
	for _, to := range store.NextPhases(cs.State.Phase) {
		a := phaseAction{To: to}
		switch to {
		case store.PhaseDraft:
			a.Label, a.Note = "Back to draft", "Stop taking pilot respondents while the study file is revised."
		case store.PhasePilot:
			a.Label, a.Note = "Start the pilot", fmt.Sprintf("Take up to %d respondents, marked as pilot sessions.", def.PilotCap())
		case store.PhaseLive:
			a.Label, a.Disabled = "Go live", !page.Ready
			a.Note = fmt.Sprintf("Freeze version %d: its prompts, models and design can no longer change.", cs.Version.Version)
			if a.Disabled {
				a.Note = "Every item of the checklist must hold first."
			}
		case store.PhaseClosed:
			a.Label, a.Confirm = "Close the study", true
			a.Note = fmt.Sprintf("Final: no new respondents; sessions under way may finish within %s.", span(def.CloseGrace()))
		}
		page.Next = append(page.Next, a)
	}
	hist, err := s.store.PhaseHistory(ctx, def.ID)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	names, err := s.actorNames(ctx)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	for i := len(hist) - 1; i >= 0; i-- {
		h := hist[i]
		page.History = append(page.History, historyRow{At: fmtStored(h.At), From: h.From, To: h.To, By: names(h.By), Version: h.Version, Hash: h.StudyHash})
	}
	if n, since, err := s.store.PilotRound(ctx, def.ID); err != nil {
		s.consoleFail(w, r, err)
		return
	} else if !since.IsZero() {
		page.PilotRound, page.PilotSince = n, fmtTime(since)
	}
	f := def.Fielding
	if f == nil {
		f = &arms.Fielding{}
	}
	fv := fieldingView{PilotReviews: def.PilotReviews(), AIDisclosure: f.AIDisclosure, DropoutAfter: span(def.DropoutAfter()),
		CloseGrace: span(def.CloseGrace()), Consent: f.Consent, Debriefing: f.Debriefing, ProbeCount: len(def.Probes),
		HasProbes: len(def.Probes) > 0, ArmCount: len(def.ArmOrder), StrataCount: len(def.StrataKeys())}
	var covs []string
	for _, c := range def.Covariates {
		covs = append(covs, c.Name)
	}
	fv.CovariateList = strings.Join(covs, ", ")
	for _, name := range sortedKeys(f.Prices) {
		p := f.Prices[name]
		fv.Prices = append(fv.Prices, fmt.Sprintf("%s: %s input, %s output per 1,000 tokens", name, money(p.Input, f.Currency), money(p.Output, f.Currency)))
	}
	page.Fielding = fv
	s.renderConsole(w, r, http.StatusOK, "console_study", page)
}

// actorNames returns a function naming the chain's actors ("user:3") by
// their account address.
func (s *Server) actorNames(ctx context.Context) (func(string) string, error) {
	users, err := s.store.Users(ctx)
	if err != nil {
		return nil, err
	}
	byID := map[string]string{}
	for _, u := range users {
		byID[store.Actor{UserID: u.ID}.String()] = u.Email
	}
	return func(a string) string {
		if e, ok := byID[a]; ok {
			return e
		}
		if a == (store.Actor{}).String() {
			return "the command line"
		}
		return a
	}, nil
}

// handlePhase changes a study's phase. Going live re-checks the checklist;
// what the page showed (from) must still be the phase, or nothing changes.
//
// POST /console/studies/{study}/phase (from, to[, confirm])
func (s *Server) handlePhase(w http.ResponseWriter, r *http.Request) {
	if err := parseConsoleForm(w, r); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	ctx := r.Context()
	cs := consoleStudyOf(ctx)
	u := consoleUser(ctx)
	to, from := r.PostForm.Get("to"), r.PostForm.Get("from")
	switch to {
	case store.PhaseDraft, store.PhasePilot, store.PhaseLive, store.PhaseClosed:
	default:
		s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("%q is not a phase: use draft, pilot, live or closed.", to)})
		return
	}
	if from == "" {
		s.consoleFail(w, r, &Error{Status: http.StatusBadRequest, Msg: "The form does not say which phase it was shown in: reload the study page and try again."})
		return
	}
	if to == store.PhaseClosed && r.PostForm.Get("confirm") != "yes" {
		s.consoleFail(w, r, &Error{Status: http.StatusUnprocessableEntity, Msg: "Closing is final: tick the box to confirm it. Nothing was changed."})
		return
	}
	change := store.PhaseChange{Study: cs.Def.ID, From: from, To: to, By: store.Actor{UserID: u.ID}}
	if to == store.PhaseLive {
		items, err := s.checklist(ctx, cs)
		if err != nil {
			s.consoleFail(w, r, err)
			return
		}
		var open []string
		for _, it := range items {
			if !it.OK {
				open = append(open, it.Text+" ("+strings.TrimSuffix(it.Detail, ".")+")")
			}
		}
		if len(open) > 0 {
			s.consoleFail(w, r, &Error{Status: http.StatusConflict, Msg: "The study cannot go live yet; open items of the checklist: " + strings.Join(open, "; ") + ". Nothing was changed."})
			return
		}
		change.Version, change.MinReviewed = cs.Version.Version, cs.Def.PilotReviews()
	}
	if err := s.store.ChangePhase(ctx, change); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	s.log.Info("phase changed", slog.String("study", cs.Def.ID), slog.String("to", to), slog.Int64("user", u.ID))
	http.Redirect(w, r, "/console/studies/"+cs.Def.ID+"?done=phase", http.StatusSeeOther)
}

// handleEthics records the ethics approval reference.
//
// POST /console/studies/{study}/ethics (ref)
func (s *Server) handleEthics(w http.ResponseWriter, r *http.Request) {
	if err := parseConsoleForm(w, r); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	cs := consoleStudyOf(r.Context())
	u := consoleUser(r.Context())
	if err := s.store.SetEthicsRef(r.Context(), cs.Def.ID, r.PostForm.Get("ref"), store.Actor{UserID: u.ID}); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	http.Redirect(w, r, "/console/studies/"+cs.Def.ID+"?done=ethics", http.StatusSeeOther)
}

// whileOpen lets a respondent's reply or retry through unless the study
// closed longer ago than its grace period; the page's texts explain.
func (s *Server) whileOpen(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		req := fromContext(r.Context())
		st, err := s.store.State(r.Context(), req.sess.StudyID)
		if err != nil {
			s.fail(w, r, err)
			return
		}
		if d, closed := st.ClosedFor(s.Now()); closed && d > req.study.Def.CloseGrace() {
			s.fail(w, r, &Error{Status: http.StatusGone, Key: "study_closed", Rule: "study_closed",
				Msg: "the study is closed and the time for finishing conversations has run out"})
			return
		}
		next.ServeHTTP(w, r)
	})
}

// money writes an amount with its currency, if the study names one.
func money(v float64, currency string) string {
	s := strconv.FormatFloat(v, 'f', -1, 64)
	if currency != "" {
		s += " " + currency
	}
	return s
}

func sortedKeys[V any](m map[string]V) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}
