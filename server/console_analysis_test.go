package server_test

import (
	"archive/zip"
	"bytes"
	"context"
	"encoding/csv"
	"encoding/xml"
	"fmt"
	"html"
	"io"
	"math"
	"math/rand/v2"
	"mime/multipart"
	"net/http"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"trialogue/server"
	"trialogue/store"
)

// analysisStudy has three chat arms that talk about the Harrow Bay ferry
// in different words: calm is the control.
const analysisStudy = `id: harrow-effects
title: Harrow Bay ferry timetable
covariates:
  - {name: lean, type: choice, values: [left, right], required: true}
strata: [lean]
allocation: {blocks: [3], arms: {calm: 1, facts: 1, case: 1}}
endpoints:
  bot: {kind: scripted, chunks: 4}
arms:
  calm:
    kind: chat
    endpoint: bot
    prompt: Chat about the weather in Harrow Bay.
    replies: {min: 1, max: 3}
    system: You chat about the weather.
    script: ["The harbour was foggy this morning.", "Rain is due by the evening tide."]
  facts:
    kind: chat
    endpoint: bot
    prompt: Give the timetable of the Harrow Bay ferry.
    replies: {min: 1, max: 3}
    system: You state the ferry timetable.
    script: ["The ferry timetable lists departures at seven and nine.", "Timetable changes are posted at the pier office."]
  case:
    kind: chat
    endpoint: bot
    prompt: Argue for the later ferry.
    replies: {min: 1, max: 3}
    system: You argue for the later ferry.
    script: ["A later ferry would let commuters sleep longer.", "Commuters gain an hour with a later crossing."]
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}"
`

// plantedEffect is added to the outcome of arm case; facts has none.
const plantedEffect = 6.0

// analysisFixture serves analysisStudy with an owner and a viewer, enters
// 120 fictional respondents, stores two model messages for each, and
// returns an outcome file with the planted effect, as a survey platform
// exports it (comma-separated, CRLF, one row per respondent).
func analysisFixture(t *testing.T) (*fixture, []byte) {
	t.Helper()
	ctx := context.Background()
	f, _ := newConfigFixture(t, analysisStudy, server.Config{})
	for _, u := range []struct{ email, role string }{{ownerEmail, store.RoleOwner}, {viewerEmail, store.RoleViewer}} {
		if _, err := f.st.AddUser(ctx, u.email, u.role, consolePW, false); err != nil {
			t.Fatal(err)
		}
	}
	for i := range 120 {
		f.enter(fmt.Sprintf("HB-%03d", i), []string{"left", "right"}[i%2])
	}
	sessions, err := f.st.Sessions(ctx, "harrow-effects")
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(7, 2031))
	var b bytes.Buffer
	b.WriteString("Response ID,attitude_pre,attitude_post,<b>post</b>\r\n")
	for _, s := range sessions {
		script := f.study.Def.Arms[s.Arm].Script
		for k := range 2 {
			if _, err := f.st.AddModelTurn(ctx, store.Turn{SessionID: s.ID, Index: k, Text: script[k], StartedAt: time.Now(), StudyHash: f.study.Version.Hash}); err != nil {
				t.Fatal(err)
			}
		}
		pre := 50 + 10*rng.NormFloat64()
		post := 10 + 0.8*pre + 2*rng.NormFloat64()
		if s.Arm == "case" {
			post += plantedEffect
		}
		cell := strconv.FormatFloat(post, 'f', 2, 64)
		if s.ID%10 == 3 {
			cell = "" // left before the outcome question
		}
		fmt.Fprintf(&b, "%s,%.2f,%s,%s\r\n", s.RID, pre, cell, cell)
	}
	return f, b.Bytes()
}

// goodFields are the form fields of a sound analysis.
func goodFields() map[string][]string {
	return map[string][]string{"id": {"Response ID"}, "outcome": {"attitude_post"}, "pre": {"attitude_pre"},
		"control": {"calm"}, "adjust": {"pre"}, "permutations": {"199"}}
}

