package sequential

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// drawMoments returns the sample mean and (unbiased) variance of m draws.
func drawMoments(m int, draw func() float64) (mean, variance float64) {
	// Welford's update: stable for the large m used here.
	var mu, s2 float64
	for i := 1; i <= m; i++ {
		x := draw()
		d := x - mu
		mu += d / float64(i)
		s2 += d * (x - mu)
	}
	return mu, s2 / float64(m-1)
}

// checkMoment fails when got is more than 4 standard errors from want.
// Four standard errors: a correct sampler fails with probability ~6e-5
// per check; the seeds are fixed, so the outcome is reproducible.
func checkMoment(t *testing.T, what string, got, want, se float64) {
	t.Helper()
	if math.Abs(got-want) > 4*se {
		t.Errorf("%s = %.5f, want %.5f (4 SE = %.5f)", what, got, want, 4*se)
	}
}

// TestGammaRand checks the mean and variance of gammaRand: Gamma(shape, 1)
// has mean = variance = shape, and central fourth moment
// 3 shape^2 + 6 shape (excess kurtosis 6/shape; moments of the gamma
// distribution, from memory), so the sample variance has standard error
// sqrt((2 shape^2 + 6 shape)/M).
func TestGammaRand(t *testing.T) {
	t.Parallel()
	const m = 200000
	for i, shape := range []float64{0.5, 1, 3.7} {
		t.Run(fmt.Sprintf("shape=%v", shape), func(t *testing.T) {
			t.Parallel()
			src := rand.New(rand.NewPCG(31, uint64(i)))
			mean, variance := drawMoments(m, func() float64 {
				x := gammaRand(src, shape)
				if !(x > 0) || math.IsInf(x, 0) {
					t.Fatalf("gammaRand(%v) = %v, want finite and > 0", shape, x)
				}
				return x
			})
			checkMoment(t, "mean", mean, shape, math.Sqrt(shape/m))
			checkMoment(t, "variance", variance, shape, math.Sqrt((2*shape*shape+6*shape)/m))
		})
	}
}

// TestBetaRand checks the mean of betaRand: Beta(a, b) has mean a/(a+b)
// and variance ab/((a+b)^2 (a+b+1)).
func TestBetaRand(t *testing.T) {
	t.Parallel()
	const m = 100000
	for i, ab := range [][2]float64{{1, 1}, {0.5, 2}, {3, 7}} {
		a, b := ab[0], ab[1]
		t.Run(fmt.Sprintf("a=%v,b=%v", a, b), func(t *testing.T) {
			t.Parallel()
			src := rand.New(rand.NewPCG(37, uint64(i)))
			mean, _ := drawMoments(m, func() float64 {
				x := betaRand(src, a, b)
				if !(x >= 0 && x <= 1) {
					t.Fatalf("betaRand(%v, %v) = %v outside [0, 1]", a, b, x)
				}
				return x
			})
			v := a * b / ((a + b) * (a + b) * (a + b + 1))
			checkMoment(t, "mean", mean, a/(a+b), math.Sqrt(v/m))
		})
	}
}

// TestDrawTheta checks the mean and spread of each log-parameter of
// DrawTheta against its normal base measure, for the default prior and a
// shifted one. For N(mu, sigma^2): the sample mean has standard error
// sigma/sqrt(M), the sample variance sigma^2 sqrt(2/(M-1)).
func TestDrawTheta(t *testing.T) {
	t.Parallel()
	const m = 50000
	shifted := DefaultPrior()
	shifted.LogA = Normal{Mu: -0.7, Sigma: 0.4}
	shifted.LogK = Normal{Mu: 0.5, Sigma: 2}
	shifted.LogS = Normal{Mu: math.Log(0.05), Sigma: 0.25}
	for i, p := range []Prior{DefaultPrior(), shifted} {
		t.Run(fmt.Sprint(i), func(t *testing.T) {
			t.Parallel()
			src := rand.New(rand.NewPCG(41, uint64(i)))
			draws := make([]Theta, m)
			for j := range draws {
				draws[j] = p.DrawTheta(src)
			}
			for _, c := range []struct {
				name string
				law  Normal
				get  func(Theta) float64
			}{
				{"log a", p.LogA, func(th Theta) float64 { return th.LogA }},
				{"log k", p.LogK, func(th Theta) float64 { return th.LogK }},
				{"log s", p.LogS, func(th Theta) float64 { return th.LogS }},
			} {
				j := 0
				mean, variance := drawMoments(m, func() float64 { j++; return c.get(draws[j-1]) })
				sd := c.law.Sigma
				checkMoment(t, c.name+" mean", mean, c.law.Mu, sd/math.Sqrt(m))
				checkMoment(t, c.name+" variance", variance, sd*sd, sd*sd*math.Sqrt(2.0/(m-1)))
			}
		})
	}
}

