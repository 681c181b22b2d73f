package server

import (
	"bytes"
	"fmt"
	"math"
	"net/http"
	"strconv"
	"strings"
	"time"

	"trialogue/arms/analysis"
	"trialogue/store"
)

// dropoutAlpha is the significance level below which dropout is flagged as
// differing between arms (common practice).
const dropoutAlpha = 0.05

// Monitor is the live monitor's answer: a cohort's fielding at one moment.
// The page shows it and its script refreshes it from monitor.json.
type Monitor struct {
	Study     string `json:"study"`
	Phase     string `json:"phase"`
	Cohort    string `json:"cohort"`
	Generated string `json:"generated"` // UTC, store.TimeFormat

	Entered    int `json:"entered"`
	Completed  int `json:"completed"`
	InProgress int `json:"in_progress"`
	Dropped    int `json:"dropped"`
	// DropoutAfterS is the inactivity, in seconds, after which an
	// unfinished session counts as dropped.
	DropoutAfterS int `json:"dropout_after_s"`

	Arms   []MonitorArm  `json:"arms"`
	Strata []MonitorCell `json:"strata"` // stratum × arm counts, in row order

	Dropout DropoutTest `json:"dropout_test"`

	Latency  LatencyStats `json:"latency"`
	Hour     HourStats    `json:"last_hour"`
	Tokens   TokenStats   `json:"tokens"`
	Head     store.Head   `json:"chain_head"`
	ChartAlt string       `json:"chart_alt"`

	// Text holds every figure as the page shows it, keyed by the
	// data-field attribute of the element that shows it.
	Text map[string]string `json:"text"`
}

// MonitorArm is one arm's counts.
type MonitorArm struct {
	Arm        string   `json:"arm"`
	Code       string   `json:"code"`
	Assigned   int      `json:"assigned"`
	Completed  int      `json:"completed"`
	InProgress int      `json:"in_progress"`
	Dropped    int      `json:"dropped"`
	Dropout    float64  `json:"dropout"` // dropped / assigned; 0 when none assigned
	Cells      []string `json:"cells"`   // the table row as shown
}

// MonitorCell is one row of the stratum × arm table.
type MonitorCell struct {
	Stratum string   `json:"stratum"`
	Counts  []int    `json:"counts"` // in the order of Arms
	Cells   []string `json:"cells"`
}

// DropoutTest compares dropout between arms: Pearson's chi-square on
// arms × {dropped, completed}, over sessions whose outcome is known.
type DropoutTest struct {
	Done    bool    `json:"done"`
	Stat    float64 `json:"stat"`
	DF      int     `json:"df"`
	P       float64 `json:"p"`
	Differs bool    `json:"differs"` // p below 0.05
	Note    string  `json:"note"`
}

// LatencyStats are model latencies in milliseconds, over all model turns
// and over those of the last hour: the median (the mean of the middle two
// for an even count) and the 95th percentile by the nearest-rank method.
type LatencyStats struct {
	N          int   `json:"n"`
	MedianMS   int64 `json:"median_ms"`
	P95MS      int64 `json:"p95_ms"`
	HourN      int   `json:"hour_n"`
	HourMedian int64 `json:"hour_median_ms"`
	HourP95    int64 `json:"hour_p95_ms"`
}

// HourStats count model trouble in the last hour.
type HourStats struct {
	Errors  int `json:"errors"`  // calls that failed after every retry
	Retries int `json:"retries"` // retries of calls that then succeeded
}

// TokenStats are tokens used and their estimated cost at the study's prices.
type TokenStats struct {
	Input    int64    `json:"input"`
	Output   int64    `json:"output"`
	Cost     float64  `json:"cost"`
	Currency string   `json:"currency"`
	Unpriced []string `json:"unpriced"` // endpoints that used tokens but have no price
}

// median of sorted values: the middle one, or the mean of the middle two.
func median(v []int64) int64 {
	n := len(v)
	switch {
	case n == 0:
		return 0
	case n%2 == 1:
		return v[n/2]
	}
	return (v[n/2-1] + v[n/2]) / 2
}

// nearestRank is the p-th percentile (0 < p ≤ 100) of sorted values by the
// nearest-rank method: the value at rank ⌈p/100 · n⌉.
func nearestRank(v []int64, p float64) int64 {
	if len(v) == 0 {
		return 0
	}
	rank := int(math.Ceil(p / 100 * float64(len(v))))
	return v[min(max(rank, 1), len(v))-1]
}

