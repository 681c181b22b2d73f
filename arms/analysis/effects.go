// Package analysis estimates what each arm of a Trialogue study did: the
// effects of treatment arms against the pooled control arms with HC2 robust
// standard errors, optional adjustment for the pre-treatment measure or the
// Lin (2013) estimator, stratum fixed effects, Holm-adjusted p-values and
// randomization-inference p-values that re-draw the study's own blocked
// scheme; and the balance and attrition tables reviewers ask for.
//
// It knows nothing of SQL or HTTP: the command reads the store and passes
// plain values in.
package analysis

import (
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
	"sync/atomic"

	"gonum.org/v1/gonum/mat"

	"trialogue/arms"
)

// Adjustments.
const (
	AdjustNone = "none" // difference in means (plus stratum fixed effects)
	AdjustPre  = "pre"  // regression on the pre-treatment measure
	AdjustLin  = "lin"  // Lin (2013): centered covariates and their interactions with the arms
)

// DefaultPermutations is the number of randomization-inference re-draws.
const DefaultPermutations = 10000

// Statistics of the randomization test.
const (
	// RIEstimate is the reported estimate itself (adjustments none and pre).
	RIEstimate = "estimate"
	// RIResidualMeans is each treatment arm's mean residual minus the
	// control's, the residuals from regressing the outcome on the
	// covariates and stratum indicators alone (adjustment lin).
	RIResidualMeans = "residual difference in means"
)

// Unit is one assigned respondent, as the store knows them.
type Unit struct {
	RID        string
	Arm        string
	Stratum    string // the stratum key the allocation used
	Slot       int    // 0-based position in the stratum's allocation sequence
	Finished   bool   // continued back to the survey
	Covariates map[string]string
}

// Spec is what to estimate.
type Spec struct {
	ID         string   // outcome-file column holding the respondent id (rid)
	Outcome    string   // outcome column
	Pre        string   // pre-treatment measure column, optional
	Covariates []string // study covariates or outcome-file columns, for Lin and balance
	Control    []string // arms pooled as the control group
	Adjust     string   // AdjustNone, AdjustPre or AdjustLin
	Change     bool     // analyse outcome minus pre
	// Permutations is the number of randomization-inference re-draws; 0
	// skips randomization inference.
	Permutations int
	Seed         uint64 // master seed of the re-draws, so p-values can be reproduced
	// LeftOut are respondent ids whose sessions the caller left out of
	// units on purpose (for example flagged transcripts): their rows in the
	// outcome file are skipped instead of reported as unknown ids.
	LeftOut map[string]bool
}

// Effect is one treatment arm against the pooled control.
type Effect struct {
	Outcome     string  `json:"outcome"`
	Arm         string  `json:"arm"`
	N           int     `json:"n"`         // analysed respondents in the arm
	NControl    int     `json:"n_control"` // analysed respondents in the pooled control
	MeanArm     float64 `json:"mean_arm"`  // raw mean of the analysed outcome
	MeanControl float64 `json:"mean_control"`
	Estimate    float64 `json:"estimate"`
	SE          float64 `json:"se"` // HC2
	T           float64 `json:"t"`
	DF          float64 `json:"df"` // residual degrees of freedom
	P           float64 `json:"p"`
	Low         float64 `json:"ci_low"` // 95% confidence interval
	High        float64 `json:"ci_high"`
	PHolm       float64 `json:"p_holm"`
	PRI         float64 `json:"p_ri"` // NaN when randomization inference was skipped; see Report.RIStatistic
}

// Report is the whole analysis of one outcome.
type Report struct {
	Study        string   `json:"study"`
	Outcome      string   `json:"outcome"` // as analysed: "post - pre" with --change
	Adjust       string   `json:"adjust"`
	Control      []string `json:"control"`
	Treatments   []string `json:"treatments"`
	Regressors   []string `json:"regressors"` // the regression's columns
	StrataFE     bool     `json:"strata_fixed_effects"`
	N            int      `json:"n"` // respondents analysed
	Effects      []Effect `json:"effects"`
	Permutations int      `json:"permutations"`
	Seed         uint64   `json:"ri_seed"`
	// RIStatistic is what the randomization test recomputes on each
	// re-draw: RIEstimate or RIResidualMeans; empty when it was skipped.
	RIStatistic string `json:"ri_statistic,omitempty"`

	Balance   []BalanceRow  `json:"balance"`
	Omnibus   []BalanceTest `json:"balance_tests"`
	Attrition Attrition     `json:"attrition"`
	// Join reports how the outcome file met the assignments.
	Join Join `json:"join"`
}

