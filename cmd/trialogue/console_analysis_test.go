package main

import (
	"context"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"trialogue/arms"
	"trialogue/store"
)

// TestBrowserConsoleAnalysis uploads the planted outcome file through the
// console's analysis form in headless Chromium, as a researcher would, and
// sees the effects table recover the planted effect and the coefficient
// plot load; the form and the results pass the axe-core audit.
func TestBrowserConsoleAnalysis(t *testing.T) {
	exe, axe := requireBrowser(t)
	db, outcomes := plantedStudy(t, 300)
	dir := t.TempDir()
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	m := &Main{}
	m.Config = Config{Addr: "127.0.0.1:0", DB: db, Studies: []string{demoStudy},
		Synchronous: "FULL", LogFormat: "text", ShutdownTimeout: 5 * time.Second}
	if err := m.Run(ctx); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { closeMain(t, m) })
	base := "http://" + m.Listener.Addr().String()
	const email, password = "analyst@example.org", "quill-gorge-effects-2027"
	if _, err := m.Store.AddUser(ctx, email, store.RoleViewer, password, false); err != nil {
		t.Fatal(err)
	}
	tab := chromium(t, ctx, exe, dir, chromedp.WindowSize(1280, 1000))
	shots := t.ArtifactDir()
	e := &pageEnv{base: base, m: m, tab: tab, axe: axe, shots: shots}

	const form = "/console/studies/quillhaven-cable-car/analysis"
	if err := chromedp.Do(tab, chromedp.Navigate(base+form)); err != nil {
		t.Fatal(err)
	}
	e.wait(t, `location.pathname === "/console/login" && document.getElementById("email") !== null`)
	if err := chromedp.Do(tab,
		chromedp.SendKeys(chromedp.ID("email"), email),
		chromedp.SendKeys(chromedp.ID("password"), password),
		chromedp.Submit(chromedp.ID("password")),
		chromedp.WaitVisible(chromedp.ID("effects-form")),
	); err != nil {
		t.Fatalf("sign in: %v", err)
	}
	e.audit(t, "analysis form")
	if err := chromedp.Do(tab,
		chromedp.SetUploadFiles(chromedp.ID("outcomes"), []string{outcomes}),
		chromedp.SendKeys(chromedp.ID("id"), "Response ID"),
		chromedp.SendKeys(chromedp.ID("outcome"), "attitude_post"),
		chromedp.SendKeys(chromedp.ID("pre"), "attitude_pre"),
		chromedp.Click(chromedp.CSS(`input[name="control"][value="notice"]`)),
		chromedp.Click(chromedp.CSS(`input[name="control"][value="chit-chat"]`)),
		chromedp.SetValue(chromedp.ID("adjust"), "pre"),
		chromedp.SetValue(chromedp.ID("permutations"), "500"),
		chromedp.Click(chromedp.ID("analyse")),
		chromedp.WaitVisible(chromedp.CSS("table.effects")),
	); err != nil {
		t.Fatalf("upload the outcome file: %v", err)
	}
	e.wait(t, `document.getElementById("effects-plot").complete && document.getElementById("effects-plot").naturalWidth > 0`)
	// The debate arm's row: arm, n, mean, estimate, SE.
	row := e.eval(t, `(function () {
		var rows = document.querySelectorAll("table.effects tbody tr");
		for (var i = 0; i < rows.length; i++) {
			if (rows[i].querySelector("th").textContent === "debate") {
				return Array.prototype.map.call(rows[i].querySelectorAll("td"), function (td) { return td.textContent; }).join("|");
			}
		}
		return "";
	})()`)
	cells := strings.Split(row, "|")
	if len(cells) < 4 {
		t.Fatalf("the effects table has no row for debate: %q", row)
	}
	est, err1 := strconv.ParseFloat(cells[2], 64)
	se, err2 := strconv.ParseFloat(cells[3], 64)
	if err1 != nil || err2 != nil {
		t.Fatalf("debate row %q: the estimate and SE are not numbers", row)
	}
	// As in TestEffectsPlanted: within four standard errors.
	if want := plantedEffects["debate"]; math.Abs(est-want) > 4*se {
		t.Errorf("debate: got estimate %v (SE %v) on the page, want the planted %v", est, se, want)
	}
	if n := e.eval(t, `String(document.querySelectorAll("#effects-plot[src$='/effects.svg']").length)`); n != "1" {
		t.Errorf("got %s coefficient plots served from the console, want 1", n)
	}
	e.audit(t, "analysis results")
	shoot(t, tab, shots, "console-analysis.png")
	e.eval(t, `document.getElementById("plot-h").scrollIntoView(); ""`)
	shoot(t, tab, shots, "console-analysis-plot.png")

	// The arms map of the model arms' scripted messages.
	def, _, err := arms.ParseFile(demoStudy)
	if err != nil {
		t.Fatal(err)
	}
	sv, err := m.Store.Study(ctx, "quillhaven-cable-car")
	if err != nil {
		t.Fatal(err)
	}
	sessions, err := m.Store.Sessions(ctx, "quillhaven-cable-car")
	if err != nil {
		t.Fatal(err)
	}
	for i, s := range sessions {
		script := def.Arms[s.Arm].Script
		for k := 0; k < len(script) && k < 3; k++ {
			if _, err := m.Store.AddModelTurn(ctx, store.Turn{SessionID: s.ID, Index: k, Text: script[(i+k)%len(script)], StartedAt: time.Now(), StudyHash: sv.Hash}); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS(`.tabs a[href$="/arms-map"]`)), chromedp.WaitVisible(chromedp.ID("map-accuracy"))); err != nil {
		t.Fatalf("open the arms map: %v", err)
	}
	e.wait(t, `document.getElementById("arms-map").complete && document.getElementById("arms-map").naturalWidth > 0`)
	if acc, err := strconv.ParseFloat(textOf(t, tab, "#map-accuracy"), 64); err != nil || acc <= 0 {
		t.Errorf("got accuracy %q, want a number", textOf(t, tab, "#map-accuracy"))
	}
	e.audit(t, "arms map")
	shoot(t, tab, shots, "console-armsmap.png")
}