// cohortOf reads the cohort of a monitor or list request: by default the
// main fielding once the study is live (or closed after being live), the
// pilot before.
func cohortOf(r *http.Request, cs *consoleStudy) (store.Cohort, error) {
	switch c := store.Cohort(r.URL.Query().Get("cohort")); c {
	case "":
		if cs.State.LiveVersion > 0 {
			return store.CohortMain, nil
		}
		return store.CohortPilot, nil
	case store.CohortMain, store.CohortPilot, store.CohortSynthetic, store.CohortAll:
		return c, nil
	default:
		return "", &Error{Status: http.StatusBadRequest, Msg: fmt.Sprintf("%q is not a cohort: use main, pilot, synthetic or all.", string(c))}
	}
}

// monitor computes the monitor of a cohort now.
func (s *Server) monitor(r *http.Request, cs *consoleStudy, cohort store.Cohort) (*Monitor, error) {
	ctx := r.Context()
	def := cs.Def
	now := s.Now().UTC()
	snap, err := s.store.Monitor(ctx, def.ID, cohort, now.Add(-time.Hour))
	if err != nil {
		return nil, err
	}
	m := &Monitor{Study: def.ID, Phase: cs.State.Phase, Cohort: string(cohort), Generated: now.Format(store.TimeFormat),
		DropoutAfterS: int(def.DropoutAfter().Seconds())}
	armIndex := map[string]int{}
	for _, name := range def.ArmOrder {
		armIndex[name] = len(m.Arms)
		m.Arms = append(m.Arms, MonitorArm{Arm: name, Code: def.Arms[name].Code})
	}
	strata := def.StrataKeys()
	stratumIndex := map[string]int{}
	for _, k := range strata {
		stratumIndex[k] = len(m.Strata)
		m.Strata = append(m.Strata, MonitorCell{Stratum: k, Counts: make([]int, len(m.Arms))})
	}
	dropAfter := def.DropoutAfter()
	for _, sess := range snap.Sessions {
		i, ok := armIndex[sess.Arm]
		if !ok { // an arm of an older version
			armIndex[sess.Arm] = len(m.Arms)
			i = len(m.Arms)
			m.Arms = append(m.Arms, MonitorArm{Arm: sess.Arm, Code: "?"})
			for j := range m.Strata {
				m.Strata[j].Counts = append(m.Strata[j].Counts, 0)
			}
		}
		a := &m.Arms[i]
		a.Assigned++
		m.Entered++
		switch {
		case sess.Finished:
			a.Completed++
			m.Completed++
		case now.Sub(sess.LastActivity) > dropAfter:
			a.Dropped++
			m.Dropped++
		default:
			a.InProgress++
			m.InProgress++
		}
		j, ok := stratumIndex[sess.Stratum]
		if !ok {
			stratumIndex[sess.Stratum] = len(m.Strata)
			j = len(m.Strata)
			m.Strata = append(m.Strata, MonitorCell{Stratum: sess.Stratum, Counts: make([]int, len(m.Arms))})
		}
		m.Strata[j].Counts[i]++
	}
	for i := range m.Arms {
		a := &m.Arms[i]
		if a.Assigned > 0 {
			a.Dropout = float64(a.Dropped) / float64(a.Assigned)
		}
		a.Cells = []string{a.Arm, a.Code, strconv.Itoa(a.Assigned), strconv.Itoa(a.Completed), strconv.Itoa(a.InProgress),
			strconv.Itoa(a.Dropped), percent(a.Dropped, a.Assigned)}
	}
	for j := range m.Strata {
		c := &m.Strata[j]
		c.Cells = []string{c.Stratum}
		for _, n := range c.Counts {
			c.Cells = append(c.Cells, strconv.Itoa(n))
		}
	}
	m.Dropout = dropoutTest(m.Arms)

	m.Latency = LatencyStats{N: len(snap.Latencies), MedianMS: median(snap.Latencies), P95MS: nearestRank(snap.Latencies, 95),
		HourN: len(snap.HourLatencies), HourMedian: median(snap.HourLatencies), HourP95: nearestRank(snap.HourLatencies, 95)}
	m.Hour = HourStats{Errors: snap.HourFailures, Retries: snap.HourRetries}

	currency := ""
	if def.Fielding != nil {
		currency = def.Fielding.Currency
	}
	m.Tokens = TokenStats{Currency: currency, Unpriced: []string{}}
	for _, arm := range sortedKeys(snap.Tokens) {
		use := snap.Tokens[arm]
		m.Tokens.Input += use.Input
		m.Tokens.Output += use.Output
		if use.Input+use.Output == 0 {
			continue
		}
		endpoint := ""
		if a := def.Arms[arm]; a != nil {
			endpoint = a.Endpoint
		}
		p, ok := def.PriceOf(endpoint)
		if !ok {
			if endpoint == "" {
				endpoint = "(arm " + arm + ")"
			}
			if !contains(m.Tokens.Unpriced, endpoint) {
				m.Tokens.Unpriced = append(m.Tokens.Unpriced, endpoint)
			}
			continue
		}
		m.Tokens.Cost += float64(use.Input)/1000*p.Input + float64(use.Output)/1000*p.Output
	}
	if m.Head, err = s.store.ChainHead(ctx, def.ID); err != nil {
		return nil, err
	}
	m.ChartAlt = chartAlt(snap.Sessions, now)
	m.Text = m.texts()
	return m, nil
}

