package analysis

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"image/color"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
)

// num writes a float for CSV and terminal tables: empty when NaN.
func num(v float64) string {
	if math.IsNaN(v) {
		return ""
	}
	return strconv.FormatFloat(v, 'g', 10, 64)
}

// jsonNum is a float that JSON writes as null when it is NaN.
type jsonNum float64

// MarshalJSON writes null for NaN, which JSON cannot express.
func (n jsonNum) MarshalJSON() ([]byte, error) {
	if math.IsNaN(float64(n)) || math.IsInf(float64(n), 0) {
		return []byte("null"), nil
	}
	return json.Marshal(float64(n))
}

// MarshalJSON writes p_ri as null when randomization inference was skipped.
func (e Effect) MarshalJSON() ([]byte, error) {
	type plain Effect
	return json.Marshal(struct {
		plain
		PRI jsonNum `json:"p_ri"`
	}{plain(e), jsonNum(e.PRI)})
}

// MarshalJSON writes the control row's SMD (and any undefined one) as null.
func (b BalanceRow) MarshalJSON() ([]byte, error) {
	type plain BalanceRow
	return json.Marshal(struct {
		plain
		Value jsonNum `json:"value"`
		SMD   jsonNum `json:"smd"`
	}{plain(b), jsonNum(b.Value), jsonNum(b.SMD)})
}

// WriteJSON writes the reports as one JSON document.
func WriteJSON(w io.Writer, reps []*Report) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	if err := enc.Encode(map[string]any{"reports": reps}); err != nil {
		return fmt.Errorf("write effects JSON: %w", err)
	}
	return nil
}

// WriteEffectsCSV writes one row per outcome and treatment arm.
func WriteEffectsCSV(w io.Writer, reps []*Report) error {
	cw := csv.NewWriter(w)
	cw.Write([]string{"outcome", "arm", "adjust", "n", "n_control", "mean_arm", "mean_control", "estimate", "se_hc2", "t", "df", "p", "ci_low", "ci_high", "p_holm", "p_ri", "permutations"})
	for _, r := range reps {
		for _, e := range r.Effects {
			cw.Write([]string{e.Outcome, e.Arm, r.Adjust, strconv.Itoa(e.N), strconv.Itoa(e.NControl), num(e.MeanArm), num(e.MeanControl),
				num(e.Estimate), num(e.SE), num(e.T), num(e.DF), num(e.P), num(e.Low), num(e.High), num(e.PHolm), num(e.PRI), strconv.Itoa(r.Permutations)})
		}
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("write effects CSV: %w", err)
	}
	return nil
}

// WriteBalanceCSV writes the balance rows, then the omnibus tests.
func WriteBalanceCSV(w io.Writer, rep *Report) error {
	cw := csv.NewWriter(w)
	cw.Write([]string{"covariate", "level", "arm", "n", "mean_or_share", "smd", "test", "stat", "df1", "df2", "p"})
	for _, b := range rep.Balance {
		cw.Write([]string{b.Covariate, b.Level, b.Arm, strconv.Itoa(b.N), num(b.Value), num(b.SMD), "", "", "", "", ""})
	}
	for _, t := range rep.Omnibus {
		cw.Write([]string{t.Covariate, "", "all arms", "", "", "", t.Test, num(t.Stat), strconv.Itoa(t.DF1), strconv.Itoa(t.DF2), num(t.P)})
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("write balance CSV: %w", err)
	}
	return nil
}

// WriteAttritionCSV writes one row per arm, then the chi-square test.
func WriteAttritionCSV(w io.Writer, rep *Report) error {
	cw := csv.NewWriter(w)
	cw.Write([]string{"arm", "assigned", "finished", "outcome_observed", "observed_share", "test", "stat", "df", "p"})
	for _, r := range rep.Attrition.Rows {
		cw.Write([]string{r.Arm, strconv.Itoa(r.Assigned), strconv.Itoa(r.Finished), strconv.Itoa(r.Observed), num(r.Share), "", "", "", ""})
	}
	if rep.Attrition.Tested {
		t := rep.Attrition.Test
		cw.Write([]string{"all arms", "", "", "", "", "chi-square", num(t.Stat), strconv.Itoa(t.DF), num(t.P)})
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return fmt.Errorf("write attrition CSV: %w", err)
	}
	return nil
}

