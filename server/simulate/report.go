package simulate

import (
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"slices"
	"sync"
	"text/tabwriter"
	"time"

	"gonum.org/v1/gonum/stat"
)

// Report is what a run measured. Times are in milliseconds.
type Report struct {
	Respondents int                  `json:"respondents"` // asked for
	Completed   int                  `json:"completed"`   // finished with a completion code
	Seconds     float64              `json:"seconds"`     // wall time of the run
	Stopped     bool                 `json:"stopped"`     // the maximum time ended the run
	Steps       map[string]Latencies `json:"steps"`       // per step: successful requests
	Overhead    Latencies            `json:"overhead"`    // per model turn: latency less the model's own time, on this client's clock
	ServerSide  Latencies            `json:"server_side"` // per model turn: the server's own time, on its clock (server_ms)
	Errors      map[string]int       `json:"errors"`      // "step:kind" (an HTTP status, or a transport failure) → count
	Arms        map[string]int       `json:"arms"`        // arm code → completed respondents
	Turns       int                  `json:"turns"`       // model turns received (openings and replies)
}

// Latencies summarises one step's times: percentiles by the empirical
// quantile (the inverse of the empirical distribution function, as gonum's
// stat.Quantile with stat.Empirical computes it).
type Latencies struct {
	Count int     `json:"count"`
	P50   float64 `json:"p50_ms"`
	P90   float64 `json:"p90_ms"`
	P99   float64 `json:"p99_ms"`
	Max   float64 `json:"max_ms"`
}

// ErrorCount is the number of failed steps.
func (r *Report) ErrorCount() int {
	n := 0
	for _, v := range r.Errors {
		n += v
	}
	return n
}

func summarise(ms []float64) Latencies {
	if len(ms) == 0 {
		return Latencies{}
	}
	slices.Sort(ms)
	q := func(p float64) float64 { return stat.Quantile(p, stat.Empirical, ms, nil) }
	return Latencies{Count: len(ms), P50: q(0.5), P90: q(0.9), P99: q(0.99), Max: ms[len(ms)-1]}
}

// recorder collects measurements from every respondent at once.
type recorder struct {
	mu       sync.Mutex
	steps    map[string][]float64
	overhead []float64
	server   []float64
	errors   map[string]int
	arms     map[string]int
	turns    int
}

func newRecorder() *recorder {
	return &recorder{steps: map[string][]float64{}, errors: map[string]int{}, arms: map[string]int{}}
}

func ms(d time.Duration) float64 { return float64(d) / float64(time.Millisecond) }

func (r *recorder) took(step string, d time.Duration) {
	r.mu.Lock()
	r.steps[step] = append(r.steps[step], ms(d))
	r.mu.Unlock()
}

func (r *recorder) turn(step string, d, model time.Duration, serverMS float64) {
	r.mu.Lock()
	r.steps[step] = append(r.steps[step], ms(d))
	r.overhead = append(r.overhead, ms(max(d-model, 0)))
	r.server = append(r.server, serverMS)
	r.turns++
	r.mu.Unlock()
}

func (r *recorder) fail(step, kind string) {
	r.mu.Lock()
	r.errors[step+":"+kind]++
	r.mu.Unlock()
}

func (r *recorder) finished(armCode string) {
	r.mu.Lock()
	r.arms[armCode]++
	r.mu.Unlock()
}

func (r *recorder) report(respondents int, took time.Duration, stopped error) *Report {
	r.mu.Lock()
	defer r.mu.Unlock()
	rep := &Report{Respondents: respondents, Seconds: took.Seconds(), Stopped: stopped != nil,
		Steps: map[string]Latencies{}, Errors: maps.Clone(r.errors), Arms: maps.Clone(r.arms), Turns: r.turns,
		Overhead: summarise(slices.Clone(r.overhead)), ServerSide: summarise(slices.Clone(r.server))}
	for step, v := range r.steps {
		rep.Steps[step] = summarise(slices.Clone(v))
	}
	for _, n := range r.arms {
		rep.Completed += n
	}
	return rep
}

// WriteTable writes the report as aligned text.
func (r *Report) WriteTable(w io.Writer) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(w, "%d of %d synthetic respondents completed in %.1f s; %d model turns; %d errors\n\n",
		r.Completed, r.Respondents, r.Seconds, r.Turns, r.ErrorCount())
	fmt.Fprintln(tw, "step\tcount\tp50 ms\tp90 ms\tp99 ms\tmax ms\t")
	row := func(name string, l Latencies) {
		fmt.Fprintf(tw, "%s\t%d\t%.1f\t%.1f\t%.1f\t%.1f\t\n", name, l.Count, l.P50, l.P90, l.P99, l.Max)
	}
	for _, s := range Steps {
		if l, ok := r.Steps[s]; ok {
			row(s, l)
		}
	}
	row("overhead/turn", r.Overhead)
	row("server/turn", r.ServerSide)
	if err := tw.Flush(); err != nil {
		return err
	}
	fmt.Fprintln(w, "\n(overhead/turn = turn latency less the model time the server reports, on this client's clock;")
	fmt.Fprintln(w, " server/turn = the server's own time per turn, on its clock, from the request to the answer less the model time)")
	if len(r.Arms) > 0 {
		fmt.Fprintln(w, "\narm\tcompleted")
		for _, a := range slices.Sorted(maps.Keys(r.Arms)) {
			fmt.Fprintf(w, "%s\t%d\n", a, r.Arms[a])
		}
	}
	if len(r.Errors) > 0 {
		fmt.Fprintln(w, "\nerror (step:kind)\tcount")
		for _, e := range slices.Sorted(maps.Keys(r.Errors)) {
			fmt.Fprintf(w, "%s\t%d\n", e, r.Errors[e])
		}
	}
	if r.Stopped {
		fmt.Fprintln(w, "\nThe run reached its maximum time and stopped.")
	}
	return nil
}

// WriteJSON writes the report as indented JSON.
func (r *Report) WriteJSON(w io.Writer) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(r)
}