func contains(list []string, v string) bool {
	for _, x := range list {
		if x == v {
			return true
		}
	}
	return false
}

// dropoutTest runs the chi-square test of dropout across arms.
func dropoutTest(armsRows []MonitorArm) DropoutTest {
	var table [][]float64
	small := false
	total, dropped := 0, 0
	for _, a := range armsRows {
		table = append(table, []float64{float64(a.Dropped), float64(a.Completed)})
		total += a.Dropped + a.Completed
		dropped += a.Dropped
	}
	cs, err := analysis.Independence(table)
	if err != nil {
		return DropoutTest{Note: "Not enough completed and dropped sessions in two or more arms to compare dropout."}
	}
	// Cochran's rule (common practice): the approximation is poor when
	// expected counts fall below 5.
	for _, a := range armsRows {
		n := float64(a.Dropped + a.Completed)
		if n == 0 {
			continue
		}
		if e := n * float64(dropped) / float64(total); e < 5 || n*float64(total-dropped)/float64(total) < 5 {
			small = true
		}
	}
	t := DropoutTest{Done: true, Stat: cs.Stat, DF: cs.DF, P: cs.P, Differs: cs.P < dropoutAlpha}
	t.Note = fmt.Sprintf("χ² = %.2f, df = %d, p = %s.", cs.Stat, cs.DF, pValue(cs.P))
	if small {
		t.Note += " Some expected counts are below 5: read the test with care."
	}
	return t
}

func pValue(p float64) string {
	if p < 0.001 {
		return "< 0.001"
	}
	return strconv.FormatFloat(p, 'f', 3, 64)
}

func percent(n, of int) string {
	if of == 0 {
		return "–"
	}
	return strconv.FormatFloat(100*float64(n)/float64(of), 'f', 1, 64) + "%"
}

func ms(v int64, n int) string {
	if n == 0 {
		return "–"
	}
	return strconv.FormatInt(v, 10) + " ms"
}

// texts are the figures as the page shows them.
func (m *Monitor) texts() map[string]string {
	cost := strconv.FormatFloat(m.Tokens.Cost, 'f', 2, 64)
	if m.Tokens.Currency != "" {
		cost += " " + m.Tokens.Currency
	}
	if len(m.Tokens.Unpriced) > 0 {
		cost += " (no price for " + strings.Join(m.Tokens.Unpriced, ", ") + ")"
	}
	dropFlag := "Dropout does not differ detectably between arms."
	if !m.Dropout.Done {
		dropFlag = "No test yet."
	} else if m.Dropout.Differs {
		dropFlag = "Dropout differs between arms."
	}
	return map[string]string{
		"phase":         m.Phase,
		"dropout_after": span(time.Duration(m.DropoutAfterS) * time.Second),
		"generated":     fmtStored(m.Generated),
		"entered":       strconv.Itoa(m.Entered),
		"completed":     strconv.Itoa(m.Completed),
		"in_progress":   strconv.Itoa(m.InProgress),
		"dropped":       strconv.Itoa(m.Dropped),
		"dropout_flag":  dropFlag,
		"dropout_note":  m.Dropout.Note,
		"latency":       ms(m.Latency.MedianMS, m.Latency.N) + " / " + ms(m.Latency.P95MS, m.Latency.N) + " (" + plural(m.Latency.N, "turn") + ")",
		"latency_hour":  ms(m.Latency.HourMedian, m.Latency.HourN) + " / " + ms(m.Latency.HourP95, m.Latency.HourN) + " (" + plural(m.Latency.HourN, "turn") + ")",
		"errors_hour":   strconv.Itoa(m.Hour.Errors),
		"retries_hour":  strconv.Itoa(m.Hour.Retries),
		"tokens":        strconv.FormatInt(m.Tokens.Input, 10) + " in, " + strconv.FormatInt(m.Tokens.Output, 10) + " out",
		"cost":          cost,
		"head_hash":     m.Head.Hash,
		"head_at":       fmtStored(m.Head.At),
		"head_seq":      strconv.FormatInt(m.Head.Seq, 10),
		"chart_caption": m.ChartAlt,
	}
}

