package server

import (
	"encoding/json"
	"html/template"
	"math"
	"net/http"
	"strconv"
	"strings"
	"time"

	"github.com/go-chi/chi/v5"

	"trialogue/arms"
	"trialogue/store"
)

// State is what the respondent page knows of its session. It names no arm
// and shows no prompt.
type State struct {
	Kind        string         `json:"kind"`
	Messages    []StateMessage `json:"messages"`
	RepliesUsed int            `json:"replies_used"`
	RepliesMin  int            `json:"replies_min"`
	RepliesMax  int            `json:"replies_max"`
	CanReply    bool           `json:"can_reply"`
	CanFinish   bool           `json:"can_finish"`
	Finished    bool           `json:"finished"`
	Owed        bool           `json:"owed"`                   // a model turn is due
	Failed      bool           `json:"failed"`                 // the last attempt at it failed: offer Retry
	WaitSeconds int            `json:"wait_seconds,omitempty"` // reading time left before Continue
	MinWords    int            `json:"min_words,omitempty"`    // chat: the fewest words a reply may have
	MaxChars    int            `json:"max_chars,omitempty"`    // chat: the most characters a reply may have
}

// StateMessage is one turn as the respondent sees it.
type StateMessage struct {
	Role string `json:"role"` // "assistant" or "respondent"
	Text string `json:"text"`
}

// state computes a session's state from its turns.
func (s *Server) state(req *request, turns []store.Turn, failedAt time.Time) State {
	arm := req.study.Def.Arms[req.sess.Arm]
	p := store.Progress(arm, turns, req.sess.Finished())
	st := State{Kind: arm.Kind, Messages: []StateMessage{}, RepliesUsed: p.Replies, Finished: p.Finished, Owed: p.Owed}
	for _, t := range turns {
		st.Messages = append(st.Messages, StateMessage{Role: t.Role, Text: t.Text})
	}
	if arm.Kind == arms.KindChat {
		lim := arm.RepliesOf()
		st.RepliesMin, st.RepliesMax = lim.Min, lim.Max
		st.CanReply = !p.Finished && !p.Owed && p.Replies < lim.Max
		st.MinWords, st.MaxChars = lim.MinWords, lim.MaxChars
		if st.MaxChars == 0 {
			st.MaxChars = arms.DefaultMaxChars
		}
	}
	elapsed := s.Now().Sub(req.sess.CreatedAt).Seconds()
	st.CanFinish = !p.Finished && arm.CheckFinish(p, elapsed) == nil
	if arm.Kind != arms.KindChat && !p.Finished {
		if left := float64(arm.MinSeconds) - elapsed; left > 0 {
			st.WaitSeconds = int(math.Ceil(left))
		}
	}
	if p.Owed && !failedAt.IsZero() {
		last := req.sess.CreatedAt
		if n := len(turns); n > 0 {
			last = turns[n-1].CreatedAt
		}
		st.Failed = !failedAt.Before(last)
	}
	return st
}

func (s *Server) loadState(r *http.Request, req *request) (State, []store.Turn, error) {
	turns, err := s.store.Turns(r.Context(), req.sess.ID)
	if err != nil {
		return State{}, nil, err
	}
	failedAt, err := s.store.LastFailure(r.Context(), req.sess.ID)
	if err != nil {
		return State{}, nil, err
	}
	return s.state(req, turns, failedAt), turns, nil
}

// respondentPage is the data of the respondent page.
type respondentPage struct {
	pageBase
	Title           string
	Token           string
	Kind            string
	Chat            bool
	ShowDisclosure  bool
	ParentOrigin    string
	FixedText       string
	FixedParagraphs []string
	Messages        []StateMessage
	MaxChars        int
	Counter         string // the reply counter as the script would write it, so nothing moves when it starts
	CounterWarn     string // the warning before the last reply
	TextsJSON       template.JS
}

