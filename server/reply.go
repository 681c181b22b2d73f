package server

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"regexp"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/arms/flags"
	"trialogue/arms/responder"
	"trialogue/store"
)

// replyBody is what the page sends with a reply.
type replyBody struct {
	Text     string `json:"text"`
	ClientID string `json:"client_id"`
	// Typing is how the reply was typed, as the page measured it; optional.
	Typing *flags.Typing `json:"typing,omitempty"`
}

var clientIDPattern = regexp.MustCompile(`^[A-Za-z0-9_-]{1,64}$`)

// replyAnswer is the JSON answer to a reply, and the data of the final event.
type replyAnswer struct {
	Reply   string `json:"reply"`
	State   State  `json:"state"`
	ModelMS int64  `json:"model_ms"` // time the model endpoint took for this turn
	// ServerMS is the server's own time for the turn, on its clock: from the
	// request reaching the session to the answer, less the model's time.
	ServerMS float64 `json:"server_ms"`
}

// handleReply commits a respondent's reply, then has the model answer it.
//
// POST /c/{token}/reply  {"text", "client_id", "typing"}
func (s *Server) handleReply(w http.ResponseWriter, r *http.Request) {
	req := fromContext(r.Context())
	var body replyBody
	if err := s.readJSON(w, r, &body); err != nil {
		s.fail(w, r, err)
		return
	}
	if body.ClientID != "" && !clientIDPattern.MatchString(body.ClientID) {
		s.fail(w, r, &Error{Status: http.StatusBadRequest, Key: "server_error", Field: "client_id", Msg: "client_id must be 1 to 64 letters, digits, - or _"})
		return
	}
	if body.Typing != nil {
		var fe *flags.FieldError
		if err := body.Typing.Check(); errors.As(err, &fe) {
			s.fail(w, r, &Error{Status: http.StatusBadRequest, Key: "server_error", Field: fe.Field, Msg: fe.Error()})
			return
		}
	}
	unlock := s.locks.lock(req.sess.ID)
	defer unlock()
	arm := req.study.Def.Arms[req.sess.Arm]
	added, err := s.store.AddTypedReply(r.Context(), req.sess, body.Text, body.ClientID, body.Typing, func(done []store.Turn, finished bool) error {
		return arm.CheckReply(store.Progress(arm, done, finished), body.Text)
	})
	if err != nil {
		s.fail(w, r, err)
		return
	}
	turns := added.Turns
	if added.Existed {
		// the same send again: answer with what that send got, or finish it
		if i := added.Turn.Index + 1; i < len(turns) && turns[i].Role == store.RoleAssistant {
			s.answer(w, r, req, turns, turns[i], 0, nil)
			return
		}
	}
	s.respond(w, r, req, turns)
}

// handleResume has the model write the turn the session is owed, if any: a
// message arm's message, a chat's opening, or the answer to a reply whose
// model call failed or was cut short. With nothing owed it answers with the
// state.
//
// POST /c/{token}/resume
func (s *Server) handleResume(w http.ResponseWriter, r *http.Request) {
	req := fromContext(r.Context())
	unlock := s.locks.lock(req.sess.ID)
	defer unlock()
	turns, err := s.store.Turns(r.Context(), req.sess.ID)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	s.respond(w, r, req, turns)
}

// respond writes the owed model turn and answers, streaming when asked.
// The caller holds the session's lock and passes the session's turns.
func (s *Server) respond(w http.ResponseWriter, r *http.Request, req *request, turns []store.Turn) {
	arm := req.study.Def.Arms[req.sess.Arm]
	stream := strings.Contains(r.Header.Get("Accept"), "text/event-stream")
	var ev *eventWriter
	if stream {
		ev = newEventWriter(w)
		defer ev.close()
	}
	if p := store.Progress(arm, turns, req.sess.Finished()); !p.Owed || p.Finished {
		st := s.state(req, turns, time.Time{})
		if ev != nil {
			ev.event("done", replyAnswer{State: st})
			return
		}
		writeJSON(w, http.StatusOK, replyAnswer{State: st})
		return
	}
	if ev != nil {
		ev.event("saved", map[string]int{"turns": len(turns)})
	}
	// The model turn is finished and stored even if the respondent leaves
	// mid-stream, so that a reload shows it.
	ctx := context.WithoutCancel(r.Context())
	var sink responder.Sink = responder.Discard
	if ev != nil {
		sink = ev
	}
	t, res, err := s.generate(ctx, req, turns, sink)
	if err != nil {
		var me *responder.Error
		kind, status, attempts := "internal", 0, 0
		if errors.As(err, &me) {
			kind, status, attempts = me.Kind, me.Status, me.Attempts
		}
		s.log.Warn("model turn failed", slog.String("study", req.sess.StudyID), slog.Int64("session", req.sess.ID),
			slog.String("kind", kind), slog.Int("attempts", attempts), slog.Any("err", err))
		if rerr := s.store.RecordFailure(ctx, req.sess.ID, kind, status, attempts); rerr != nil {
			s.fail(w, r, rerr)
			return
		}
		failedAt, _ := s.store.LastFailure(ctx, req.sess.ID)
		st := s.state(req, turns, failedAt)
		answer := map[string]any{"error": "the model could not answer just now; the reply is saved, try again", "rule": "model_failed", "state": st}
		if ev != nil {
			ev.event("error", answer)
			return
		}
		w.Header().Set("Retry-After", "5")
		writeJSON(w, http.StatusServiceUnavailable, answer)
		return
	}
	s.answer(w, r, req, append(turns, t), t, res.ModelTime, ev)
}

