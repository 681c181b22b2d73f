package server

import (
	"bytes"
	"crypto/rand"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/go-chi/chi/v5"

	"trialogue/arms/analysis"
	"trialogue/arms/analysis/textmap"
)

// Limits of the console's analyses.
const (
	// consoleMaxOutcomes bounds an uploaded outcome file: 20 MiB holds a
	// survey export of a few hundred thousand respondents.
	consoleMaxOutcomes = 20 << 20
	// consoleMaxField bounds each other field of the analysis form.
	consoleMaxField = 4 << 10
	// consoleMaxFields bounds the number of form fields besides the file.
	consoleMaxFields = 32
	// consolePermutations is the console's default number of
	// randomization-inference re-draws: lower than the command's
	// (analysis.DefaultPermutations), so the page answers quickly.
	consolePermutations = 2000
	// consoleMaxPermutations caps the re-draws a console request may ask
	// for; more are for the command.
	consoleMaxPermutations = analysis.DefaultPermutations
	// consoleMapPermutations is the arms map's default number of label
	// permutations, as the command's.
	consoleMapPermutations = 1000
	// analysisKeep is how long a result stays available for its plot and
	// download, and analysisKept how many results are kept at most.
	analysisKeep = time.Hour
	analysisKept = 16
)

// consoleAnalysis serves the console's analysis pages: the effects of an
// uploaded outcome file and the arms map. Results are kept in memory for
// an hour, for the user who ran them, so that their plot and download can
// be fetched; analyses run one at a time, since each uses every core.
type consoleAnalysis struct {
	s    *Server
	slot chan struct{}

	mu      sync.Mutex
	results map[string]*effectsResult
}

func newConsoleAnalysis(s *Server) *consoleAnalysis {
	return &consoleAnalysis{s: s, slot: make(chan struct{}, 1), results: map[string]*effectsResult{}}
}

// effectsResult is one effects analysis run from the console.
type effectsResult struct {
	user    int64
	study   string
	at      time.Time
	file    string // the uploaded file's name, as sent
	form    effectsForm
	reports []*analysis.Report
	svg     []byte
	zip     []byte
	zipName string
}

// effectsForm is the analysis form as the researcher filled it in.
type effectsForm struct {
	ID, Outcome, Pre, Covariates, Control, Adjust string
	Change                                        bool
	Permutations                                  string
	Seed                                          string
}

// analysisFormPage is the data of the analysis form.
type analysisFormPage struct {
	consolePage
	Form            effectsForm
	Arms            []armChoice // the study's arms, to pick the control from
	Covariates      []string
	Problems        []string
	MaxMB           int
	MaxPermutations int
}

// armChoice is one arm in the form's list of control arms.
type armChoice struct {
	Name    string
	Checked bool
}

// analysisResultPage is the data of an analysis's results.
type analysisResultPage struct {
	consolePage
	File      string
	RanAt     string
	Form      effectsForm
	Reports   []reportView
	Balance   []balanceView
	Omnibus   []omnibusView
	Attrition []attritionView
	AttrTest  string
	PlotURL   string
	ZipURL    string
	PlotAlt   string
}

type reportView struct {
	Outcome, Adjust, Control, Note string
	N                              int
	ControlN                       int
	ControlMean                    string
	Effects                        []effectView
	Join                           analysis.Join
}

type effectView struct {
	Arm, Mean, Estimate, SE, CI, P, PHolm, PRI string
	N                                          int
}

type balanceView struct {
	Covariate, Level, Arm, Value, SMD string
	N                                 int
}

type omnibusView struct{ Covariate, Test, Stat, DF, P string }

type attritionView struct {
	Arm                          string
	Assigned, Finished, Observed int
	Share                        string
}

// f3 shows a number to three decimals, or a dash when it is undefined.
func f3(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "–"
	}
	return strconv.FormatFloat(v, 'f', 3, 64)
}

// pShow shows a p-value as the command's tables do.
func pShow(p float64) string {
	switch {
	case math.IsNaN(p):
		return "–"
	case p < 0.0001:
		return "<0.0001"
	}
	return strconv.FormatFloat(p, 'f', 4, 64)
}

