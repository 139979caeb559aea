package sequential

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
)

// TestExpectedExcessExponentialClosedForm: with a = 1 and k = 1 the
// kernel is Exponential with scale s, and with n = 0 the next value is
// the maximum of L of them, P(Y > x) = 1 - (1 - e^(-x/s))^L. Expanding
// the power by the binomial theorem and integrating term by term,
//
//	E[(Y - t)+] = s sum_{j=1..L} C(L, j) (-1)^(j+1) e^(-j t / s) / j
//
// (for L = 1 the memoryless s e^(-t/s)). Checked to 1e-6 relative (the
// quadrature's accuracy is about 1e-7).
func TestExpectedExcessExponentialClosedForm(t *testing.T) {
	t.Parallel()
	for _, s := range []float64{0.1, 0.3, 1} {
		for _, l := range []int{1, 3, 10} {
			for _, thr := range []float64{0.05, 0.25, 1.5} {
				d := MustDatum(nil, l)
				nv, ok := NewNextValue(Theta{LogA: 0, LogK: 0, LogS: math.Log(s)}, &d)
				if !ok {
					t.Fatal("no next value")
				}
				want, c := 0.0, 1.0
				for j := 1; j <= l; j++ {
					c = c * float64(l-j+1) / float64(j)
					sign := 1.0
					if j%2 == 0 {
						sign = -1
					}
					want += s * c * sign * math.Exp(-float64(j)*thr/s) / float64(j)
				}
				got := nv.ExpectedExcess(thr)
				if math.Abs(got-want) > 1e-6*want+1e-300 {
					t.Errorf("s %v, L %d, t %v: %.15g, want %.15g (rel err %.2g)", s, l, thr, got, want, math.Abs(got-want)/want)
				}
			}
		}
	}
}

// TestExpectedExcessQuadrature compares ExpectedExcess with gonum's
// quad.Fixed (Gauss-Legendre, 20000 nodes) of P(Y > x) over [t, y_n]
// when n >= 1, and over [t, 60 s] (where the tail is below 1e-30) when n =
// 0, for shapes k below and above 1 and powers a below and above 1, and
// checks the mixture is the weighted mean; tolerance 1e-6 relative.
func TestExpectedExcessQuadrature(t *testing.T) {
	t.Parallel()
	thetas := []Theta{
		{LogA: math.Log(0.6), LogK: math.Log(0.9), LogS: math.Log(0.25)},
		{LogA: math.Log(2.5), LogK: math.Log(2.5), LogS: math.Log(0.45)},
		{LogA: 0, LogK: math.Log(1.6), LogS: math.Log(0.06)},
	}
	data := []Datum{MustDatum(nil, 10), MustDatum([]float64{0.9}, 10), MustDatum([]float64{0.8, 0.5, 0.31}, 10), MustDatum([]float64{0.2}, 4)}
	for ti, th := range thetas {
		for di := range data {
			d := &data[di]
			nv, ok := NewNextValue(th, d)
			if !ok {
				t.Fatal("no next value")
			}
			for _, thr := range []float64{0.02, 0.25, 0.6} {
				upper := 60 * math.Exp(th.LogS) * math.Pow(60, 1/math.Exp(th.LogK))
				if d.N() > 0 {
					upper = d.Values()[d.N()-1]
				}
				want := 0.0
				if thr < upper {
					want = quad.Fixed(nv.Exceed, thr, upper, 20000, quad.Legendre{}, 0)
				}
				got := nv.ExpectedExcess(thr)
				if math.Abs(got-want) > 1e-6*math.Max(want, 1e-12) {
					t.Errorf("theta %d, datum %d, t %v: %.12g, quadrature %.12g", ti, di, thr, got, want)
				}
			}
		}
	}
	// The mixture of two draws, weights 1 : 3.
	d := &data[2]
	draws := []Draw{
		{LogWeight: 0, Labels: []uint16{0}, Segments: thetas[:1], Alpha: 1},
		{LogWeight: math.Log(3), Labels: []uint16{0}, Segments: thetas[1:2], Alpha: 1},
	}
	m := NextValueMixture(draws, []float64{0.25, 0.75}, d, 0)
	a, _ := NewNextValue(thetas[0], d)
	b, _ := NewNextValue(thetas[1], d)
	want := 0.25*a.ExpectedExcess(0.25) + 0.75*b.ExpectedExcess(0.25)
	if got := m.ExpectedExcess(0.25); math.Abs(got-want) > 1e-15 {
		t.Errorf("mixture %v, want %v", got, want)
	}
}

// TestMixedExpectedExcessSubsample: over more than excessDraws draws the
// mixture's expected excess is estimated from excessDraws of them by
// systematic resampling. Weights on three laws in the ratio 2 : 1 : 1
// (the rest tiny) are reproduced exactly, and over 256 draws of scattered
// kernels and random weights the estimate is within 10% of the full
// weighted mean.
func TestMixedExpectedExcessSubsample(t *testing.T) {
	t.Parallel()
	d := MustDatum([]float64{0.9, 0.5}, 10)
	const n = 256
	src := rand.New(rand.NewPCG(41, 7))
	draws := make([]Draw, n)
	thetas := make([]Theta, n)
	for p := range draws {
		thetas[p] = Theta{LogA: 0.6 * src.NormFloat64(), LogK: 0.3 * src.NormFloat64(), LogS: math.Log(0.2) + 0.4*src.NormFloat64()}
		draws[p] = Draw{Labels: []uint16{0}, Segments: thetas[p : p+1], Alpha: 1}
	}
	exact := func(w []float64) float64 {
		var s, ws float64
		for p, th := range thetas {
			nv, ok := NewNextValue(th, &d)
			if !ok {
				t.Fatal("no next value")
			}
			s += w[p] * nv.ExpectedExcess(0.25)
			ws += w[p]
		}
		return s / ws
	}
	// Three laws carry all but 1e-9 of the weight, 1/2, 1/4 and 1/4.
	w := make([]float64, n)
	for p := range w {
		w[p] = 1e-9 / n
	}
	w[10], w[100], w[200] = 0.5, 0.25, 0.25
	got := NextValueMixture(draws, w, &d, 0).ExpectedExcess(0.25)
	if want := exact(w); math.Abs(got-want) > 1e-6*want {
		t.Errorf("three heavy laws: %.9g, want %.9g", got, want)
	}
	// Random weights over all 256.
	for p := range w {
		w[p] = src.Float64()
	}
	got = NextValueMixture(draws, w, &d, 0).ExpectedExcess(0.25)
	if want := exact(w); math.Abs(got-want) > 0.1*want {
		t.Errorf("256 laws: %.6g, full mixture %.6g", got, want)
	} else {
		t.Logf("256 laws: subsample %.6g, full mixture %.6g (rel %.3g)", got, want, math.Abs(got-want)/want)
	}
}
