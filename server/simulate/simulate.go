// Package simulate drives synthetic respondents through a Trialogue server's
// real HTTP path (entry, page, state, opening, every reply, finish, the
// return address), as a load generator and as a dry run of a study's
// prompts. It is what `trialogue simulate` runs. Load goes to loopback
// addresses only, is bounded in count and time, and stops by itself.
package simulate

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"trialogue/arms/responder"
)

// Bounds on one run.
const (
	MaxRespondents = 100_000
	MaxConcurrency = 20_000
	DefaultMaxTime = 30 * time.Minute
)

// SyntheticHeader carries the server's synthetic key on entry; the server
// marks the session synthetic only when the key matches.
const SyntheticHeader = "Trialogue-Synthetic"

// Config is one simulation run.
type Config struct {
	URL          string        // the server, e.g. http://127.0.0.1:8080; loopback only
	Study        string        // study id
	Respondents  int           // how many synthetic respondents in all
	Concurrency  int           // how many at once
	ThinkTime    time.Duration // pause before each reply, as a person reading and typing
	Personas     []Persona     // who they are; checked with Check
	SyntheticKey string        // secret: the server's TRIALOGUE_SYNTHETIC_KEY; empty marks nothing
	MaxTime      time.Duration // the run stops by itself after this (default DefaultMaxTime)
	Seed         uint64        // persona and covariate draws
	RIDPrefix    string        // respondent ids are RIDPrefix + a number (default sim-<time>-)

	// Player, when set, is a model that plays each persona (the persona's
	// covariates and description are its system prompt); otherwise each
	// persona's replies are sent in order.
	Player       responder.Responder
	PlayerParams responder.Params

	// HTTPClient is used as given if set; by default a client with enough
	// idle connections for Concurrency.
	HTTPClient *http.Client
}

// Steps of a respondent's way, in order, as they appear in the report.
var Steps = []string{"entry", "page", "state", "opening", "reply", "finish", "return"}

// CheckLoopback refuses any server address that is not on this machine:
// load is generated on loopback only.
func CheckLoopback(raw string) (*url.URL, error) {
	u, err := url.Parse(raw)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return nil, fmt.Errorf("--url %q is not an http(s) address", raw)
	}
	host := u.Hostname()
	if host == "localhost" {
		return u, nil
	}
	ip := net.ParseIP(host)
	if ip == nil || !ip.IsLoopback() {
		return nil, fmt.Errorf("--url %q is not a loopback address: simulate generates load on this machine only (127.0.0.1, ::1 or localhost)", raw)
	}
	return u, nil
}

func (c *Config) check() error {
	var errs []error
	if _, err := CheckLoopback(c.URL); err != nil {
		errs = append(errs, err)
	}
	if c.Study == "" {
		errs = append(errs, errors.New("no study id given"))
	}
	if c.Respondents < 1 || c.Respondents > MaxRespondents {
		errs = append(errs, fmt.Errorf("respondents must be between 1 and %d, not %d", MaxRespondents, c.Respondents))
	}
	if c.Concurrency < 1 || c.Concurrency > MaxConcurrency {
		errs = append(errs, fmt.Errorf("concurrency must be between 1 and %d, not %d", MaxConcurrency, c.Concurrency))
	}
	if c.ThinkTime < 0 || c.MaxTime < 0 {
		errs = append(errs, errors.New("think time and maximum time must not be negative"))
	}
	if err := Check(c.Personas, c.Player == nil); err != nil {
		errs = append(errs, err)
	}
	return errors.Join(errs...)
}