// handleAnalysisForm shows the form that uploads an outcome file.
//
// GET /console/studies/{study}/analysis
func (ca *consoleAnalysis) handleAnalysisForm(w http.ResponseWriter, r *http.Request) {
	form := effectsForm{Adjust: analysis.AdjustNone, Permutations: strconv.Itoa(consolePermutations), Seed: "1"}
	ca.renderForm(w, r, http.StatusOK, form, nil)
}

func (ca *consoleAnalysis) renderForm(w http.ResponseWriter, r *http.Request, status int, form effectsForm, problems []string) {
	cs := consoleStudyOf(r.Context())
	page := analysisFormPage{consolePage: ca.s.page(r, "Effects", "analysis"), Form: form,
		Problems: problems, MaxMB: consoleMaxOutcomes >> 20, MaxPermutations: consoleMaxPermutations}
	control := splitFormList(form.Control)
	for _, a := range cs.Def.ArmOrder {
		page.Arms = append(page.Arms, armChoice{Name: a, Checked: slices.Contains(control, a)})
	}
	for _, c := range cs.Def.Covariates {
		page.Covariates = append(page.Covariates, c.Name)
	}
	ca.s.renderConsole(w, r, status, "console_analysis", page)
}

// upload is the analysis form as sent: its fields and the outcome file.
type upload struct {
	fields url.Values
	file   []byte
	name   string
	sent   bool // a file part was sent
}

// readUpload reads a multipart/form-data body (RFC 7578) part by part, so
// that an outcome file over the limit is refused (413) without being held.
func readUpload(w http.ResponseWriter, r *http.Request) (*upload, error) {
	r.Body = http.MaxBytesReader(w, r.Body, consoleMaxOutcomes+consoleMaxFields*consoleMaxField+64<<10)
	mr, err := r.MultipartReader()
	if err != nil {
		return nil, &Error{Status: http.StatusBadRequest, Msg: "The form must be sent as multipart/form-data with the outcome file.", Err: err}
	}
	tooLarge := &Error{Status: http.StatusRequestEntityTooLarge,
		Msg: fmt.Sprintf("The outcome file is larger than %d MB: run trialogue effects on the command line for files this large. Nothing was analysed.", consoleMaxOutcomes>>20)}
	up := &upload{fields: url.Values{}}
	for n := 0; ; n++ {
		p, err := mr.NextPart()
		if errors.Is(err, io.EOF) {
			break
		}
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			return nil, tooLarge
		}
		if err != nil {
			return nil, &Error{Status: http.StatusBadRequest, Msg: "The form could not be read.", Err: err}
		}
		if n > consoleMaxFields {
			return nil, &Error{Status: http.StatusBadRequest, Msg: "The form has too many fields."}
		}
		limit := int64(consoleMaxField)
		if p.FormName() == "outcomes" {
			limit = consoleMaxOutcomes
		}
		data, err := io.ReadAll(io.LimitReader(p, limit+1))
		if errors.As(err, &mbe) || (err == nil && int64(len(data)) > limit) {
			if p.FormName() == "outcomes" {
				return nil, tooLarge
			}
			return nil, &Error{Status: http.StatusRequestEntityTooLarge, Msg: fmt.Sprintf("The field %q is longer than %d bytes.", clipName(p.FormName()), consoleMaxField)}
		}
		if err != nil {
			return nil, &Error{Status: http.StatusBadRequest, Msg: "The form could not be read.", Err: err}
		}
		if p.FormName() == "outcomes" {
			if up.sent {
				return nil, &Error{Status: http.StatusBadRequest, Msg: "Send one outcome file at a time."}
			}
			up.sent, up.file, up.name = true, data, baseName(p.FileName())
			continue
		}
		up.fields.Add(p.FormName(), string(data))
	}
	return up, nil
}