// handlePage shows the respondent page.
//
// GET /c/{token}
func (s *Server) handlePage(w http.ResponseWriter, r *http.Request) {
	req := fromContext(r.Context())
	def := req.study.Def
	arm := def.Arms[req.sess.Arm]
	st, _, err := s.loadState(r, req)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	lang := sessionLanguage(req)
	texts := s.assets.Texts(lang, def.TextOverrides(lang))
	title := def.Title
	if texts["title"] != "" {
		title = texts["title"]
	}
	counter, warn := counterText(st, texts)
	tj, err := json.Marshal(texts)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	page := respondentPage{
		pageBase:       pageBase{Lang: lang, Dir: direction(lang), PageTitle: title, T: texts},
		Title:          title,
		Token:          req.sess.Token,
		Kind:           arm.Kind,
		Chat:           arm.Kind == arms.KindChat,
		ShowDisclosure: arm.NeedsModel(),
		ParentOrigin:   def.ParentOrigin,
		FixedText:      arm.Text,
		Messages:       st.Messages,
		MaxChars:       st.MaxChars,
		Counter:        counter,
		CounterWarn:    warn,
		// JSON inside a script element of type application/json: escape "<" so
		// that no text can close the element.
		TextsJSON: template.JS(strings.ReplaceAll(string(tj), "<", `\u003c`)),
	}
	if page.MaxChars == 0 {
		page.MaxChars = arms.DefaultMaxChars
	}
	for _, para := range strings.Split(strings.TrimSpace(arm.Text), "\n\n") {
		if para = strings.TrimSpace(para); para != "" {
			page.FixedParagraphs = append(page.FixedParagraphs, para)
		}
	}
	var b strings.Builder
	if err := s.assets.Render(&b, "respondent", page); err != nil {
		s.fail(w, r, err)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.Write([]byte(b.String()))
}

// sessionLanguage is the language of a session's page: the one its entry
// link chose, or else the study's.
func sessionLanguage(req *request) string {
	if req.sess.Language != "" {
		return req.sess.Language
	}
	return req.study.Def.Language
}

// respondentTexts is the catalogue for a respondent's request, in their
// language when it is known: the session's, or on an entry link the one
// lang= asks for, or the study's.
func (s *Server) respondentTexts(r *http.Request) (lang string, texts map[string]string) {
	if req, ok := r.Context().Value(sessionKey).(*request); ok && req != nil {
		lang = sessionLanguage(req)
		return lang, s.assets.Texts(lang, req.study.Def.TextOverrides(lang))
	}
	if rc := chi.RouteContext(r.Context()); rc != nil {
		if st, ok := s.study(rc.URLParam("study")); ok {
			lang = st.Def.Language
			if l, err := st.Def.EntryLanguage(r.URL.Query()["lang"]); err == nil && l != "" {
				lang = l
			}
			return lang, s.assets.Texts(lang, st.Def.TextOverrides(lang))
		}
	}
	return "en", s.assets.Texts("en", nil)
}

// counterText is the reply counter of a chat and its warning before the
// last reply, as chat.js writes them.
func counterText(st State, texts map[string]string) (counter, warn string) {
	if st.Kind != arms.KindChat {
		return "", ""
	}
	if st.RepliesUsed >= st.RepliesMax {
		return texts["max_reached"], ""
	}
	key := "counter"
	if st.RepliesUsed >= st.RepliesMin {
		key = "counter_done"
	}
	counter = strings.NewReplacer("{used}", strconv.Itoa(st.RepliesUsed), "{min}", strconv.Itoa(st.RepliesMin),
		"{max}", strconv.Itoa(st.RepliesMax)).Replace(texts[key])
	if st.RepliesMax-st.RepliesUsed == 1 && !st.Finished {
		warn = texts["last_reply"]
	}
	return counter, warn
}

// direction is the writing direction of a language.
func direction(lang string) string {
	base, _, _ := strings.Cut(lang, "-")
	switch base {
	case "ar", "he", "fa", "ur", "ps", "yi", "dv", "ckb":
		return "rtl"
	}
	return "ltr"
}

// handleState answers with the session's state.
//
// GET /c/{token}/state
func (s *Server) handleState(w http.ResponseWriter, r *http.Request) {
	req := fromContext(r.Context())
	st, _, err := s.loadState(r, req)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	writeJSON(w, http.StatusOK, st)
}

// finishAnswer is what Continue gets back.
type finishAnswer struct {
	ReturnURL string `json:"return_url"`
	RID       string `json:"rid"`
	Code      string `json:"code"`
	ArmCode   string `json:"arm_code"`
}

// handleFinish ends the session and gives the address back to the survey.
//
// POST /c/{token}/finish
func (s *Server) handleFinish(w http.ResponseWriter, r *http.Request) {
	req := fromContext(r.Context())
	unlock := s.locks.lock(req.sess.ID)
	defer unlock()
	def := req.study.Def
	if !req.sess.Finished() {
		turns, err := s.store.Turns(r.Context(), req.sess.ID)
		if err != nil {
			s.fail(w, r, err)
			return
		}
		arm := def.Arms[req.sess.Arm]
		p := store.Progress(arm, turns, false)
		if err := arm.CheckFinish(p, s.Now().Sub(req.sess.CreatedAt).Seconds()); err != nil {
			s.fail(w, r, err)
			return
		}
		if _, err := s.store.Finish(r.Context(), req.sess.ID); err != nil {
			s.fail(w, r, err)
			return
		}
	}
	code := completionCode(req.study, req.sess.RID)
	u, err := def.ReturnURL(req.sess.RID, code, req.sess.ArmCode)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	writeJSON(w, http.StatusOK, finishAnswer{ReturnURL: u, RID: req.sess.RID, Code: code, ArmCode: req.sess.ArmCode})
}