// Run drives cfg.Respondents synthetic respondents, cfg.Concurrency at a
// time, and reports what each step took. It returns an error only for a
// configuration it cannot run; failures of the server are in the report.
func Run(ctx context.Context, cfg Config) (*Report, error) {
	if cfg.MaxTime == 0 {
		cfg.MaxTime = DefaultMaxTime
	}
	if err := cfg.check(); err != nil {
		return nil, fmt.Errorf("simulate: %w", err)
	}
	if cfg.RIDPrefix == "" {
		cfg.RIDPrefix = "sim-" + strconv.FormatInt(time.Now().Unix(), 36) + "-"
	}
	base := strings.TrimRight(cfg.URL, "/")
	hc := cfg.HTTPClient
	if hc == nil {
		tr := http.DefaultTransport.(*http.Transport).Clone()
		tr.MaxIdleConns = cfg.Concurrency + 16
		tr.MaxIdleConnsPerHost = cfg.Concurrency + 16
		tr.IdleConnTimeout = 30 * time.Second
		hc = &http.Client{Transport: tr}
		defer tr.CloseIdleConnections()
	}
	// Redirects are steps of their own, never followed silently.
	noFollow := *hc
	noFollow.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }

	ctx, cancel := context.WithTimeout(ctx, cfg.MaxTime)
	defer cancel()
	rec := newRecorder()
	start := time.Now()
	next := make(chan int)
	var wg sync.WaitGroup
	for range min(cfg.Concurrency, cfg.Respondents) {
		wg.Go(func() {
			for i := range next {
				r := &respondent{cfg: &cfg, base: base, hc: &noFollow, rec: rec, n: i,
					rng: rand.New(rand.NewPCG(cfg.Seed, uint64(i)))}
				r.run(ctx)
			}
		})
	}
feed:
	for i := range cfg.Respondents {
		select {
		case next <- i:
		case <-ctx.Done():
			break feed
		}
	}
	close(next)
	wg.Wait()
	return rec.report(cfg.Respondents, time.Since(start), ctx.Err()), nil
}

// respondent is one synthetic respondent's run.
type respondent struct {
	cfg     *Config
	base    string
	hc      *http.Client
	rec     *recorder
	n       int
	rng     *rand.Rand
	persona Persona
	covs    map[string]string
	names   []string // covariate names in a fixed order
	history []responder.Message
}

// stateJSON is what the server's state answer holds that a respondent uses.
type stateJSON struct {
	Kind        string `json:"kind"`
	Messages    []struct{ Role, Text string }
	RepliesUsed int  `json:"replies_used"`
	RepliesMax  int  `json:"replies_max"`
	CanReply    bool `json:"can_reply"`
	CanFinish   bool `json:"can_finish"`
	Finished    bool `json:"finished"`
	Owed        bool `json:"owed"`
	WaitSeconds int  `json:"wait_seconds"`
}

func (r *respondent) run(ctx context.Context) {
	if ctx.Err() != nil {
		return
	}
	weights := make([]float64, len(r.cfg.Personas))
	for i, p := range r.cfg.Personas {
		weights[i] = p.Weight
		if p.Weight == 0 && allZero(r.cfg.Personas) {
			weights[i] = 1
		}
	}
	r.persona = r.cfg.Personas[pick(r.rng, weights)]
	r.covs = map[string]string{}
	for name := range r.persona.Covariates {
		r.names = append(r.names, name)
	}
	slices.Sort(r.names)
	for _, name := range r.names {
		r.covs[name] = r.persona.Covariates[name].draw(r.rng)
	}
	token, ok := r.enter(ctx)
	if !ok {
		return
	}
	c := r.base + "/c/" + token
	if _, ok := r.get(ctx, "page", c, nil); !ok {
		return
	}
	var st stateJSON
	if _, ok := r.get(ctx, "state", c+"/state", &st); !ok {
		return
	}
	if st.Owed {
		if st, ok = r.stream(ctx, "opening", c+"/resume", nil); !ok {
			return
		}
	}
	for i := 0; st.CanReply && !st.Finished; i++ {
		text, err := r.nextReply(ctx, st, i)
		if err != nil {
			r.rec.fail("reply", "persona_model")
			return
		}
		if !r.sleep(ctx, r.cfg.ThinkTime) {
			return
		}
		body, _ := json.Marshal(map[string]string{"text": text, "client_id": fmt.Sprintf("s%d", i)})
		if st, ok = r.stream(ctx, "reply", c+"/reply", body); !ok {
			return
		}
		r.history = append(r.history, responder.Message{Role: responder.RoleAssistant, Text: text})
	}
	if st.WaitSeconds > 0 && !r.sleep(ctx, time.Duration(st.WaitSeconds)*time.Second+100*time.Millisecond) {
		return
	}
	var fin struct {
		ReturnURL string `json:"return_url"`
		ArmCode   string `json:"arm_code"`
	}
	if ok := r.post(ctx, "finish", c+"/finish", &fin); !ok {
		return
	}
	r.rec.finished(fin.ArmCode)
	// Follow the return address when it leads back to this machine (the
	// demo's stand-in survey); a real survey's address is left alone.
	if u, err := CheckLoopback(fin.ReturnURL); err == nil {
		r.get(ctx, "return", u.String(), nil)
	}
}

