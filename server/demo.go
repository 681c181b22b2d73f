package server

import (
	"math/rand/v2"
	"net"
	"net/http"
	"net/url"
	"sort"
	"strconv"
	"strings"

	"trialogue/arms"
	"trialogue/arms/codes"
)

// DemoSites are the two sites of the demo: the stand-in survey page and the
// respondent pages are served from different host names of this server
// (127.0.0.1 and localhost), so the iframe is cross-site as in a real survey.
func DemoSites(addr net.Addr) (host, frame string) {
	port := "80"
	if ta, ok := addr.(*net.TCPAddr); ok {
		port = strconv.Itoa(ta.Port)
	}
	return "http://127.0.0.1:" + port, "http://localhost:" + port
}

// hostPage is the data of the stand-in survey page.
type hostPage struct {
	pageBase
	RID         string
	Covariates  map[string]string
	FrameURL    string
	FrameOrigin string
	Next        string
}

// handleDemoHost is a stand-in survey page that embeds a respondent page.
//
// GET /demo/host[?study=ID]
func (s *Server) handleDemoHost(w http.ResponseWriter, r *http.Request) {
	st, ok := s.demoStudy(r.URL.Query().Get("study"))
	if !ok {
		s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "no study to demonstrate"})
		return
	}
	frame := otherSite(r.Host)
	ex := demoRespondent(st.Def)
	q := url.Values{"rid": {ex.RID}}
	for k, v := range ex.Covariates {
		q.Set(k, v)
	}
	page := hostPage{
		pageBase:    pageBase{Lang: "en", Dir: "ltr", PageTitle: "Stand-in survey", T: s.assets.Texts("en", nil)},
		RID:         ex.RID,
		Covariates:  ex.Covariates,
		FrameURL:    frame + "/s/" + url.PathEscape(st.Def.ID) + "?" + q.Encode(),
		FrameOrigin: frame,
		Next:        r.URL.RequestURI(),
	}
	w.Header().Set("Content-Security-Policy", csp("'none'")+"; frame-src "+frame)
	s.renderPage(w, r, "host", page)
}

// donePage is the data of the page that plays the survey's return address.
type donePage struct {
	pageBase
	RID, Code, Arm string
	Valid          bool
	Again          string
}

// handleDemoDone plays the survey page that respondents return to, and
// checks the completion code they bring.
//
// GET /demo/done?rid=RID&code=CODE&arm=ARM_CODE
func (s *Server) handleDemoDone(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	st, ok := s.demoStudy(q.Get("study"))
	if !ok {
		s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "no study to demonstrate"})
		return
	}
	page := donePage{
		pageBase: pageBase{Lang: "en", Dir: "ltr", PageTitle: "Back at the survey", T: s.assets.Texts("en", nil)},
		RID:      q.Get("rid"), Code: q.Get("code"), Arm: q.Get("arm"),
		Valid: codes.VerifyCompletion(st.Version.Secret, st.Def.ID, q.Get("rid"), q.Get("code")),
		Again: "/demo/host",
	}
	s.renderPage(w, r, "done", page)
}

func (s *Server) renderPage(w http.ResponseWriter, r *http.Request, name string, data any) {
	var b strings.Builder
	if err := s.assets.Render(&b, name, data); err != nil {
		s.fail(w, r, err)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.Write([]byte(b.String()))
}

// demoStudy returns the named study, or the only one served.
func (s *Server) demoStudy(id string) (*Study, bool) {
	if id != "" {
		return s.study(id)
	}
	s.mu.RLock()
	defer s.mu.RUnlock()
	ids := make([]string, 0, len(s.studies))
	for k := range s.studies {
		ids = append(ids, k)
	}
	if len(ids) == 0 {
		return nil, false
	}
	sort.Strings(ids)
	return s.studies[ids[0]], true
}

// otherSite swaps 127.0.0.1 and localhost in a host:port.
func otherSite(hostport string) string {
	host, port, err := net.SplitHostPort(hostport)
	if err != nil {
		host, port = hostport, ""
	}
	if host == "localhost" {
		host = "127.0.0.1"
	} else {
		host = "localhost"
	}
	if port != "" {
		return "http://" + net.JoinHostPort(host, port)
	}
	return "http://" + host
}

// demoRespondent makes up a respondent with random valid covariates.
func demoRespondent(def *arms.Study) arms.Respondent {
	r := arms.Respondent{RID: "demo-" + strconv.FormatUint(rand.Uint64()%1e9, 36), Covariates: map[string]string{}}
	for _, c := range def.Covariates {
		switch c.Type {
		case arms.TypeChoice:
			r.Covariates[c.Name] = c.Values[rand.IntN(len(c.Values))]
		case arms.TypeInteger:
			lo, hi := 18, 80
			if c.Min != nil {
				lo = *c.Min
			}
			if c.Max != nil && *c.Max < hi {
				hi = *c.Max
			}
			if hi < lo {
				hi = lo
			}
			r.Covariates[c.Name] = strconv.Itoa(lo + rand.IntN(hi-lo+1))
		}
	}
	return r
}