// upload posts the analysis form as multipart/form-data (RFC 7578): the
// fields, then the file under the name outcomes, unless file is nil.
func (b *browserish) upload(path string, fields map[string][]string, file []byte, header map[string]string) (*http.Response, string) {
	b.t.Helper()
	var body bytes.Buffer
	mw := multipart.NewWriter(&body)
	for k, vs := range fields {
		for _, v := range vs {
			if err := mw.WriteField(k, v); err != nil {
				b.t.Fatal(err)
			}
		}
	}
	if file != nil {
		fw, err := mw.CreateFormFile("outcomes", `C:\exports\survey-export.csv`)
		if err != nil {
			b.t.Fatal(err)
		}
		fw.Write(file)
	}
	mw.Close()
	req, err := http.NewRequest("POST", b.base+path, &body)
	if err != nil {
		b.t.Fatal(err)
	}
	req.Header.Set("Content-Type", mw.FormDataContentType())
	for k, v := range header {
		req.Header.Set(k, v)
	}
	res, err := b.c.Do(req)
	if err != nil {
		b.t.Fatal(err)
	}
	defer res.Body.Close()
	raw, err := io.ReadAll(res.Body)
	if err != nil {
		b.t.Fatal(err)
	}
	return res, string(raw)
}

// mustSafeSVG fails unless the answer is an SVG image, well-formed XML,
// with no script element and no event-handler attribute.
func mustSafeSVG(t *testing.T, res *http.Response, body string) {
	t.Helper()
	mustStatus(t, res, body, http.StatusOK)
	if ct := res.Header.Get("Content-Type"); ct != "image/svg+xml" {
		t.Errorf("got Content-Type %q, want image/svg+xml", ct)
	}
	if !strings.Contains(body, "<svg") {
		t.Fatalf("the answer is not an SVG: %.200s", body)
	}
	lower := strings.ToLower(body)
	if strings.Contains(lower, "<script") || regexp.MustCompile(`\son[a-z]+\s*=`).MatchString(lower) || strings.Contains(lower, "javascript:") {
		t.Errorf("the SVG holds script")
	}
	dec := xml.NewDecoder(strings.NewReader(body))
	for {
		if _, err := dec.Token(); err == io.EOF {
			break
		} else if err != nil {
			t.Fatalf("the SVG is not well-formed XML: %v", err)
		}
	}
}

// estimateOf reads an arm's estimate from the first effects table of a
// result page: arm, n, mean, estimate.
func estimateOf(t *testing.T, page, arm string) float64 {
	t.Helper()
	m := regexp.MustCompile(`<tr><th scope="row">` + arm + `</th><td>\d+</td><td>[-0-9.]+</td><td>([-0-9.]+)</td>`).FindStringSubmatch(page)
	if m == nil {
		t.Fatalf("the result page has no effect row for %s", arm)
	}
	v, err := strconv.ParseFloat(m[1], 64)
	if err != nil {
		t.Fatal(err)
	}
	return v
}

