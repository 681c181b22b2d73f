package analysis

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"
)

// Fit is an ordinary least squares fit with classical and HC2 standard
// errors.
type Fit struct {
	Coef  []float64 // coefficients, in the order of the design's columns
	SE    []float64 // classical standard errors: sigma² (X'X)⁻¹
	HC2   []float64 // HC2 robust standard errors (MacKinnon and White 1985)
	N     int       // observations
	DF    int       // residual degrees of freedom, N minus the number of columns
	Sigma float64   // residual standard deviation
	RSS   float64   // residual sum of squares
	R2    float64   // R², against the mean when the design has an intercept
}

// OLS fits y on the columns of x by a Householder QR decomposition (gonum's
// mat.QR), which keeps ill-conditioned designs such as NIST's Longley
// accurate. Collinear columns are an error naming them by index; names, when
// given, name them instead.
func OLS(x *mat.Dense, y []float64, names []string) (*Fit, error) {
	n, k := x.Dims()
	if n != len(y) {
		return nil, fmt.Errorf("ols: %d rows of regressors but %d outcomes", n, len(y))
	}
	if n <= k {
		return nil, inputErr("the regression has %d observations for %d coefficients: too few observations", n, k)
	}
	var qr mat.QR
	qr.Factorize(x)
	var r mat.Dense
	qr.RTo(&r)
	for j := range k {
		colNorm := mat.Norm(x.ColView(j), 2)
		if colNorm == 0 || math.Abs(r.At(j, j)) <= 1e-10*colNorm {
			name := fmt.Sprintf("column %d", j+1)
			if j < len(names) {
				name = fmt.Sprintf("%q", names[j])
			}
			return nil, inputErr("the regression cannot separate %s from the columns before it (it is constant or collinear): drop a covariate or check the data", name)
		}
	}
	var b mat.VecDense
	if err := qr.SolveVecTo(&b, false, mat.NewVecDense(n, y)); err != nil {
		return nil, fmt.Errorf("ols: solve: %w", err)
	}
	// (X'X)⁻¹ = R⁻¹ R⁻ᵀ with R the k×k upper triangle.
	rt := mat.NewTriDense(k, mat.Upper, nil)
	for i := range k {
		for j := i; j < k; j++ {
			rt.SetTri(i, j, r.At(i, j))
		}
	}
	var rinv mat.TriDense
	if err := rinv.InverseTri(rt); err != nil {
		return nil, fmt.Errorf("ols: invert R: %w", err)
	}
	var xtxInv mat.Dense
	xtxInv.Mul(&rinv, rinv.T())

	f := &Fit{Coef: make([]float64, k), SE: make([]float64, k), HC2: make([]float64, k), N: n, DF: n - k}
	for j := range k {
		f.Coef[j] = b.AtVec(j)
	}
	// Residuals, leverages and the HC2 meat, in one pass: with z = x_i R⁻¹,
	// the leverage is |z|² and the HC2 covariance is R⁻¹ (Σ w z zᵀ) R⁻ᵀ.
	meat := mat.NewSymDense(k, nil)
	z := make([]float64, k)
	rinvRaw := rinv.RawTriangular()
	var rss float64
	for i := range n {
		row := x.RawRowView(i)
		fitted := 0.0
		for j, v := range row {
			fitted += v * f.Coef[j]
		}
		e := y[i] - fitted
		rss += e * e
		h := 0.0
		for c := range k {
			s := 0.0
			for j := 0; j <= c; j++ {
				s += row[j] * rinvRaw.Data[j*rinvRaw.Stride+c]
			}
			z[c] = s
			h += s * s
		}
		if h >= 1-1e-10 {
			return nil, inputErr("observation %d alone determines a coefficient (leverage 1), so its robust standard error is undefined: an arm or stratum is too small for the covariates", i+1)
		}
		w := e * e / (1 - h)
		for a := range k {
			za := w * z[a]
			for c := a; c < k; c++ {
				meat.SetSym(a, c, meat.At(a, c)+za*z[c])
			}
		}
	}
	var tmp, cov mat.Dense
	tmp.Mul(&rinv, meat)
	cov.Mul(&tmp, rinv.T())
	f.RSS = rss
	f.Sigma = math.Sqrt(rss / float64(f.DF))
	for j := range k {
		f.SE[j] = f.Sigma * math.Sqrt(xtxInv.At(j, j))
		f.HC2[j] = math.Sqrt(cov.At(j, j))
	}
	mean := 0.0
	for _, v := range y {
		mean += v
	}
	mean /= float64(n)
	tss := 0.0
	for _, v := range y {
		tss += (v - mean) * (v - mean)
	}
	f.R2 = 1 - rss/tss
	return f, nil
}

// TTest is the inference on one coefficient with a t reference distribution.
type TTest struct {
	Estimate, SE, T, P, Low, High float64
	DF                            float64
}

// TInference returns a two-sided p-value and a 95% confidence interval from
// the t distribution with df degrees of freedom (gonum's distuv.StudentsT).
func TInference(est, se, df float64) TTest {
	t := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: df}
	q := t.Quantile(0.975)
	tv := est / se
	return TTest{Estimate: est, SE: se, T: tv, P: 2 * t.Survival(math.Abs(tv)), Low: est - q*se, High: est + q*se, DF: df}
}