// monitorPage is the data of the monitor page.
type monitorPage struct {
	consolePage
	M         *Monitor
	Cohorts   []store.Cohort
	ArmHeads  []string
	RefreshMS int
	Refresh   string // the refresh interval in words
	JSONURL   string
	ChartURL  string
}

// handleMonitor shows the live monitor, which refreshes itself.
//
// GET /console/studies/{study}/monitor[?cohort=main|pilot|synthetic|all]
func (s *Server) handleMonitor(w http.ResponseWriter, r *http.Request) {
	cs := consoleStudyOf(r.Context())
	cohort, err := cohortOf(r, cs)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	m, err := s.monitor(r, cs, cohort)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	refresh := s.cfg.ConsoleRefresh
	if refresh <= 0 {
		refresh = DefaultConsoleRefresh
	}
	base := "/console/studies/" + cs.Def.ID
	page := monitorPage{consolePage: s.page(r, "Monitor · "+cs.Def.Title, "monitor"), M: m, Cohorts: store.Cohorts,
		RefreshMS: int(refresh / time.Millisecond), Refresh: span(refresh), JSONURL: base + "/monitor.json?cohort=" + string(cohort),
		ChartURL: base + "/entries.svg?cohort=" + string(cohort)}
	for _, a := range m.Arms {
		page.ArmHeads = append(page.ArmHeads, a.Arm)
	}
	s.renderConsole(w, r, http.StatusOK, "console_monitor", page)
}

// handleMonitorJSON answers the monitor's figures for its script.
//
// GET /console/studies/{study}/monitor.json[?cohort=...]
func (s *Server) handleMonitorJSON(w http.ResponseWriter, r *http.Request) {
	cs := consoleStudyOf(r.Context())
	cohort, err := cohortOf(r, cs)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	m, err := s.monitor(r, cs, cohort)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	writeJSON(w, http.StatusOK, m)
}

// handleEntriesSVG draws entries over time as an SVG bar chart.
//
// GET /console/studies/{study}/entries.svg[?cohort=...]
func (s *Server) handleEntriesSVG(w http.ResponseWriter, r *http.Request) {
	cs := consoleStudyOf(r.Context())
	cohort, err := cohortOf(r, cs)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	snap, err := s.store.Monitor(r.Context(), cs.Def.ID, cohort, s.Now())
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	w.Header().Set("Content-Type", "image/svg+xml")
	w.Write(entriesSVG(snap.Sessions, s.Now().UTC()))
}

// chartBuckets are the bucket widths the chart chooses from: the smallest
// that puts the whole fielding in at most chartMaxBars bars.
var chartBuckets = []time.Duration{time.Minute, 5 * time.Minute, 15 * time.Minute, time.Hour, 6 * time.Hour, 24 * time.Hour, 7 * 24 * time.Hour}

const chartMaxBars = 48