// Join counts how outcome rows and sessions matched.
type Join struct {
	Rows            int `json:"rows"`    // data rows in the outcome file
	Matched         int `json:"matched"` // rows matched to a session
	SessionsNoRow   int `json:"sessions_without_row"`
	MissingOutcome  int `json:"matched_missing_outcome"` // matched rows whose outcome cell is empty
	AnalysedOutcome int `json:"analysed"`
}

// group of a unit: 0 is the pooled control, k ≥ 1 the k-th treatment arm.
type design struct {
	study      *arms.Study
	spec       Spec
	treatments []string
	armGroup   map[string]int // arm name → group
	units      []Unit
	row        []int // unit → outcome-file row, -1 when none
	y          []float64
	pre        []float64
}

// Analyze joins the outcome file to the units and estimates every treatment
// arm's effect. Bad input is an *InputError listing every problem found.
func Analyze(study *arms.Study, units []Unit, t *Table, spec Spec) (*Report, error) {
	d, err := prepare(study, units, t, spec)
	if err != nil {
		return nil, err
	}
	rep := &Report{Study: study.ID, Outcome: spec.Outcome, Adjust: spec.Adjust, Control: spec.Control,
		Treatments: d.treatments, Permutations: spec.Permutations, Seed: spec.Seed}
	if spec.Change {
		rep.Outcome = spec.Outcome + " - " + spec.Pre
	}
	rep.Join.Rows = len(t.Rows)
	for i := range d.units {
		if d.row[i] < 0 {
			rep.Join.SessionsNoRow++
			continue
		}
		rep.Join.Matched++
		if math.IsNaN(d.y[i]) {
			rep.Join.MissingOutcome++
		}
	}
	s, err := d.sample(t)
	if err != nil {
		return nil, err
	}
	rep.N = len(s.y)
	rep.Join.AnalysedOutcome = len(s.y)
	rep.StrataFE = s.nStrata > 1
	// The re-draws run beside the regression: together they keep both
	// cores busy.
	type riResult struct {
		p, obs []float64
		same   bool
		err    error
	}
	var ri chan riResult
	var stop atomic.Bool
	if spec.Permutations > 0 {
		ri = make(chan riResult, 1)
		go func() {
			var r riResult
			r.p, r.obs, r.same, r.err = s.randomization(d, &stop)
			ri <- r
		}()
	}
	fit, cols, err := s.fit()
	if err != nil {
		if ri != nil {
			stop.Store(true)
			<-ri
		}
		return nil, err
	}
	rep.Regressors = cols
	var pri []float64
	if ri != nil {
		r := <-ri
		if r.err != nil {
			return nil, r.err
		}
		if r.same {
			for k, o := range r.obs {
				if est := fit.Coef[1+k]; math.Abs(o-est) > 1e-8*math.Max(1, math.Abs(est)) {
					return nil, fmt.Errorf("randomization inference: the statistic %g disagrees with the regression's estimate %g", o, est)
				}
			}
		}
		pri = r.p
		rep.RIStatistic = RIEstimate
		if spec.Adjust == AdjustLin {
			rep.RIStatistic = RIResidualMeans
		}
	}
	ps := make([]float64, len(d.treatments))
	for k, arm := range d.treatments {
		ti := TInference(fit.Coef[1+k], fit.HC2[1+k], float64(fit.DF))
		e := Effect{Outcome: rep.Outcome, Arm: arm, N: s.count[k+1], NControl: s.count[0],
			MeanArm: s.rawMean[k+1], MeanControl: s.rawMean[0],
			Estimate: ti.Estimate, SE: ti.SE, T: ti.T, DF: ti.DF, P: ti.P, Low: ti.Low, High: ti.High, PRI: math.NaN()}
		if pri != nil {
			e.PRI = pri[k]
		}
		ps[k] = ti.P
		rep.Effects = append(rep.Effects, e)
	}
	for k, h := range Holm(ps) {
		rep.Effects[k].PHolm = h
	}
	rep.Balance, rep.Omnibus, err = d.balance(t)
	if err != nil {
		return nil, err
	}
	rep.Attrition, err = d.attrition()
	if err != nil {
		return nil, err
	}
	return rep, nil
}

