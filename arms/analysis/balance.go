package analysis

import (
	"math"
	"strconv"

	"trialogue/arms"
)

// BalanceRow is one covariate (or one level of a choice covariate) in one
// arm: its mean or proportion, and the standardized mean difference against
// the pooled control.
type BalanceRow struct {
	Covariate string  `json:"covariate"`
	Level     string  `json:"level,omitempty"` // choice covariates: the level whose proportion this is
	Arm       string  `json:"arm"`             // an arm's name, or "control (pooled)"
	N         int     `json:"n"`
	Value     float64 `json:"value"` // mean, or proportion of the level
	SMD       float64 `json:"smd"`   // NaN for the control row
}

// BalanceTest is the omnibus test of one covariate across all arms.
type BalanceTest struct {
	Covariate string  `json:"covariate"`
	Test      string  `json:"test"` // "chi-square" or "anova F"
	Stat      float64 `json:"stat"`
	DF1       int     `json:"df1"`
	DF2       int     `json:"df2,omitempty"`
	P         float64 `json:"p"`
}

// PooledControl is how balance and attrition tables name the pooled control.
const PooledControl = "control (pooled)"

// balanceVar is one covariate over all assigned units.
type balanceVar struct {
	name    string
	choice  []string  // levels, for choice covariates
	text    []string  // per unit value for choice ("" missing)
	numbers []float64 // per unit value for numeric (NaN missing)
}

// balance tabulates the study's choice and integer covariates, the
// pre-treatment measure and any file covariates, over every assigned
// respondent who has a value: randomization balances the assigned, not
// only those who answered.
func (d *design) balance(t *Table) ([]BalanceRow, []BalanceTest, error) {
	var vars []balanceVar
	for _, c := range d.study.Covariates {
		switch c.Type {
		case arms.TypeChoice:
			v := balanceVar{name: c.Name, choice: c.Values, text: make([]string, len(d.units))}
			for i, u := range d.units {
				v.text[i] = u.Covariates[c.Name]
			}
			vars = append(vars, v)
		case arms.TypeInteger:
			v := balanceVar{name: c.Name, numbers: make([]float64, len(d.units))}
			for i, u := range d.units {
				v.numbers[i] = math.NaN()
				if s := u.Covariates[c.Name]; s != "" {
					if n, err := strconv.ParseFloat(s, 64); err == nil {
						v.numbers[i] = n
					}
				}
			}
			vars = append(vars, v)
		}
	}
	if d.pre != nil {
		vars = append(vars, balanceVar{name: d.spec.Pre, numbers: d.pre})
	}
	for _, name := range d.spec.Covariates {
		if _, ok := d.study.Covariate(name); ok || name == d.spec.Pre {
			continue
		}
		col, err := d.column(t, name)
		if err != nil {
			return nil, nil, err
		}
		vars = append(vars, balanceVar{name: name, numbers: col})
	}
	// Arms in declared order; the pooled control as the reference.
	armIdx := map[string]int{}
	for i, a := range d.study.ArmOrder {
		armIdx[a] = i
	}
	nArms := len(d.study.ArmOrder)
	var rows []BalanceRow
	var tests []BalanceTest
	for _, v := range vars {
		if v.choice != nil {
			// counts[arm][level], plus pooled control
			counts := make([][]float64, nArms)
			for a := range counts {
				counts[a] = make([]float64, len(v.choice))
			}
			ctrl := make([]float64, len(v.choice))
			levelIdx := map[string]int{}
			for l, s := range v.choice {
				levelIdx[s] = l
			}
			for i, u := range d.units {
				l, ok := levelIdx[v.text[i]]
				if !ok {
					continue
				}
				counts[armIdx[u.Arm]][l]++
				if d.armGroup[u.Arm] == 0 {
					ctrl[l]++
				}
			}
			ctrlN := sum(ctrl)
			for l, level := range v.choice {
				pc := ctrl[l] / ctrlN
				rows = append(rows, BalanceRow{Covariate: v.name, Level: level, Arm: PooledControl, N: int(ctrlN), Value: pc, SMD: math.NaN()})
				for _, a := range d.treatments {
					c := counts[armIdx[a]]
					n := sum(c)
					p := c[l] / n
					rows = append(rows, BalanceRow{Covariate: v.name, Level: level, Arm: a, N: int(n), Value: p,
						SMD: (p - pc) / math.Sqrt((p*(1-p)+pc*(1-pc))/2)})
				}
			}
			if cs, err := Independence(counts); err == nil {
				tests = append(tests, BalanceTest{Covariate: v.name, Test: "chi-square", Stat: cs.Stat, DF1: cs.DF, P: cs.P})
			}
			continue
		}
		byArm := make([][]float64, nArms)
		var ctrl []float64
		for i, u := range d.units {
			x := v.numbers[i]
			if math.IsNaN(x) {
				continue
			}
			byArm[armIdx[u.Arm]] = append(byArm[armIdx[u.Arm]], x)
			if d.armGroup[u.Arm] == 0 {
				ctrl = append(ctrl, x)
			}
		}
		mc, vc := meanVar(ctrl)
		rows = append(rows, BalanceRow{Covariate: v.name, Arm: PooledControl, N: len(ctrl), Value: mc, SMD: math.NaN()})
		for _, a := range d.treatments {
			m, va := meanVar(byArm[armIdx[a]])
			rows = append(rows, BalanceRow{Covariate: v.name, Arm: a, N: len(byArm[armIdx[a]]), Value: m,
				SMD: (m - mc) / math.Sqrt((va+vc)/2)})
		}
		var groups [][]float64
		for _, g := range byArm {
			if len(g) > 0 {
				groups = append(groups, g)
			}
		}
		if an, err := OneWay(groups); err == nil {
			tests = append(tests, BalanceTest{Covariate: v.name, Test: "anova F", Stat: an.F, DF1: an.DFBetween, DF2: an.DFWithin, P: an.P})
		}
	}
	return rows, tests, nil
}

