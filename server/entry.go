package server

import (
	"errors"
	"log/slog"
	"net/http"

	"github.com/go-chi/chi/v5"

	"trialogue/arms"
	"trialogue/store"
)

// handleEntry takes a respondent from the survey into a session.
//
// GET /s/{study}?rid=RID&COVARIATE=VALUE...
func (s *Server) handleEntry(w http.ResponseWriter, r *http.Request) {
	st, ok := s.study(chi.URLParam(r, "study"))
	if !ok {
		s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "unknown study"})
		return
	}
	w.Header().Set("Content-Security-Policy", csp(frameAncestors(st.Def)))
	synthetic, err := s.syntheticMark(r)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	resp, err := st.Def.ParseEntry(r.URL.Query())
	if err != nil {
		var fe *arms.FieldError
		if errors.As(err, &fe) {
			s.fail(w, r, &Error{Status: http.StatusBadRequest, Key: "bad_entry", Field: fe.Field, Msg: fe.Msg})
			return
		}
		s.fail(w, r, err)
		return
	}
	stratum := st.Def.StratumKey(resp)
	enter := s.store.Enter
	if synthetic { // marked in the transaction that creates the session
		enter = s.store.EnterSynthetic
	}
	sess, created, err := enter(r.Context(), st.Version, stratum, resp, func(stratum string, slot int) (string, string) {
		arm := st.Plan.Slot(stratum, slot).Arm
		return arm, st.Def.Arms[arm].Code
	})
	if errors.Is(err, store.ErrStudyClosed) {
		s.fail(w, r, &Error{Status: http.StatusGone, Key: "study_closed", Msg: "This study is closed and takes no new participants. Thank you for your interest."})
		return
	}
	if errors.Is(err, store.ErrPilotFull) {
		s.fail(w, r, &Error{Status: http.StatusServiceUnavailable, Key: "study_closed", Msg: "The pilot of this study has all the participants it needs. Thank you for your interest."})
		return
	}
	if err != nil {
		s.fail(w, r, err)
		return
	}
	if created {
		s.assignedMetric(st.Def.ID, sess.Arm, synthetic)
		s.log.Info("session entered", slog.String("study", st.Def.ID), slog.Int64("session", sess.ID))
	}
	w.Header().Set("Cache-Control", "no-store")
	http.Redirect(w, r, "/c/"+sess.Token, http.StatusSeeOther)
}
