package textmap

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"strconv"
	"text/tabwriter"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"

	"trialogue/arms/analysis"
)

func f(v float64) string { return strconv.FormatFloat(v, 'g', 10, 64) }

// WriteText writes the summary, the centroid distances and the top terms
// for a terminal.
func WriteText(w io.Writer, r *Result) error {
	fmt.Fprintf(w, "%d model messages from %d arms, %d terms. LSA map: singular values %.4f and %.4f.\n",
		r.Docs, len(r.Arms), r.Terms, r.Singular[0], r.Singular[1])
	fmt.Fprintf(w, "Nearest-centroid classification, %d-fold cross-validation: accuracy %.3f against chance %.3f (the largest arm's share)", r.Folds, r.Accuracy, r.Chance)
	if r.Perms > 0 {
		fmt.Fprintf(w, "; permutation p = %.4f (%d label permutations)", r.P, r.Perms)
	}
	fmt.Fprint(w, ".\n\nCosine distance between arm centroids\n")
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprint(tw, "\t")
	for _, a := range r.Arms {
		fmt.Fprintf(tw, "%s\t", a)
	}
	fmt.Fprintln(tw)
	for i, a := range r.Arms {
		fmt.Fprintf(tw, "%s\t", a)
		for j := range r.Arms {
			fmt.Fprintf(tw, "%.3f\t", r.Distances[i][j])
		}
		fmt.Fprintln(tw)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	fmt.Fprint(w, "\nMost characteristic terms (mean TF-IDF in the arm minus in the other arms)\n")
	for i, a := range r.Arms {
		fmt.Fprintf(w, "%s:", a)
		for _, t := range r.Top[i] {
			fmt.Fprintf(w, " %s", t.Term)
		}
		fmt.Fprintln(w)
	}
	return nil
}

// WriteCSV writes the map's files: points (one row per message), distances
// and terms, through the create function, which opens a named file.
func WriteCSV(create func(name string) (io.WriteCloser, error), r *Result, sessions []int64) error {
	write := func(name string, rows [][]string) error {
		wc, err := create(name)
		if err != nil {
			return err
		}
		cw := csv.NewWriter(wc)
		cw.WriteAll(rows)
		if err := cw.Error(); err != nil {
			wc.Close()
			return fmt.Errorf("write %s: %w", name, err)
		}
		if err := wc.Close(); err != nil {
			return fmt.Errorf("write %s: %w", name, err)
		}
		return nil
	}
	points := [][]string{{"message", "session", "arm", "x", "y", "cv_predicted_arm"}}
	for i, c := range r.Coords {
		s := ""
		if i < len(sessions) {
			s = strconv.FormatInt(sessions[i], 10)
		}
		points = append(points, []string{strconv.Itoa(i + 1), s, r.Arms[r.DocArm[i]], f(c[0]), f(c[1]), r.Arms[r.Pred[i]]})
	}
	dist := [][]string{append([]string{"arm"}, r.Arms...)}
	for i, a := range r.Arms {
		row := []string{a}
		for j := range r.Arms {
			row = append(row, f(r.Distances[i][j]))
		}
		dist = append(dist, row)
	}
	terms := [][]string{{"arm", "rank", "term", "score"}}
	for i, a := range r.Arms {
		for k, t := range r.Top[i] {
			terms = append(terms, []string{a, strconv.Itoa(k + 1), t.Term, f(t.Score)})
		}
	}
	summary := [][]string{{"messages", "arms", "terms", "singular_value_1", "singular_value_2", "folds", "cv_accuracy", "chance", "permutations", "permutation_p"},
		{strconv.Itoa(r.Docs), strconv.Itoa(len(r.Arms)), strconv.Itoa(r.Terms), f(r.Singular[0]), f(r.Singular[1]), strconv.Itoa(r.Folds), f(r.Accuracy), f(r.Chance), strconv.Itoa(r.Perms), f(r.P)}}
	for _, x := range []struct {
		name string
		rows [][]string
	}{{"armsmap-points.csv", points}, {"armsmap-distances.csv", dist}, {"armsmap-terms.csv", terms}, {"armsmap-summary.csv", summary}} {
		if err := write(x.name, x.rows); err != nil {
			return err
		}
	}
	return nil
}

// glyphs vary the marker shape as well as the colour, so arms stay apart
// in greyscale.
var glyphs = []draw.GlyphDrawer{draw.CircleGlyph{}, draw.TriangleGlyph{}, draw.SquareGlyph{}, draw.CrossGlyph{},
	draw.RingGlyph{}, draw.PyramidGlyph{}, draw.BoxGlyph{}, draw.PlusGlyph{}}

// WriteSVG draws the map: one point per message, coloured by arm with the
// Okabe–Ito palette, with a legend.
func WriteSVG(w io.Writer, r *Result) error {
	p := plot.New()
	p.Title.Text = fmt.Sprintf("Model messages by arm (LSA of TF-IDF); CV accuracy %.2f, chance %.2f", r.Accuracy, r.Chance)
	p.X.Label.Text = "component 1"
	p.Y.Label.Text = "component 2"
	p.Legend.Top = true
	for a, name := range r.Arms {
		var xy plotter.XYs
		for i, c := range r.Coords {
			if r.DocArm[i] == a {
				xy = append(xy, plotter.XY{X: c[0], Y: c[1]})
			}
		}
		sc, err := plotter.NewScatter(xy)
		if err != nil {
			return fmt.Errorf("arms map plot: %w", err)
		}
		sc.GlyphStyle.Color = analysis.OkabeIto[a%len(analysis.OkabeIto)]
		sc.GlyphStyle.Shape = glyphs[a%len(glyphs)]
		sc.GlyphStyle.Radius = vg.Points(3)
		p.Add(sc)
		p.Legend.Add(name, sc)
	}
	p.Add(plotter.NewGrid())
	wt, err := p.WriterTo(7*vg.Inch, 6*vg.Inch, "svg")
	if err != nil {
		return fmt.Errorf("arms map plot: %w", err)
	}
	if _, err := wt.WriteTo(w); err != nil {
		return fmt.Errorf("write arms map plot: %w", err)
	}
	return nil
}

// Files are the names of the files WriteFiles writes.
var Files = []string{"armsmap-points.csv", "armsmap-distances.csv", "armsmap-terms.csv", "armsmap-summary.csv", "armsmap.svg"}

// WriteFiles writes the map's CSV files and its SVG through create, which
// opens a named file (in a folder for the command, in a zip archive for
// the console); sessions holds each message's session id.
func WriteFiles(create func(name string) (io.WriteCloser, error), r *Result, sessions []int64) error {
	if err := WriteCSV(create, r, sessions); err != nil {
		return err
	}
	wc, err := create("armsmap.svg")
	if err != nil {
		return err
	}
	return errors.Join(WriteSVG(wc, r), wc.Close())
}