func sum(v []float64) float64 {
	s := 0.0
	for _, x := range v {
		s += x
	}
	return s
}

// meanVar returns the mean and the sample variance (n−1 denominator).
func meanVar(v []float64) (float64, float64) {
	if len(v) == 0 {
		return math.NaN(), math.NaN()
	}
	m := accurateMean(v)
	if len(v) < 2 {
		return m, math.NaN()
	}
	ss := 0.0
	for _, x := range v {
		ss += (x - m) * (x - m)
	}
	return m, ss / float64(len(v)-1)
}

// AttritionRow is one arm's count of respondents at each stage.
type AttritionRow struct {
	Arm      string  `json:"arm"`
	Assigned int     `json:"assigned"`
	Finished int     `json:"finished"` // continued back to the survey
	Observed int     `json:"observed"` // have an outcome
	Share    float64 `json:"observed_share"`
}

// Attrition is the attrition table with the chi-square test of whether the
// share with an outcome differs by arm.
type Attrition struct {
	Rows []AttritionRow `json:"rows"`
	Test ChiSquare      `json:"test"`
	// Tested is false when the test cannot be computed (every arm observed
	// completely, or none at all).
	Tested bool `json:"tested"`
}

func (d *design) attrition() (Attrition, error) {
	var at Attrition
	idx := map[string]int{}
	for i, a := range d.study.ArmOrder {
		idx[a] = i
		at.Rows = append(at.Rows, AttritionRow{Arm: a})
	}
	for i, u := range d.units {
		r := &at.Rows[idx[u.Arm]]
		r.Assigned++
		if u.Finished {
			r.Finished++
		}
		if !math.IsNaN(d.y[i]) {
			r.Observed++
		}
	}
	table := make([][]float64, len(at.Rows))
	for i := range at.Rows {
		r := &at.Rows[i]
		r.Share = float64(r.Observed) / float64(max(r.Assigned, 1))
		table[i] = []float64{float64(r.Observed), float64(r.Assigned - r.Observed)}
	}
	if cs, err := Independence(table); err == nil {
		at.Test, at.Tested = cs, true
	}
	return at, nil
}