func allZero(ps []Persona) bool {
	for _, p := range ps {
		if p.Weight > 0 {
			return false
		}
	}
	return true
}

func (r *respondent) sleep(ctx context.Context, d time.Duration) bool {
	if d <= 0 {
		return ctx.Err() == nil
	}
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return true
	case <-ctx.Done():
		return false
	}
}

// nextReply is the persona's reply number i: from its script, or written
// by the model playing it, which sees the conversation from its side.
func (r *respondent) nextReply(ctx context.Context, st stateJSON, i int) (string, error) {
	if r.cfg.Player == nil {
		return r.persona.Replies[i%len(r.persona.Replies)], nil
	}
	var msgs []responder.Message
	for _, m := range st.Messages {
		role := responder.RoleUser // what the study's model said is the persona's input
		if m.Role == "respondent" {
			role = responder.RoleAssistant
		}
		msgs = append(msgs, responder.Message{Role: role, Text: m.Text})
	}
	if len(msgs) == 0 || msgs[len(msgs)-1].Role != responder.RoleUser {
		msgs = append(msgs, responder.Message{Role: responder.RoleUser, Text: "(The chat has just opened. Write your first message.)"})
	}
	res, err := r.cfg.Player.Respond(ctx, responder.Request{Arm: r.persona.Name, System: describe(r.persona, r.covs, r.names),
		Messages: msgs, Params: r.cfg.PlayerParams}, nil)
	if err != nil {
		return "", err
	}
	text := strings.TrimSpace(res.Text)
	if text == "" {
		return "", errors.New("the persona model wrote nothing")
	}
	return text, nil
}

func (r *respondent) enter(ctx context.Context) (string, bool) {
	q := url.Values{}
	q.Set("rid", r.cfg.RIDPrefix+strconv.Itoa(r.n))
	for k, v := range r.covs {
		q.Set(k, v)
	}
	req, err := http.NewRequestWithContext(ctx, "GET", r.base+"/s/"+url.PathEscape(r.cfg.Study)+"?"+q.Encode(), nil)
	if err != nil {
		r.rec.fail("entry", "request")
		return "", false
	}
	if r.cfg.SyntheticKey != "" {
		req.Header.Set(SyntheticHeader, r.cfg.SyntheticKey)
	}
	start := time.Now()
	res, err := r.hc.Do(req)
	if err != nil {
		r.rec.fail("entry", transportKind(ctx, err))
		return "", false
	}
	io.Copy(io.Discard, res.Body)
	res.Body.Close()
	if res.StatusCode != http.StatusSeeOther {
		r.rec.fail("entry", strconv.Itoa(res.StatusCode))
		return "", false
	}
	token, ok := strings.CutPrefix(res.Header.Get("Location"), "/c/")
	if !ok || token == "" {
		r.rec.fail("entry", "no_location")
		return "", false
	}
	r.rec.took("entry", time.Since(start))
	return token, true
}

// get fetches a page or JSON answer (into v if not nil).
func (r *respondent) get(ctx context.Context, step, u string, v any) (int, bool) {
	return r.do(ctx, step, "GET", u, nil, v)
}

func (r *respondent) post(ctx context.Context, step, u string, v any) bool {
	_, ok := r.do(ctx, step, "POST", u, nil, v)
	return ok
}