// entryBuckets counts entries per bucket, from the first entry's bucket to
// now's.
func entryBuckets(sessions []store.MonitorSession, now time.Time) (start time.Time, width time.Duration, counts []int) {
	if len(sessions) == 0 {
		return now, time.Hour, nil
	}
	first := sessions[0].CreatedAt
	for _, s := range sessions {
		if s.CreatedAt.Before(first) {
			first = s.CreatedAt
		}
	}
	if now.Before(first) {
		now = first
	}
	width = chartBuckets[len(chartBuckets)-1]
	for _, b := range chartBuckets {
		if int(now.Sub(first.Truncate(b))/b)+1 <= chartMaxBars {
			width = b
			break
		}
	}
	start = first.Truncate(width)
	counts = make([]int, int(now.Sub(start)/width)+1)
	for _, s := range sessions {
		if i := int(s.CreatedAt.Sub(start) / width); i >= 0 && i < len(counts) {
			counts[i]++
		}
	}
	return start, width, counts
}

// chartAlt describes the chart in words, for its alt text.
func chartAlt(sessions []store.MonitorSession, now time.Time) string {
	start, width, counts := entryBuckets(sessions, now)
	if len(counts) == 0 {
		return "No entries yet."
	}
	peak := 0
	for _, c := range counts {
		peak = max(peak, c)
	}
	return fmt.Sprintf("%s since %s, in bars of %s; at most %d in one bar.", plural(len(sessions), "entry"), fmtTime(start), span(width), peak)
}

// entriesSVG draws the entries per bucket as bars, with the first and last
// bucket's time and the highest count as labels. Colours follow the
// viewer's light or dark scheme.
func entriesSVG(sessions []store.MonitorSession, now time.Time) []byte {
	const w, h, left, bottom, top = 640, 180, 40, 24, 12
	start, width, counts := entryBuckets(sessions, now)
	peak := 1
	for _, c := range counts {
		peak = max(peak, c)
	}
	var b bytes.Buffer
	fmt.Fprintf(&b, `<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 %d %d" width="%d" height="%d" role="img">`, w, h, w, h)
	b.WriteString(`<style>text{font:12px system-ui,sans-serif;fill:#3b4149}.bar{fill:#1d5fb8}.axis{stroke:#8a929c}` +
		`@media (prefers-color-scheme: dark){text{fill:#c9ced6}.bar{fill:#8cb8f2}}</style>`)
	fmt.Fprintf(&b, `<title>Entries over time</title><desc>%s</desc>`, chartAlt(sessions, now))
	plotW, plotH := float64(w-left-8), float64(h-top-bottom)
	fmt.Fprintf(&b, `<line class="axis" x1="%d" y1="%d" x2="%d" y2="%d"/>`, left, h-bottom, w-8, h-bottom)
	if len(counts) == 0 {
		fmt.Fprintf(&b, `<text x="%d" y="%d">No entries yet.</text></svg>`, left+8, h/2)
		return b.Bytes()
	}
	barW := plotW / float64(len(counts))
	for i, c := range counts {
		if c == 0 {
			continue
		}
		bh := plotH * float64(c) / float64(peak)
		fmt.Fprintf(&b, `<rect class="bar" x="%.1f" y="%.1f" width="%.1f" height="%.1f"><title>%d</title></rect>`,
			float64(left)+float64(i)*barW+1, float64(h-bottom)-bh, math.Max(barW-2, 1), bh, c)
	}
	fmt.Fprintf(&b, `<text x="%d" y="%d" text-anchor="end">%d</text>`, left-6, top+10, peak)
	fmt.Fprintf(&b, `<text x="%d" y="%d" text-anchor="end">0</text>`, left-6, h-bottom)
	fmt.Fprintf(&b, `<text x="%d" y="%d">%s</text>`, left, h-6, start.Format("2006-01-02 15:04"))
	fmt.Fprintf(&b, `<text x="%d" y="%d" text-anchor="end">%s UTC (bars of %s)</text>`, w-8, h-6, start.Add(width*time.Duration(len(counts)-1)).Format("2006-01-02 15:04"), span(width))
	b.WriteString(`</svg>`)
	return b.Bytes()
}

// span writes a duration in words: "90 seconds", "5 minutes", "1 hour".
func span(d time.Duration) string {
	switch {
	case d == 0:
		return "no time"
	case d%(7*24*time.Hour) == 0:
		return plural(int(d/(7*24*time.Hour)), "week")
	case d%(24*time.Hour) == 0:
		return plural(int(d/(24*time.Hour)), "day")
	case d%time.Hour == 0:
		return plural(int(d/time.Hour), "hour")
	case d%time.Minute == 0:
		return plural(int(d/time.Minute), "minute")
	case d%time.Second == 0:
		return plural(int(d/time.Second), "second")
	}
	return d.String()
}