// prepare checks the specification against the study and joins the file.
func prepare(study *arms.Study, units []Unit, t *Table, spec Spec) (*design, error) {
	var probs []string
	switch spec.Adjust {
	case "":
		spec.Adjust = AdjustNone
	case AdjustNone, AdjustPre, AdjustLin:
	default:
		probs = append(probs, fmt.Sprintf("--adjust must be none, pre or lin, not %q", spec.Adjust))
	}
	if spec.Pre == "" && (spec.Adjust == AdjustPre || spec.Change) {
		probs = append(probs, "--adjust pre and --change need the pre-treatment column: give it with --pre")
	}
	if spec.Permutations < 0 {
		probs = append(probs, fmt.Sprintf("--permutations must be 0 or more, not %d", spec.Permutations))
	}
	d := &design{study: study, spec: spec, armGroup: map[string]int{}, units: units}
	if len(spec.Control) == 0 {
		probs = append(probs, fmt.Sprintf("name the control arm(s) with --control (the arms are %s)", strings.Join(study.ArmOrder, ", ")))
	}
	for _, c := range spec.Control {
		if _, ok := study.Arms[c]; !ok {
			probs = append(probs, fmt.Sprintf("control arm %q does not exist in study %s; its arms are %s", c, study.ID, strings.Join(study.ArmOrder, ", ")))
			continue
		}
		d.armGroup[c] = 0
	}
	for _, a := range study.ArmOrder {
		if _, ok := d.armGroup[a]; !ok && !slices.Contains(spec.Control, a) {
			d.treatments = append(d.treatments, a)
			d.armGroup[a] = len(d.treatments)
		}
	}
	if len(spec.Control) > 0 && len(d.treatments) == 0 {
		probs = append(probs, "every arm is a control arm: leave at least one treatment arm out of --control")
	}
	if spec.ID == "" || spec.Outcome == "" {
		probs = append(probs, "give the id column with --id and the outcome column with --outcome")
	}
	if len(probs) > 0 {
		return nil, &InputError{Problems: probs}
	}
	idCol, err := t.Column(spec.ID)
	if err != nil {
		return nil, err
	}
	byRID := make(map[string]int, len(units))
	for i, u := range units {
		if _, ok := d.armGroup[u.Arm]; !ok {
			return nil, fmt.Errorf("session %s is in arm %q, which study %s does not declare", u.RID, u.Arm, study.ID)
		}
		byRID[u.RID] = i
	}
	d.row = make([]int, len(units))
	for i := range d.row {
		d.row[i] = -1
	}
	var empty, unknown, dups []string
	firstRow := map[string]int{}
	for r, rec := range t.Rows {
		id := rec[idCol]
		rn := t.RowNumbers[r]
		if id == "" {
			empty = append(empty, strconv.Itoa(rn))
			continue
		}
		if first, ok := firstRow[id]; ok {
			dups = append(dups, fmt.Sprintf("%q in rows %d and %d", id, first, rn))
			continue
		}
		firstRow[id] = rn
		u, ok := byRID[id]
		if !ok {
			if !spec.LeftOut[id] {
				unknown = append(unknown, fmt.Sprintf("row %d (%q)", rn, clip(id, 40)))
			}
			continue
		}
		d.row[u] = r
	}
	if len(empty) > 0 {
		probs = append(probs, fmt.Sprintf("%s: the id column %q is empty in rows %s", t.Name, spec.ID, listSome(empty, 10)))
	}
	if len(dups) > 0 {
		probs = append(probs, fmt.Sprintf("%s: duplicate ids: %s", t.Name, listSome(dups, 10)))
	}
	if len(unknown) > 0 {
		probs = append(probs, fmt.Sprintf("%s: %d id(s) match no session of study %s: %s", t.Name, len(unknown), study.ID, listSome(unknown, 10)))
	}
	if len(probs) > 0 {
		return nil, &InputError{Problems: probs}
	}
	if d.y, err = d.column(t, spec.Outcome); err != nil {
		return nil, err
	}
	if spec.Pre != "" {
		if d.pre, err = d.column(t, spec.Pre); err != nil {
			return nil, err
		}
	}
	return d, nil
}

// column reads a numeric outcome-file column into unit order (NaN where
// the unit has no row or the cell is empty).
func (d *design) column(t *Table, name string) ([]float64, error) {
	vals, err := t.Numbers(name)
	if err != nil {
		return nil, err
	}
	out := make([]float64, len(d.units))
	for i, r := range d.row {
		if r < 0 {
			out[i] = math.NaN()
		} else {
			out[i] = vals[r]
		}
	}
	return out, nil
}