// answer sends a stored model turn with the session's state after it.
func (s *Server) answer(w http.ResponseWriter, r *http.Request, req *request, turns []store.Turn, t store.Turn, modelTime time.Duration, ev *eventWriter) {
	st := s.state(req, turns, time.Time{})
	overhead := max(0, time.Since(req.start)-modelTime)
	a := replyAnswer{Reply: t.Text, State: st, ModelMS: modelTime.Milliseconds(), ServerMS: float64(overhead.Microseconds()) / 1000}
	if modelTime > 0 {
		s.metrics.overhead.Observe(overhead.Seconds())
	}
	if ev != nil {
		ev.event("done", a)
		return
	}
	if strings.Contains(r.Header.Get("Accept"), "text/event-stream") {
		ev = newEventWriter(w)
		defer ev.close()
		ev.Chunk(t.Text)
		ev.event("done", a) // one write with the chunk
		return
	}
	w.Header().Set("Server-Timing", "model;dur="+strconv.FormatInt(modelTime.Milliseconds(), 10))
	writeJSON(w, http.StatusOK, a)
}

// generate asks the arm's endpoint for the owed turn and commits it.
func (s *Server) generate(ctx context.Context, req *request, turns []store.Turn, sink responder.Sink) (store.Turn, responder.Result, error) {
	def := req.study.Def
	arm := def.Arms[req.sess.Arm]
	rendered, err := def.Render(req.sess.Arm, req.sess.Respondent())
	if err != nil {
		return store.Turn{}, responder.Result{}, err
	}
	e := def.Endpoints[arm.Endpoint]
	rsp, ok := req.study.Responders[arm.Endpoint]
	if !ok {
		return store.Turn{}, responder.Result{}, fmt.Errorf("no responder for endpoint %q", arm.Endpoint)
	}
	mreq := responder.Request{Arm: req.sess.Arm, System: rendered.System, Messages: conversation(arm, rendered, turns),
		Params: responder.Params{Model: e.Model, Temperature: e.Temperature, TopP: e.TopP, MaxTokens: e.MaxTokens, Seed: e.Seed}}
	params, err := json.Marshal(map[string]any{"model": e.Model, "temperature": e.Temperature, "top_p": e.TopP, "max_tokens": e.MaxTokens, "seed": e.Seed, "endpoint": arm.Endpoint})
	if err != nil {
		return store.Turn{}, responder.Result{}, err
	}
	// a whole turn may take every attempt's timeout plus backoff, and no more
	ctx, cancel := context.WithTimeout(ctx, time.Duration(e.Timeout)*time.Duration(e.Attempts)+time.Minute)
	defer cancel()
	started := s.Now()
	res, err := rsp.Respond(ctx, mreq, sink)
	if err != nil {
		return store.Turn{}, res, err
	}
	t := store.Turn{SessionID: req.sess.ID, Index: len(turns), Text: res.Text, StartedAt: started,
		LatencyMS: s.Now().Sub(started).Milliseconds(), ModelRequested: res.ModelRequested, ModelReported: res.ModelReported,
		Fingerprint: res.Fingerprint, Params: string(params), PromptTokens: res.PromptTokens, CompletionTokens: res.CompletionTokens,
		Retries: res.Retries, FinishReason: res.FinishReason, SystemSHA256: codes.SHA256Hex([]byte(rendered.System)),
		RequestSHA256: res.RequestSHA256, StudyHash: req.sess.StudyHash}
	t, err = s.store.AddModelTurn(ctx, t)
	return t, res, err
}

// conversation is the session's own turns as the model sees them: nothing
// from any other session ever enters a request.
func conversation(arm *arms.Arm, rendered arms.Rendered, turns []store.Turn) []responder.Message {
	var msgs []responder.Message
	if arm.Kind == arms.KindMessage || (arm.Kind == arms.KindChat && arm.Opening) {
		msgs = append(msgs, responder.Message{Role: responder.RoleUser, Text: rendered.Prompt})
	}
	for _, t := range turns {
		role := responder.RoleUser
		if t.Role == store.RoleAssistant {
			role = responder.RoleAssistant
		}
		msgs = append(msgs, responder.Message{Role: role, Text: t.Text})
	}
	return msgs
}

// readJSON reads a bounded JSON body: 413 when too large, 400 when it is
// not valid UTF-8 or not the expected object.
func (s *Server) readJSON(w http.ResponseWriter, r *http.Request, v any) error {
	b, err := io.ReadAll(http.MaxBytesReader(w, r.Body, s.cfg.MaxBody))
	if err != nil {
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			return &Error{Status: http.StatusRequestEntityTooLarge, Key: "too_long", Rule: "too_long", Msg: fmt.Sprintf("the request body is over %d bytes", s.cfg.MaxBody)}
		}
		return &Error{Status: http.StatusBadRequest, Key: "network_failed", Msg: "the request body could not be read", Err: err}
	}
	if !utf8.Valid(b) {
		return &Error{Status: http.StatusBadRequest, Key: "server_error", Rule: "invalid_text", Msg: "the request body is not valid UTF-8"}
	}
	dec := json.NewDecoder(strings.NewReader(string(b)))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		var te *json.UnmarshalTypeError
		if errors.As(err, &te) {
			return &Error{Status: http.StatusBadRequest, Key: "server_error", Field: te.Field, Msg: "the request body is not the expected JSON object: " + err.Error()}
		}
		return &Error{Status: http.StatusBadRequest, Key: "server_error", Msg: "the request body is not the expected JSON object: " + err.Error()}
	}
	if dec.More() {
		return &Error{Status: http.StatusBadRequest, Key: "server_error", Msg: "the request body has data after the JSON object"}
	}
	return nil
}

// completionCode is the code a respondent takes back to the survey.
func completionCode(st *Study, rid string) string {
	return codes.Completion(st.Version.Secret, st.Def.ID, rid)
}
