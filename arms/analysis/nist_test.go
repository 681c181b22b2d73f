package analysis

import (
	"bufio"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// The NIST Statistical Reference Datasets (StRD), copied with their
// certified values into testdata/reference/nist-strd (see SOURCE.md there).
const nistDir = "../../testdata/reference/nist-strd"

// nistFile reads a StRD file: its lines, and the data rows, which start on
// line 61 in every StRD file (each file's header says so).
func nistFile(t *testing.T, name string) (lines []string, data [][]float64) {
	t.Helper()
	f, err := os.Open(filepath.Join(nistDir, name))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		lines = append(lines, sc.Text())
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	for _, l := range lines[60:] {
		fields := strings.Fields(l)
		if len(fields) == 0 {
			continue
		}
		row := make([]float64, len(fields))
		for i, s := range fields {
			v, err := strconv.ParseFloat(s, 64)
			if err != nil {
				t.Fatalf("%s: data cell %q: %v", name, s, err)
			}
			row[i] = v
		}
		data = append(data, row)
	}
	return lines, data
}

// certified finds the numbers on the first line matching re (by label,
// not by line number: AtmWtAg's header gives the wrong lines).
func certified(t *testing.T, lines []string, re string) []float64 {
	t.Helper()
	rx := regexp.MustCompile(re)
	for _, l := range lines[:60] {
		if m := rx.FindStringSubmatch(l); m != nil {
			var out []float64
			for _, f := range strings.Fields(m[1]) {
				v, err := strconv.ParseFloat(f, 64)
				if err != nil {
					t.Fatalf("certified value %q: %v", f, err)
				}
				out = append(out, v)
			}
			return out
		}
	}
	t.Fatalf("no certified value matches %s", re)
	return nil
}

// lre is the log relative error, the number of correct significant digits
// as NIST's StRD documentation and McCullough (1998) count them.
func lre(got, want float64) float64 {
	if got == want {
		return 15
	}
	if want == 0 {
		return -math.Log10(math.Abs(got))
	}
	return math.Min(15, -math.Log10(math.Abs(got-want)/math.Abs(want)))
}

func checkLRE(t *testing.T, what string, got, want, digits float64) {
	t.Helper()
	if l := lre(got, want); l < digits {
		t.Errorf("%s: got %.15g, want %.15g (certified): %.1f correct digits, want at least %.0f", what, got, want, l, digits)
	}
}

// Digits demanded: NIST certifies 15 significant digits. For double
// precision, common practice (McCullough 1998, from memory) asks for about
// 12 digits on lower-difficulty sets and 9 or more on higher ones; a QR
// decomposition does better than that on both.
func TestOLSNIST(t *testing.T) {
	cases := []struct {
		file   string
		params int
		digits float64
	}{
		{"Norris.dat", 2, 12},  // NIST StRD Norris, lower difficulty
		{"Longley.dat", 7, 10}, // NIST StRD Longley, higher difficulty
	}
	for _, c := range cases {
		t.Run("OK"+strings.TrimSuffix(c.file, ".dat"), func(t *testing.T) {
			lines, data := nistFile(t, c.file)
			x := mat.NewDense(len(data), c.params, nil)
			y := make([]float64, len(data))
			for i, row := range data {
				// Norris lists y then x; Longley y then x1..x6.
				y[i] = row[0]
				x.Set(i, 0, 1)
				for j := 1; j < c.params; j++ {
					x.Set(i, j, row[j])
				}
			}
			f, err := OLS(x, y, nil)
			if err != nil {
				t.Fatal(err)
			}
			for j := range c.params {
				cert := certified(t, lines, `^\s+B`+strconv.Itoa(j)+`\s+(\S+\s+\S+)\s*$`)
				checkLRE(t, "B"+strconv.Itoa(j), f.Coef[j], cert[0], c.digits)
				checkLRE(t, "SD of B"+strconv.Itoa(j), f.SE[j], cert[1], c.digits)
			}
			checkLRE(t, "residual SD", f.Sigma, certified(t, lines, `^\s+Standard Deviation\s+(\S+)\s*$`)[0], c.digits)
			checkLRE(t, "R-squared", f.R2, certified(t, lines, `^\s+R-Squared\s+(\S+)\s*$`)[0], c.digits)
			res := certified(t, lines, `^Residual\s+(\d+\s+\S+)`)
			if float64(f.DF) != res[0] {
				t.Errorf("residual df: got %d, want %v", f.DF, res[0])
			}
			checkLRE(t, "residual SS", f.RSS, res[1], c.digits)
		})
	}
	t.Run("ErrCollinear", func(t *testing.T) {
		_, data := nistFile(t, "Norris.dat")
		x := mat.NewDense(len(data), 3, nil)
		y := make([]float64, len(data))
		for i, row := range data {
			y[i] = row[0]
			x.Set(i, 0, 1)
			x.Set(i, 1, row[1])
			x.Set(i, 2, 2*row[1])
		}
		_, err := OLS(x, y, []string{"(intercept)", "x", "twice x"})
		if err == nil || !strings.Contains(err.Error(), `"twice x"`) {
			t.Fatalf("got %v, want an error naming \"twice x\"", err)
		}
	})
	t.Run("ErrTooFewRows", func(t *testing.T) {
		_, err := OLS(mat.NewDense(2, 2, []float64{1, 1, 1, 2}), []float64{1, 2}, nil)
		if err == nil || !strings.Contains(err.Error(), "too few observations") {
			t.Fatalf("got %v, want too few observations", err)
		}
	})
}

func TestOneWayNIST(t *testing.T) {
	cases := []struct {
		file   string
		digits float64
	}{
		{"SiRstv.dat", 12},  // NIST StRD SiRstv, lower difficulty
		{"AtmWtAg.dat", 10}, // NIST StRD AtmWtAg, average difficulty
	}
	for _, c := range cases {
		t.Run("OK"+strings.TrimSuffix(c.file, ".dat"), func(t *testing.T) {
			lines, data := nistFile(t, c.file)
			byGroup := map[float64][]float64{}
			var order []float64
			for _, row := range data {
				if _, ok := byGroup[row[0]]; !ok {
					order = append(order, row[0])
				}
				byGroup[row[0]] = append(byGroup[row[0]], row[1])
			}
			var groups [][]float64
			for _, g := range order {
				groups = append(groups, byGroup[g])
			}
			a, err := OneWay(groups)
			if err != nil {
				t.Fatal(err)
			}
			between := certified(t, lines, `^Between Instrument\s+(.*)$`)
			within := certified(t, lines, `^Within Instrument\s+(.*)$`)
			if float64(a.DFBetween) != between[0] || float64(a.DFWithin) != within[0] {
				t.Errorf("df: got %d and %d, want %v and %v", a.DFBetween, a.DFWithin, between[0], within[0])
			}
			checkLRE(t, "between SS", a.SSBetween, between[1], c.digits)
			checkLRE(t, "within SS", a.SSWithin, within[1], c.digits)
			checkLRE(t, "F", a.F, between[3], c.digits)
			checkLRE(t, "R-squared", a.R2, certified(t, lines, `R-Squared\s+(\S+)`)[0], c.digits)
			checkLRE(t, "residual SD", a.ResidualSD, certified(t, lines, `Standard Deviation\s+(\S+)`)[0], c.digits)
		})
	}
	t.Run("ErrOneGroup", func(t *testing.T) {
		if _, err := OneWay([][]float64{{1, 2, 3}}); err == nil {
			t.Fatal("got nil error for one group, want an error")
		}
	})
}