// TestDrawAlpha checks the mean of the concentration draw: Gamma(shape,
// rate) has mean shape/rate and variance shape/rate^2.
func TestDrawAlpha(t *testing.T) {
	t.Parallel()
	const m = 100000
	p := DefaultPrior()
	p.AlphaShape, p.AlphaRate = 2.5, 4
	src := rand.New(rand.NewPCG(43, 0))
	mean, _ := drawMoments(m, func() float64 { return p.DrawAlpha(src) })
	checkMoment(t, "alpha mean", mean, p.AlphaShape/p.AlphaRate, math.Sqrt(p.AlphaShape/(p.AlphaRate*p.AlphaRate)/m))
}

// TestLogBase compares LogBase with the sum of three gonum v0.17.0
// distuv.Normal log densities.
func TestLogBase(t *testing.T) {
	t.Parallel()
	p := DefaultPrior()
	p.LogK = Normal{Mu: 0.5, Sigma: 2}
	src := rand.New(rand.NewPCG(47, 0))
	for range 100 {
		th := p.DrawTheta(src)
		want := distuv.Normal{Mu: p.LogA.Mu, Sigma: p.LogA.Sigma}.LogProb(th.LogA) +
			distuv.Normal{Mu: p.LogK.Mu, Sigma: p.LogK.Sigma}.LogProb(th.LogK) +
			distuv.Normal{Mu: p.LogS.Mu, Sigma: p.LogS.Sigma}.LogProb(th.LogS)
		// Three quadratic terms and constants, each a few eps of O(10):
		// 1e-13 absolute.
		if got := p.LogBase(th); math.Abs(got-want) > 1e-13 {
			t.Errorf("LogBase(%+v) = %.17g, gonum Normal says %.17g", th, got, want)
		}
	}
}

// TestPriorValidate checks that DefaultPrior is valid and that each
// hyperparameter out of range is reported as ErrPrior.
func TestPriorValidate(t *testing.T) {
	t.Parallel()
	if err := DefaultPrior().Validate(); err != nil {
		t.Fatalf("DefaultPrior().Validate() = %v", err)
	}
	nan, inf := math.NaN(), math.Inf(1)
	tests := []struct {
		name  string
		apply func(*Prior)
	}{
		{"count_a zero", func(p *Prior) { p.CountA = 0 }},
		{"count_b negative", func(p *Prior) { p.CountB = -1 }},
		{"count_a NaN", func(p *Prior) { p.CountA = nan }},
		{"count_b Inf", func(p *Prior) { p.CountB = inf }},
		{"log_a sigma zero", func(p *Prior) { p.LogA.Sigma = 0 }},
		{"log_k sigma NaN", func(p *Prior) { p.LogK.Sigma = nan }},
		{"log_s sigma Inf", func(p *Prior) { p.LogS.Sigma = inf }},
		{"log_a mu NaN", func(p *Prior) { p.LogA.Mu = nan }},
		{"log_k mu -Inf", func(p *Prior) { p.LogK.Mu = -inf }},
		{"log_s mu Inf", func(p *Prior) { p.LogS.Mu = inf }},
		{"alpha shape negative", func(p *Prior) { p.AlphaShape = -2 }},
		{"alpha rate zero", func(p *Prior) { p.AlphaRate = 0 }},
		{"zero value", func(p *Prior) { *p = Prior{} }},
	}
	for _, tc := range tests {
		p := DefaultPrior()
		tc.apply(&p)
		if err := p.Validate(); !errors.Is(err, ErrPrior) {
			t.Errorf("%s: Validate() = %v, want an error wrapping ErrPrior", tc.name, err)
		}
	}
}