// sample is the analysed respondents with everything the estimators need.
type sample struct {
	spec    Spec
	units   []int // index into design.units
	y       []float64
	pre     []float64
	group   []int
	stratum []int // index into strata
	strata  []string
	nStrata int
	covs    [][]float64 // Lin covariate columns (pre first when given), uncentered
	covName []string
	count   []int     // per group
	rawMean []float64 // per group, of y
	groups  int
	treat   []string // treatment arms, group 1 first
}

func (d *design) sample(t *Table) (*sample, error) {
	s := &sample{spec: d.spec, groups: len(d.treatments) + 1, treat: d.treatments}
	var missingPre []string
	for i := range d.units {
		if math.IsNaN(d.y[i]) {
			continue
		}
		if d.pre != nil && math.IsNaN(d.pre[i]) {
			missingPre = append(missingPre, strconv.Itoa(t.RowNumbers[d.row[i]]))
			continue
		}
		s.units = append(s.units, i)
	}
	if len(missingPre) > 0 {
		return nil, inputErr("%s: the pre-treatment column %q is empty in rows %s, where the outcome is present: fill them in or remove those rows", t.Name, d.spec.Pre, listSome(missingPre, 10))
	}
	if len(s.units) == 0 {
		return nil, inputErr("%s: no respondent has both a session and an outcome", t.Name)
	}
	s.count = make([]int, s.groups)
	s.rawMean = make([]float64, s.groups)
	stratumIdx := map[string]int{}
	for _, k := range d.study.StrataKeys() {
		stratumIdx[k] = len(s.strata)
		s.strata = append(s.strata, k)
	}
	present := map[int]bool{}
	for _, i := range s.units {
		u := d.units[i]
		g := d.armGroup[u.Arm]
		y := d.y[i]
		if d.spec.Change {
			y -= d.pre[i]
		}
		s.y = append(s.y, y)
		if d.pre != nil {
			s.pre = append(s.pre, d.pre[i])
		}
		s.group = append(s.group, g)
		s.count[g]++
		s.rawMean[g] += y
		si, ok := stratumIdx[u.Stratum]
		if !ok {
			si = len(s.strata)
			stratumIdx[u.Stratum] = si
			s.strata = append(s.strata, u.Stratum)
		}
		s.stratum = append(s.stratum, si)
		present[si] = true
	}
	s.nStrata = len(present)
	if len(d.study.Strata) == 0 {
		s.nStrata = 1 // an unstratified design has no stratum fixed effects
	}
	var small []string
	for g := range s.groups {
		if s.count[g] < 2 {
			name := "the pooled control (" + strings.Join(d.spec.Control, ", ") + ")"
			if g > 0 {
				name = "arm " + strconv.Quote(d.treatments[g-1])
			}
			small = append(small, fmt.Sprintf("%s has %d respondent(s) with an outcome; at least 2 are needed", name, s.count[g]))
		}
		s.rawMean[g] /= float64(max(s.count[g], 1))
	}
	if len(small) > 0 {
		return nil, &InputError{Problems: small}
	}
	if d.spec.Adjust == AdjustLin {
		if s.pre != nil {
			s.covs = append(s.covs, s.pre)
			s.covName = append(s.covName, d.spec.Pre)
		}
		for _, name := range d.spec.Covariates {
			cols, names, err := d.covariateColumns(t, name, s.units)
			if err != nil {
				return nil, err
			}
			s.covs = append(s.covs, cols...)
			s.covName = append(s.covName, names...)
		}
	}
	return s, nil
}