func (r *respondent) do(ctx context.Context, step, method, u string, body []byte, v any) (int, bool) {
	req, err := http.NewRequestWithContext(ctx, method, u, strings.NewReader(string(body)))
	if err != nil {
		r.rec.fail(step, "request")
		return 0, false
	}
	if v != nil {
		req.Header.Set("Accept", "application/json")
	}
	start := time.Now()
	res, err := r.hc.Do(req)
	if err != nil {
		r.rec.fail(step, transportKind(ctx, err))
		return 0, false
	}
	defer res.Body.Close()
	b, err := io.ReadAll(res.Body)
	if err != nil {
		r.rec.fail(step, transportKind(ctx, err))
		return 0, false
	}
	if res.StatusCode != http.StatusOK {
		r.rec.fail(step, strconv.Itoa(res.StatusCode))
		return res.StatusCode, false
	}
	if v != nil {
		if err := json.Unmarshal(b, v); err != nil {
			r.rec.fail(step, "bad_json")
			return res.StatusCode, false
		}
	}
	r.rec.took(step, time.Since(start))
	return res.StatusCode, true
}

// stream posts a reply or a retry asking for Server-Sent Events (the WHATWG
// HTML "server-sent events" format), reads events until done or error, and
// records the turn's latency and the server's own overhead: the latency
// less the model time the server reports in the done event (model_ms).
func (r *respondent) stream(ctx context.Context, step, u string, body []byte) (stateJSON, bool) {
	req, err := http.NewRequestWithContext(ctx, "POST", u, strings.NewReader(string(body)))
	if err != nil {
		r.rec.fail(step, "request")
		return stateJSON{}, false
	}
	req.Header.Set("Accept", "text/event-stream")
	req.Header.Set("Content-Type", "application/json")
	start := time.Now()
	res, err := r.hc.Do(req)
	if err != nil {
		r.rec.fail(step, transportKind(ctx, err))
		return stateJSON{}, false
	}
	defer res.Body.Close()
	if res.StatusCode != http.StatusOK {
		io.Copy(io.Discard, res.Body)
		r.rec.fail(step, strconv.Itoa(res.StatusCode))
		return stateJSON{}, false
	}
	sc := bufio.NewScanner(res.Body)
	sc.Buffer(make([]byte, 64<<10), 1<<20)
	var event, data string
	for sc.Scan() {
		line := sc.Text()
		switch {
		case strings.HasPrefix(line, "event:"):
			event = strings.TrimSpace(strings.TrimPrefix(line, "event:"))
		case strings.HasPrefix(line, "data:"):
			data += strings.TrimPrefix(strings.TrimPrefix(line, "data:"), " ")
		case line == "":
			switch event {
			case "done":
				took := time.Since(start)
				var d struct {
					State    stateJSON `json:"state"`
					ModelMS  int64     `json:"model_ms"`
					ServerMS float64   `json:"server_ms"`
				}
				if err := json.Unmarshal([]byte(data), &d); err != nil {
					r.rec.fail(step, "bad_event")
					return stateJSON{}, false
				}
				r.rec.turn(step, took, time.Duration(d.ModelMS)*time.Millisecond, d.ServerMS)
				return d.State, true
			case "error":
				var e struct{ Rule string }
				json.Unmarshal([]byte(data), &e)
				r.rec.fail(step, "event_"+cmp(e.Rule, "error"))
				return stateJSON{}, false
			}
			event, data = "", ""
		}
	}
	r.rec.fail(step, "stream_ended")
	return stateJSON{}, false
}

func cmp(a, b string) string {
	if a != "" {
		return a
	}
	return b
}

// transportKind names a failure to reach the server.
func transportKind(ctx context.Context, err error) string {
	var ne net.Error
	switch {
	case ctx.Err() != nil:
		return "stopped"
	case errors.As(err, &ne) && ne.Timeout():
		return "timeout"
	case strings.Contains(err.Error(), "connection refused"):
		return "refused"
	case strings.Contains(err.Error(), "reset"), errors.Is(err, io.EOF), errors.Is(err, io.ErrUnexpectedEOF):
		return "reset"
	}
	return "transport"
}