// TestConsoleAnalysis runs the effects analysis from the console on an
// uploaded outcome file: through the real router, signed in and not, with
// good and bad files.
func TestConsoleAnalysis(t *testing.T) {
	f, file := analysisFixture(t)
	const base = "/console/studies/harrow-effects/analysis"
	owner := newBrowserish(t, f.http.URL, nil)
	owner.signIn(ownerEmail)
	viewer := newBrowserish(t, f.http.URL, nil)
	viewer.signIn(viewerEmail)

	var resultURL string
	t.Run("OKOwnerRecoversPlantedEffect", func(t *testing.T) {
		res, body := owner.get(base)
		mustStatus(t, res, body, http.StatusOK)
		if !strings.Contains(body, `enctype="multipart/form-data"`) || !strings.Contains(body, `value="calm"`) {
			t.Fatalf("the form lacks the upload or the arms: %.600s", body)
		}
		fields := goodFields()
		fields["outcome"] = []string{"attitude_post,<b>post</b>"}
		res, body = owner.upload(base, fields, file, nil)
		mustStatus(t, res, body, http.StatusSeeOther)
		resultURL = res.Header.Get("Location")
		if !strings.HasPrefix(resultURL, base+"/") {
			t.Fatalf("got Location %q, want a result under %s", resultURL, base)
		}
		res, page := owner.get(resultURL)
		mustStatus(t, res, page, http.StatusOK)
		// Rows from the planted file: n per arm is about 40, the noise's
		// SD 2, so the estimate's SE is about 0.45; 2 is over 4 SE.
		if got := estimateOf(t, page, "case"); math.Abs(got-plantedEffect) > 2 {
			t.Errorf("case: got estimate %v, want the planted %v within 2", got, plantedEffect)
		}
		if got := estimateOf(t, page, "facts"); math.Abs(got) > 2 {
			t.Errorf("facts: got estimate %v, want 0 within 2", got)
		}
		for _, want := range []string{"Balance (all assigned respondents)", "Attrition", "Differential attrition", "120 rows, 120 matched to sessions",
			`src="` + resultURL + `/effects.svg"`, `href="` + resultURL + `/effects.zip"`, "survey-export.csv",
			// The column name is text, never markup.
			"Outcome &lt;b&gt;post&lt;/b&gt;"} {
			if !strings.Contains(page, want) {
				t.Errorf("the result page lacks %q", want)
			}
		}
		if strings.Contains(page, "<b>post</b>") {
			t.Errorf("a column name from the file reached the page as HTML")
		}
		res, svg := owner.get(resultURL + "/effects.svg")
		mustSafeSVG(t, res, svg)
		for _, want := range []string{"case", "facts", "Effects against the pooled control", "&lt;b&gt;post&lt;/b&gt;"} {
			if !strings.Contains(svg, want) {
				t.Errorf("the plot lacks %q", want)
			}
		}
		res, raw := owner.get(resultURL + "/effects.zip")
		mustStatus(t, res, raw, http.StatusOK)
		// RFC 6266: a download with a file name.
		if cd := res.Header.Get("Content-Disposition"); !regexp.MustCompile(`^attachment; filename="harrow-effects-effects-\d{8}T\d{6}Z\.zip"$`).MatchString(cd) {
			t.Errorf("got Content-Disposition %q, want an attachment named after the study", cd)
		}
		zr, err := zip.NewReader(strings.NewReader(raw), int64(len(raw)))
		if err != nil {
			t.Fatalf("the download is not a zip archive: %v", err)
		}
		var names []string
		for _, zf := range zr.File {
			names = append(names, zf.Name[strings.Index(zf.Name, "/")+1:])
		}
		if got := strings.Join(names, " "); got != "effects.csv balance.csv attrition.csv effects.json effects.svg" {
			t.Fatalf("got files %s, want the five files of trialogue effects --out", got)
		}
		rc, err := zr.File[0].Open()
		if err != nil {
			t.Fatal(err)
		}
		recs, err := csv.NewReader(rc).ReadAll()
		rc.Close()
		if err != nil {
			t.Fatalf("effects.csv does not parse: %v", err)
		}
		// Two outcomes × two treatment arms, and the header.
		if len(recs) != 5 || recs[0][0] != "outcome" || recs[0][7] != "estimate" {
			t.Fatalf("got effects.csv %v, want a header and four rows", recs)
		}
		for _, rec := range recs[1:] {
			est, _ := strconv.ParseFloat(rec[7], 64)
			if rec[1] == "case" && math.Abs(est-plantedEffect) > 2 {
				t.Errorf("effects.csv: case on %s: got %v, want about %v", rec[0], est, plantedEffect)
			}
		}
	})
	t.Run("OKViewerRuns", func(t *testing.T) {
		res, body := viewer.upload(base, goodFields(), file, nil)
		mustStatus(t, res, body, http.StatusSeeOther)
		res, page := viewer.get(res.Header.Get("Location"))
		mustStatus(t, res, page, http.StatusOK)
		estimateOf(t, page, "case")
	})
	t.Run("ErrOtherUsersResult", func(t *testing.T) {
		for _, p := range []string{resultURL, resultURL + "/effects.svg", resultURL + "/effects.zip"} {
			res, body := viewer.get(p)
			mustStatus(t, res, body, http.StatusNotFound)
		}
	})
	t.Run("ErrAnonymous", func(t *testing.T) {
		anon := newBrowserish(t, f.http.URL, nil)
		res, body := anon.get(base)
		mustStatus(t, res, body, http.StatusSeeOther)
		if loc := res.Header.Get("Location"); !strings.HasPrefix(loc, "/console/login?") {
			t.Errorf("got Location %q, want the sign-in page", loc)
		}
		// Not signed in: 403 rather than 401, which would need an HTTP
		// authentication scheme (RFC 9110 section 15.5.2).
		res, body = anon.upload(base, goodFields(), file, nil)
		mustStatus(t, res, body, http.StatusForbidden)
		for _, p := range []string{resultURL + "/effects.svg", "/console/studies/harrow-effects/arms-map.svg"} {
			res, body = anon.get(p)
			mustStatus(t, res, body, http.StatusForbidden)
		}
	})
	t.Run("ErrCrossSite", func(t *testing.T) {
		// Fetch Metadata (W3C): a form posted from another site.
		res, body := owner.upload(base, goodFields(), file, map[string]string{"Sec-Fetch-Site": "cross-site"})
		mustStatus(t, res, body, http.StatusForbidden)
	})

	lines := strings.Split(strings.TrimSuffix(string(file), "\r\n"), "\r\n")
	dupFile := []byte(strings.Join(append(lines, lines[1]), "\r\n") + "\r\n")
	// Keep one respondent of arm facts with an outcome: empty the others.
	var few []string
	seen := 0
	sessions, err := f.st.Sessions(context.Background(), "harrow-effects")
	if err != nil {
		t.Fatal(err)
	}
	armOf := map[string]string{}
	for _, s := range sessions {
		armOf[s.RID] = s.Arm
	}
	for i, l := range lines {
		cells := strings.Split(l, ",")
		if i > 0 && armOf[cells[0]] == "facts" {
			// keep the first one whose cells are filled (the fixture leaves some
			// outcomes empty at random), empty every other
			if seen == 0 && cells[2] != "" && cells[3] != "" {
				seen++
			} else {
				cells[2], cells[3] = "", ""
			}
		}
		few = append(few, strings.Join(cells, ","))
	}
	fewFile := []byte(strings.Join(few, "\r\n") + "\r\n")
	bad := []struct {
		name   string
		file   []byte
		fields map[string][]string
		status int
		want   string
	}{
		{"ErrNotUTF8", []byte("Response ID,attitude_post\r\nHB-000,\xff\r\n"), nil, http.StatusBadRequest, "survey-export.csv: line 2 is not valid UTF-8 text"},
		{"ErrRaggedCSV", []byte("Response ID,attitude_post\r\nHB-000,4,5\r\n"), nil, http.StatusBadRequest, "row 2 has 3 cells, but the header has 2 columns"},
		{"ErrNoFile", nil, nil, http.StatusBadRequest, "Choose the outcome file"},
		{"ErrUnknownColumn", file, map[string][]string{"outcome": {"attitude"}}, http.StatusUnprocessableEntity, `no column "attitude"`},
		{"ErrUnknownControl", file, map[string][]string{"control": {"calm", "placebo"}}, http.StatusUnprocessableEntity, `control arm "placebo" does not exist in study harrow-effects`},
		{"ErrDuplicateIDs", dupFile, nil, http.StatusUnprocessableEntity, "survey-export.csv: duplicate ids: "},
		{"ErrTooFewInArm", fewFile, nil, http.StatusUnprocessableEntity, `arm "facts" has 1 respondent(s) with an outcome; at least 2 are needed`},
		{"ErrPermutationsOverCap", file, map[string][]string{"permutations": {"20000"}}, http.StatusUnprocessableEntity, "Re-draws must be a whole number from 0 to 10000"},
		{"ErrAdjust", file, map[string][]string{"adjust": {"median"}}, http.StatusUnprocessableEntity, "Choose an adjustment"},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			fields := goodFields()
			for k, v := range c.fields {
				fields[k] = v
			}
			res, body := owner.upload(base, fields, c.file, nil)
			mustStatus(t, res, body, c.status)
			if loc := res.Header.Get("Location"); loc != "" {
				t.Errorf("bad input kept a result at %q", loc)
			}
			if !strings.Contains(html.UnescapeString(body), c.want) {
				t.Errorf("the page lacks the message %q: %s", c.want, body[strings.Index(body, "<main"):])
			}
			// The form comes back as it was filled in.
			if !strings.Contains(body, `id="problems"`) || !strings.Contains(body, `value="Response ID"`) {
				t.Errorf("the form did not come back with its problems and values")
			}
		})
	}
	t.Run("ErrTooLarge", func(t *testing.T) {
		big := bytes.Repeat([]byte("HB-000,1\r\n"), (20<<20)/10+1)
		res, body := owner.upload(base, goodFields(), append([]byte("Response ID,attitude_post\r\n"), big...), nil)
		mustStatus(t, res, body, http.StatusRequestEntityTooLarge)
		if !strings.Contains(body, "larger than 20 MB") {
			t.Errorf("the page does not say the limit: %.400s", body)
		}
	})
}