// covariateColumns expands a covariate over the given units: an integer
// study covariate or a numeric file column is one column; a choice
// covariate is one indicator per level after the first present one.
func (d *design) covariateColumns(t *Table, name string, units []int) ([][]float64, []string, error) {
	if c, ok := d.study.Covariate(name); ok {
		var missing []string
		vals := make([]string, len(units))
		for j, i := range units {
			v := d.units[i].Covariates[name]
			if v == "" {
				missing = append(missing, d.units[i].RID)
			}
			vals[j] = v
		}
		if len(missing) > 0 {
			return nil, nil, inputErr("covariate %q is missing for %d analysed respondent(s): %s", name, len(missing), listSome(missing, 10))
		}
		switch c.Type {
		case arms.TypeInteger:
			col := make([]float64, len(units))
			for j, v := range vals {
				n, err := strconv.ParseFloat(v, 64)
				if err != nil {
					return nil, nil, fmt.Errorf("covariate %q of respondent %s: %w", name, d.units[units[j]].RID, err)
				}
				col[j] = n
			}
			return [][]float64{col}, []string{name}, nil
		case arms.TypeChoice:
			seen := map[string]bool{}
			for _, v := range vals {
				seen[v] = true
			}
			var cols [][]float64
			var names []string
			first := true
			for _, level := range c.Values {
				if !seen[level] {
					continue
				}
				if first {
					first = false
					continue
				}
				col := make([]float64, len(units))
				for j, v := range vals {
					if v == level {
						col[j] = 1
					}
				}
				cols = append(cols, col)
				names = append(names, name+"="+level)
			}
			return cols, names, nil
		default:
			return nil, nil, inputErr("covariate %q is free text, which cannot adjust an estimate; use a choice or integer covariate", name)
		}
	}
	all, err := t.Numbers(name)
	if err != nil {
		return nil, nil, inputErr("covariate %q is neither a covariate of study %s nor a usable outcome-file column: %v", name, d.study.ID, err)
	}
	col := make([]float64, len(units))
	var missing []string
	for j, i := range units {
		col[j] = all[d.row[i]]
		if math.IsNaN(col[j]) {
			missing = append(missing, strconv.Itoa(t.RowNumbers[d.row[i]]))
		}
	}
	if len(missing) > 0 {
		return nil, nil, inputErr("%s: covariate column %q is empty in rows %s, where the outcome is present", t.Name, name, listSome(missing, 10))
	}
	return [][]float64{col}, []string{name}, nil
}

// strataColumns are indicators of every stratum present but the first.
func (s *sample) strataColumns() ([][]float64, []string) {
	if s.nStrata < 2 {
		return nil, nil
	}
	present := make([]bool, len(s.strata))
	for _, si := range s.stratum {
		present[si] = true
	}
	var cols [][]float64
	var names []string
	first := true
	for si, ok := range present {
		if !ok {
			continue
		}
		if first {
			first = false
			continue
		}
		col := make([]float64, len(s.y))
		for i, v := range s.stratum {
			if v == si {
				col[i] = 1
			}
		}
		cols = append(cols, col)
		names = append(names, "stratum "+s.strata[si])
	}
	return cols, names
}

// adjusters are the columns beside the arm indicators: for none and pre
// they enter additively; for Lin they are centered and interacted.
func (s *sample) adjusters() ([][]float64, []string) {
	sc, sn := s.strataColumns()
	switch s.spec.Adjust {
	case AdjustPre:
		return append([][]float64{s.pre}, sc...), append([]string{s.spec.Pre}, sn...)
	case AdjustLin:
		return append(slices.Clone(s.covs), sc...), append(slices.Clone(s.covName), sn...)
	}
	return sc, sn
}

// fit builds the regression and fits it.
func (s *sample) fit() (*Fit, []string, error) {
	adj, adjNames := s.adjusters()
	if s.spec.Adjust == AdjustLin && len(adj) == 0 {
		return nil, nil, inputErr("--adjust lin needs at least one covariate: give --pre or --covariates")
	}
	k := s.groups - 1
	n := len(s.y)
	names := []string{"(intercept)"}
	for g := 1; g <= k; g++ {
		names = append(names, "arm "+s.treat[g-1])
	}
	ncol := 1 + k + len(adj)
	if s.spec.Adjust == AdjustLin {
		ncol += k * len(adj)
	}
	x := mat.NewDense(n, ncol, nil)
	centered := make([][]float64, len(adj))
	for j, col := range adj {
		c := col
		if s.spec.Adjust == AdjustLin {
			m := accurateMean(col)
			c = make([]float64, n)
			for i, v := range col {
				c[i] = v - m
			}
		}
		centered[j] = c
	}
	for i := range n {
		row := x.RawRowView(i)
		row[0] = 1
		if g := s.group[i]; g > 0 {
			row[g] = 1
		}
		for j, c := range centered {
			row[1+k+j] = c[i]
		}
		if s.spec.Adjust == AdjustLin {
			if g := s.group[i]; g > 0 {
				base := 1 + k + len(adj) + (g-1)*len(adj)
				for j, c := range centered {
					row[base+j] = c[i]
				}
			}
		}
	}
	names = append(names, adjNames...)
	if s.spec.Adjust == AdjustLin {
		for g := 1; g <= k; g++ {
			for _, a := range adjNames {
				names = append(names, "arm "+s.treat[g-1]+" × "+a)
			}
		}
	}
	f, err := OLS(x, s.y, names)
	if err != nil {
		return nil, nil, err
	}
	return f, names, nil
}