// baseName keeps the last element of an uploaded file's name: RFC 7578
// section 4.2 lets a sender include a path, which is none of our business.
func baseName(name string) string {
	if i := strings.LastIndexAny(name, `/\`); i >= 0 {
		name = name[i+1:]
	}
	if name = clipName(strings.TrimSpace(name)); name == "" {
		return "the outcome file"
	}
	return name
}

// clipName shortens a name sent by a client for a message.
func clipName(s string) string {
	if r := []rune(s); len(r) > 80 {
		return string(r[:80]) + "…"
	}
	return s
}

// problemsOf returns the problems of bad input, or nil for other errors.
func problemsOf(err error) []string {
	var ie *analysis.InputError
	if errors.As(err, &ie) {
		return ie.Problems
	}
	return nil
}

// handleAnalysisRun runs the effects analysis on an uploaded outcome file,
// as trialogue effects does, keeps the result for its plot and download,
// and sends the browser to it. Bad input shows the form again with the
// command's messages (400 for a file that is not a readable CSV, 422 for
// a file or form that cannot be analysed as given); nothing is kept.
//
// POST /console/studies/{study}/analysis
func (ca *consoleAnalysis) handleAnalysisRun(w http.ResponseWriter, r *http.Request) {
	cs := consoleStudyOf(r.Context())
	up, err := readUpload(w, r)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	form := effectsForm{ID: up.fields.Get("id"), Outcome: up.fields.Get("outcome"), Pre: up.fields.Get("pre"),
		Covariates: up.fields.Get("covariates"), Control: strings.Join(up.fields["control"], ","), Adjust: up.fields.Get("adjust"),
		Change: up.fields.Get("change") == "1", Permutations: up.fields.Get("permutations"), Seed: up.fields.Get("seed")}
	spec, columns, problems := form.spec()
	if !up.sent || len(up.file) == 0 {
		ca.renderForm(w, r, http.StatusBadRequest, form, append([]string{"Choose the outcome file exported by the survey (CSV)."}, problems...))
		return
	}
	if len(problems) > 0 {
		ca.renderForm(w, r, http.StatusUnprocessableEntity, form, problems)
		return
	}
	tab, err := analysis.ReadOutcomes(bytes.NewReader(up.file), up.name)
	if p := problemsOf(err); p != nil {
		ca.renderForm(w, r, http.StatusBadRequest, form, p)
		return
	}
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	select {
	case ca.slot <- struct{}{}:
		defer func() { <-ca.slot }()
	case <-r.Context().Done():
		return
	}
	d, err := ca.s.store.Design(r.Context(), cs.Def.ID)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	reps, err := analysis.AnalyzeAll(d.Study, d.Units, tab, columns, spec)
	if p := problemsOf(err); p != nil {
		ca.renderForm(w, r, http.StatusUnprocessableEntity, form, p)
		return
	}
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	now := ca.s.Now().UTC()
	res := &effectsResult{user: consoleUser(r.Context()).ID, study: cs.Def.ID, at: now, file: up.name, form: form, reports: reps,
		zipName: cs.Def.ID + "-effects-" + now.Format("20060102T150405Z")}
	var svg, zip bytes.Buffer
	if err := analysis.WriteCoefPlot(&svg, reps); err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	err = analysis.WriteZip(&zip, res.zipName, now, func(create func(string) (io.WriteCloser, error)) error {
		return analysis.WriteFiles(create, reps)
	})
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	res.svg, res.zip = svg.Bytes(), zip.Bytes()
	id := ca.keep(res)
	ca.s.log.Info("console effects analysis", slog.String("study", cs.Def.ID), slog.Int64("user", res.user),
		slog.Int("outcomes", len(reps)), slog.Int("analysed", reps[0].N), slog.Int("permutations", spec.Permutations))
	http.Redirect(w, r, "/console/studies/"+cs.Def.ID+"/analysis/"+id, http.StatusSeeOther)
}

// spec checks the form as the command checks its flags and returns what
// to estimate and the outcome columns.
func (f effectsForm) spec() (analysis.Spec, []string, []string) {
	var problems []string
	spec := analysis.Spec{ID: strings.TrimSpace(f.ID), Pre: strings.TrimSpace(f.Pre), Covariates: splitFormList(f.Covariates),
		Control: splitFormList(f.Control), Adjust: f.Adjust, Change: f.Change, Permutations: consolePermutations, Seed: 1}
	columns := splitFormList(f.Outcome)
	if spec.ID == "" {
		problems = append(problems, "Name the column that holds the respondent id (rid).")
	}
	if len(columns) == 0 {
		problems = append(problems, "Name the outcome column.")
	}
	if !slices.Contains([]string{analysis.AdjustNone, analysis.AdjustPre, analysis.AdjustLin}, f.Adjust) {
		problems = append(problems, "Choose an adjustment: none, pre or lin.")
	}
	if v := strings.TrimSpace(f.Permutations); v != "" {
		n, err := strconv.Atoi(v)
		if err != nil || n < 0 || n > consoleMaxPermutations {
			problems = append(problems, fmt.Sprintf("Re-draws must be a whole number from 0 to %d; the command takes more.", consoleMaxPermutations))
		}
		spec.Permutations = n
	}
	if v := strings.TrimSpace(f.Seed); v != "" {
		n, err := strconv.ParseUint(v, 10, 64)
		if err != nil {
			problems = append(problems, "The seed must be a whole number of 0 or more.")
		}
		spec.Seed = n
	}
	return spec, columns, problems
}

// splitFormList splits a comma-separated field, as the command's flags.
func splitFormList(v string) []string {
	var out []string
	for _, p := range strings.Split(v, ",") {
		if p = strings.TrimSpace(p); p != "" {
			out = append(out, p)
		}
	}
	return out
}

// keep stores a result under a fresh unguessable id, dropping expired
// results and, beyond analysisKept, the oldest.
func (ca *consoleAnalysis) keep(res *effectsResult) string {
	id := rand.Text()
	ca.mu.Lock()
	defer ca.mu.Unlock()
	for k, v := range ca.results {
		if res.at.Sub(v.at) > analysisKeep {
			delete(ca.results, k)
		}
	}
	for len(ca.results) >= analysisKept {
		oldest := ""
		for k, v := range ca.results {
			if oldest == "" || v.at.Before(ca.results[oldest].at) {
				oldest = k
			}
		}
		delete(ca.results, oldest)
	}
	ca.results[id] = res
	return id
}

// result finds a kept result of the study for the signed-in user.
func (ca *consoleAnalysis) result(r *http.Request) (*effectsResult, error) {
	ca.mu.Lock()
	res, ok := ca.results[chi.URLParam(r, "result")]
	ca.mu.Unlock()
	u := consoleUser(r.Context())
	if !ok || u == nil || res.user != u.ID || res.study != consoleStudyOf(r.Context()).Def.ID || ca.s.Now().Sub(res.at) > analysisKeep {
		return nil, &Error{Status: http.StatusNotFound,
			Msg: "This analysis is not kept any more: results are kept for an hour for the one who ran them. Upload the outcome file again."}
	}
	return res, nil
}

// handleAnalysisResult shows an analysis's effects, balance, attrition,
// how the file met the sessions, and the coefficient plot.
//
// GET /console/studies/{study}/analysis/{result}
func (ca *consoleAnalysis) handleAnalysisResult(w http.ResponseWriter, r *http.Request) {
	res, err := ca.result(r)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	base := "/console/studies/" + res.study + "/analysis/" + chi.URLParam(r, "result")
	page := analysisResultPage{consolePage: ca.s.page(r, "Effects", "analysis"), File: res.file, RanAt: fmtTime(res.at), Form: res.form,
		PlotURL: base + "/effects.svg", ZipURL: base + "/effects.zip"}
	var alt []string
	for _, rep := range res.reports {
		v := reportView{Outcome: rep.Outcome, Adjust: rep.Adjust, Control: strings.Join(rep.Control, ", "), N: rep.N, Join: rep.Join}
		if len(rep.Effects) > 0 {
			v.ControlN, v.ControlMean = rep.Effects[0].NControl, f3(rep.Effects[0].MeanControl)
			v.Note = fmt.Sprintf("t tests with %g residual degrees of freedom; Holm across %d arms", rep.Effects[0].DF, len(rep.Effects))
		}
		if rep.StrataFE {
			v.Adjust += ", stratum fixed effects"
		}
		if rep.Permutations > 0 {
			v.Note += fmt.Sprintf("; randomization inference from %d re-draws of the study's blocked scheme (seed %d)", rep.Permutations, rep.Seed)
			if rep.RIStatistic == analysis.RIResidualMeans {
				v.Note += " on the difference in mean covariate-adjusted residuals"
			}
		}
		v.Note += "."
		for _, e := range rep.Effects {
			v.Effects = append(v.Effects, effectView{Arm: e.Arm, N: e.N, Mean: f3(e.MeanArm), Estimate: f3(e.Estimate), SE: f3(e.SE),
				CI: "[" + f3(e.Low) + ", " + f3(e.High) + "]", P: pShow(e.P), PHolm: pShow(e.PHolm), PRI: pShow(e.PRI)})
			alt = append(alt, fmt.Sprintf("%s on %s %s [%s, %s]", e.Arm, rep.Outcome, f3(e.Estimate), f3(e.Low), f3(e.High)))
		}
		page.Reports = append(page.Reports, v)
	}
	page.PlotAlt = "Estimates with 95% intervals: " + strings.Join(alt, "; ")
	first := res.reports[0]
	for _, b := range first.Balance {
		page.Balance = append(page.Balance, balanceView{Covariate: b.Covariate, Level: b.Level, Arm: b.Arm, N: b.N, Value: f3(b.Value), SMD: f3(b.SMD)})
	}
	for _, t := range first.Omnibus {
		df := strconv.Itoa(t.DF1)
		if t.DF2 > 0 {
			df += ", " + strconv.Itoa(t.DF2)
		}
		page.Omnibus = append(page.Omnibus, omnibusView{Covariate: t.Covariate, Test: t.Test, Stat: f3(t.Stat), DF: df, P: pShow(t.P)})
	}
	for _, a := range first.Attrition.Rows {
		page.Attrition = append(page.Attrition, attritionView{Arm: a.Arm, Assigned: a.Assigned, Finished: a.Finished, Observed: a.Observed, Share: f3(a.Share)})
	}
	if first.Attrition.Tested {
		t := first.Attrition.Test
		page.AttrTest = fmt.Sprintf("Differential attrition: chi-square %s, df %d, p %s.", f3(t.Stat), t.DF, pShow(t.P))
	}
	ca.s.renderConsole(w, r, http.StatusOK, "console_analysis_result", page)
}

// svgHeaders: an SVG is served as an image that, opened on its own, may
// run nothing and load nothing (it draws with inline styles only).
func svgHeaders(w http.ResponseWriter) {
	h := w.Header()
	h.Set("Content-Type", "image/svg+xml")
	h.Set("Content-Security-Policy", "default-src 'none'; style-src 'unsafe-inline'; frame-ancestors 'none'")
}

// handleAnalysisSVG serves an analysis's coefficient plot.
//
// GET /console/studies/{study}/analysis/{result}/effects.svg
func (ca *consoleAnalysis) handleAnalysisSVG(w http.ResponseWriter, r *http.Request) {
	res, err := ca.result(r)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	svgHeaders(w)
	w.Write(res.svg)
}

// handleAnalysisZip sends the files trialogue effects --out writes
// (effects.csv, balance.csv, attrition.csv, effects.json, effects.svg) as
// one zip archive.
//
// GET /console/studies/{study}/analysis/{result}/effects.zip
func (ca *consoleAnalysis) handleAnalysisZip(w http.ResponseWriter, r *http.Request) {
	res, err := ca.result(r)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	h := w.Header()
	h.Set("Content-Type", "application/zip")
	// RFC 6266: a download, under this name (study ids are [a-z0-9-]).
	h.Set("Content-Disposition", `attachment; filename="`+res.zipName+`.zip"`)
	h.Set("Content-Length", strconv.Itoa(len(res.zip)))
	w.Write(res.zip)
}

// armsMapPage is the data of the arms map.
type armsMapPage struct {
	consolePage
	Problem         string // why there is no map
	Messages        int
	Terms           int
	Folds           int
	Accuracy        string
	Chance          string
	P               string
	Permutations    int
	MaxPermutations int
	PlotURL         string
	PlotAlt         string
	Arms            []string
	Distances       [][]string // per arm: its name, then its distance to each arm
	Top             []armTerms
}

type armTerms struct {
	Arm   string
	Terms []string
}

// mapPermutations reads ?permutations=, as the command's flag.
func mapPermutations(r *http.Request) (int, error) {
	v := r.URL.Query().Get("permutations")
	if v == "" {
		return consoleMapPermutations, nil
	}
	n, err := strconv.Atoi(v)
	if err != nil || n < 0 || n > consoleMaxPermutations {
		return 0, &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("permutations must be a whole number from 0 to %d.", consoleMaxPermutations)}
	}
	return n, nil
}

// buildMap computes the study's arms map as trialogue arms-map does (seed
// 1). A study whose messages cannot be mapped yet gives the reason as
// text, with a nil result.
func (ca *consoleAnalysis) buildMap(r *http.Request, perms int) (*textmap.Result, string, error) {
	id := consoleStudyOf(r.Context()).Def.ID
	select {
	case ca.slot <- struct{}{}:
		defer func() { <-ca.slot }()
	case <-r.Context().Done():
		return nil, "", r.Context().Err()
	}
	d, err := ca.s.store.Design(r.Context(), id)
	if err != nil {
		return nil, "", err
	}
	docs, _, err := ca.s.store.MapDocs(r.Context(), id)
	if err != nil {
		return nil, "", err
	}
	res, err := textmap.Build(docs, d.Study.ArmOrder, textmap.Options{Permutations: perms, Seed: 1})
	if err != nil {
		// Build's errors describe the messages (too few, one arm, no
		// words), as the command prints them.
		return nil, err.Error(), nil
	}
	return res, "", nil
}

// handleArmsMap shows whether the arms' model messages differ in content:
// the 2-D map, cross-validated classification against chance with its
// permutation p-value, centroid distances and each arm's top terms.
//
// GET /console/studies/{study}/arms-map[?permutations=N]
func (ca *consoleAnalysis) handleArmsMap(w http.ResponseWriter, r *http.Request) {
	perms, err := mapPermutations(r)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	res, problem, err := ca.buildMap(r, perms)
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	page := armsMapPage{consolePage: ca.s.page(r, "Arms map", "arms-map"), Problem: problem, Permutations: perms, MaxPermutations: consoleMaxPermutations}
	if res != nil {
		page.Messages, page.Terms, page.Folds = res.Docs, res.Terms, res.Folds
		page.Accuracy, page.Chance, page.Arms = f3(res.Accuracy), f3(res.Chance), res.Arms
		if res.Perms > 0 {
			page.P = pShow(res.P)
		}
		page.PlotURL = "/console/studies/" + consoleStudyOf(r.Context()).Def.ID + "/arms-map.svg"
		page.PlotAlt = fmt.Sprintf("Map of %d model messages from %d arms (%s); cross-validated accuracy %s against chance %s.",
			res.Docs, len(res.Arms), strings.Join(res.Arms, ", "), page.Accuracy, page.Chance)
		for i, a := range res.Arms {
			row := []string{a}
			for j := range res.Arms {
				row = append(row, f3(res.Distances[i][j]))
			}
			page.Distances = append(page.Distances, row)
			at := armTerms{Arm: a}
			for _, t := range res.Top[i] {
				at.Terms = append(at.Terms, t.Term)
			}
			page.Top = append(page.Top, at)
		}
	}
	ca.s.renderConsole(w, r, http.StatusOK, "console_analysis_map", page)
}

// handleArmsMapSVG draws the arms map; its points do not depend on the
// permutations, so none are run.
//
// GET /console/studies/{study}/arms-map.svg
func (ca *consoleAnalysis) handleArmsMapSVG(w http.ResponseWriter, r *http.Request) {
	res, problem, err := ca.buildMap(r, 0)
	if err == nil && res == nil {
		err = &Error{Status: http.StatusNotFound, Msg: "There is no map yet: " + problem}
	}
	if err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	var b bytes.Buffer
	if err := textmap.WriteSVG(&b, res); err != nil {
		ca.s.consoleFail(w, r, err)
		return
	}
	svgHeaders(w)
	w.Write(b.Bytes())
}