// TestConsoleArmsMap shows the arms map of the stored model messages.
func TestConsoleArmsMap(t *testing.T) {
	f, _ := analysisFixture(t)
	const page = "/console/studies/harrow-effects/arms-map"
	for _, who := range []string{ownerEmail, viewerEmail} {
		t.Run("OK"+strings.Split(who, "@")[0], func(t *testing.T) {
			b := newBrowserish(t, f.http.URL, nil)
			b.signIn(who)
			res, body := b.get(page + "?permutations=99")
			mustStatus(t, res, body, http.StatusOK)
			for _, want := range []string{"240 from 3 arms", `<dd id="map-accuracy">1.000</dd>`, `<dd id="map-chance">0.333</dd>`,
				"0.0100 (99 label permutations)", "Cosine distance between arm centroids", `<th scope="col">facts</th>`,
				`src="/console/studies/harrow-effects/arms-map.svg"`} {
				if !strings.Contains(body, want) {
					t.Errorf("the arms map page lacks %q: %s", want, body[strings.Index(body, "<main"):])
				}
			}
			if !regexp.MustCompile(`<dt>facts</dt><dd>[^<]*\btimetable\b`).MatchString(body) {
				t.Errorf("the top terms of facts lack timetable")
			}
			res, svg := b.get(page + ".svg")
			mustSafeSVG(t, res, svg)
			if !strings.Contains(svg, "calm") {
				t.Errorf("the map's legend lacks the arm calm")
			}
		})
	}
	t.Run("ErrPermutations", func(t *testing.T) {
		b := newBrowserish(t, f.http.URL, nil)
		b.signIn(viewerEmail)
		res, body := b.get(page + "?permutations=lots")
		mustStatus(t, res, body, http.StatusBadRequest)
	})
	t.Run("ErrAnonymous", func(t *testing.T) {
		res, body := newBrowserish(t, f.http.URL, nil).get(page)
		mustStatus(t, res, body, http.StatusSeeOther)
	})
}