// WriteText writes the report as a readable table for a terminal.
func WriteText(w io.Writer, rep *Report) error {
	fmt.Fprintf(w, "Study %s, outcome %s, adjustment %s", rep.Study, rep.Outcome, rep.Adjust)
	if rep.StrataFE {
		fmt.Fprint(w, ", stratum fixed effects")
	}
	fmt.Fprintf(w, "\nControl (pooled): %s. Respondents analysed: %d.\n", strings.Join(rep.Control, ", "), rep.N)
	fmt.Fprintf(w, "Outcome file: %d rows, %d matched to sessions, %d matched with the outcome empty; %d sessions have no row.\n\n",
		rep.Join.Rows, rep.Join.Matched, rep.Join.MissingOutcome, rep.Join.SessionsNoRow)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', tabwriter.AlignRight)
	fmt.Fprint(tw, "arm\tn\tmean\testimate\tSE (HC2)\t95% CI\tp\tp Holm\tp RI\t\n")
	fmt.Fprintf(tw, "%s\t%d\t%.3f\t\t\t\t\t\t\t\n", PooledControl, rep.Effects[0].NControl, rep.Effects[0].MeanControl)
	for _, e := range rep.Effects {
		ri := "–"
		if !math.IsNaN(e.PRI) {
			ri = fmt.Sprintf("%.4f", e.PRI)
		}
		fmt.Fprintf(tw, "%s\t%d\t%.3f\t%.3f\t%.3f\t[%.3f, %.3f]\t%s\t%s\t%s\t\n", e.Arm, e.N, e.MeanArm, e.Estimate, e.SE, e.Low, e.High, pfmt(e.P), pfmt(e.PHolm), ri)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	fmt.Fprintf(w, "t tests with %g residual degrees of freedom; Holm across %d arms", rep.Effects[0].DF, len(rep.Effects))
	if rep.Permutations > 0 {
		fmt.Fprintf(w, "; RI from %d re-draws of the study's blocked scheme (seed %d)", rep.Permutations, rep.Seed)
		if rep.RIStatistic == RIResidualMeans {
			fmt.Fprint(w, " on the difference in mean covariate-adjusted residuals")
		}
	}
	fmt.Fprint(w, ".\n\nBalance (all assigned respondents): omnibus tests across arms\n")
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprint(tw, "covariate\ttest\tstatistic\tdf\tp\tlargest |SMD|\n")
	for _, t := range rep.Omnibus {
		df := strconv.Itoa(t.DF1)
		if t.DF2 > 0 {
			df += ", " + strconv.Itoa(t.DF2)
		}
		worst := 0.0
		for _, b := range rep.Balance {
			if b.Covariate == t.Covariate && !math.IsNaN(b.SMD) {
				worst = math.Max(worst, math.Abs(b.SMD))
			}
		}
		fmt.Fprintf(tw, "%s\t%s\t%.3f\t%s\t%s\t%.3f\n", t.Covariate, t.Test, t.Stat, df, pfmt(t.P), worst)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	fmt.Fprint(w, "\nAttrition\n")
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprint(tw, "arm\tassigned\tfinished\toutcome observed\tshare\n")
	for _, r := range rep.Attrition.Rows {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%d\t%.3f\n", r.Arm, r.Assigned, r.Finished, r.Observed, r.Share)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if rep.Attrition.Tested {
		t := rep.Attrition.Test
		fmt.Fprintf(w, "Differential attrition: chi-square %.3f, df %d, p %s\n", t.Stat, t.DF, pfmt(t.P))
	}
	return nil
}

func pfmt(p float64) string {
	switch {
	case math.IsNaN(p):
		return "–"
	case p < 0.0001:
		return "<0.0001"
	}
	return fmt.Sprintf("%.4f", p)
}

// OkabeIto is the colour-blind-safe palette of Okabe and Ito (2008), "Color
// Universal Design", without its black.
var OkabeIto = []color.RGBA{
	{0xE6, 0x9F, 0x00, 0xFF}, // orange
	{0x56, 0xB4, 0xE9, 0xFF}, // sky blue
	{0x00, 0x9E, 0x73, 0xFF}, // bluish green
	{0xF0, 0xE4, 0x42, 0xFF}, // yellow
	{0x00, 0x72, 0xB2, 0xFF}, // blue
	{0xD5, 0x5E, 0x00, 0xFF}, // vermillion
	{0xCC, 0x79, 0xA7, 0xFF}, // reddish purple
}

// xErr is one estimate with its interval, for plotter.XErrorBars.
type xErr struct {
	x, y, low, high float64
}

type xErrs []xErr

func (e xErrs) Len() int                        { return len(e) }
func (e xErrs) XY(i int) (float64, float64)     { return e[i].x, e[i].y }
func (e xErrs) XError(i int) (float64, float64) { return e[i].x - e[i].low, e[i].high - e[i].x }

// WriteCoefPlot draws the coefficient plot: each arm's estimate and 95%
// interval, one row per arm and outcome, a dashed line at zero; SVG.
func WriteCoefPlot(w io.Writer, reps []*Report) error {
	p := plot.New()
	p.Title.Text = "Effects against the pooled control (95% intervals, HC2)"
	p.X.Label.Text = "estimate"
	var labels []string
	lo, hi := 0.0, 0.0
	row := 0
	for oi, r := range reps {
		var pts xErrs
		for _, e := range r.Effects {
			label := e.Arm
			if len(reps) > 1 {
				label = e.Arm + " · " + e.Outcome
			}
			labels = append(labels, label)
			pts = append(pts, xErr{e.Estimate, float64(row), e.Low, e.High})
			lo, hi = math.Min(lo, e.Low), math.Max(hi, e.High)
			row++
		}
		sc, err := plotter.NewScatter(pts)
		if err != nil {
			return fmt.Errorf("coefficient plot: %w", err)
		}
		col := OkabeIto[(oi+4)%len(OkabeIto)]
		sc.GlyphStyle.Color = col
		sc.GlyphStyle.Shape = draw.CircleGlyph{}
		sc.GlyphStyle.Radius = vg.Points(3.5)
		bars, err := plotter.NewXErrorBars(pts)
		if err != nil {
			return fmt.Errorf("coefficient plot: %w", err)
		}
		bars.LineStyle.Color = col
		bars.LineStyle.Width = vg.Points(1.5)
		p.Add(bars, sc)
		if len(reps) > 1 {
			p.Legend.Add(r.Outcome, sc)
		}
	}
	zero, err := plotter.NewLine(plotter.XYs{{X: 0, Y: -0.5}, {X: 0, Y: float64(row) - 0.5}})
	if err != nil {
		return fmt.Errorf("coefficient plot: %w", err)
	}
	zero.LineStyle.Dashes = []vg.Length{vg.Points(4), vg.Points(3)}
	zero.LineStyle.Color = color.Gray{Y: 0x60}
	p.Add(zero)
	p.NominalY(labels...)
	pad := (hi - lo) * 0.08
	p.X.Min, p.X.Max = lo-pad, hi+pad
	p.Add(plotter.NewGrid())
	height := vg.Length(1.2+0.45*float64(row)) * vg.Inch
	wt, err := p.WriterTo(7*vg.Inch, height, "svg")
	if err != nil {
		return fmt.Errorf("coefficient plot: %w", err)
	}
	if _, err := wt.WriteTo(w); err != nil {
		return fmt.Errorf("write coefficient plot: %w", err)
	}
	return nil
}
