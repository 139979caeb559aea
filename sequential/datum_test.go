package sequential

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"sort"
	"testing"
)

// TestDatumSciPy compares ValueLogLik, LogLik and CountLogPred with the
// order-statistic log likelihood computed independently from SciPy 1.10.1
// (exponweib.logpdf, exponweib.logcdf, special.gammaln, binom.logpmf and
// betabinom.logpmf), table testdata/ref/datum_loglik.csv.
func TestDatumSciPy(t *testing.T) {
	t.Parallel()
	rows := readRefTable(t, "datum_loglik.csv")
	var sawShortL, sawLongL bool
	var worstValue, worstCount float64
	for _, r := range rows {
		l := r.int(t, "L")
		values := r.floats(t, "values")
		if len(values) != r.int(t, "n") {
			t.Fatalf("line %d: %d values, n = %d", r.line, len(values), r.int(t, "n"))
		}
		sawShortL = sawShortL || l <= 40
		sawLongL = sawLongL || l > 40
		d, err := NewDatum(values, l)
		if err != nil {
			t.Fatalf("line %d: %v", r.line, err)
		}
		th := Theta{LogA: math.Log(r.float(t, "a")), LogK: math.Log(r.float(t, "k")), LogS: math.Log(r.float(t, "s"))}
		// Both sides add up to ~60 terms of size up to ~100 (the largest is
		// (L-n) log F(y_n)), each correct to a few eps; Theta also stores
		// log a, log k, log s, so exp(log a) differs from a by an eps or
		// two. 1e-12 relative with a 1e-12 absolute floor (for values
		// near 0) covers both with room; observed errors are ~1e-14.
		const tol = 1e-12
		got, want := d.ValueLogLik(th), r.float(t, "value_loglik")
		worstValue = math.Max(worstValue, math.Abs(got-want)/math.Max(1, math.Abs(want)))
		if !closeRel(got, want, tol, tol) {
			t.Errorf("line %d: ValueLogLik = %.17g, SciPy says %.17g", r.line, got, want)
		}
		if got, want := d.LogLik(th, r.float(t, "p")), r.float(t, "loglik"); !closeRel(got, want, tol, tol) {
			t.Errorf("line %d: LogLik = %.17g, SciPy says %.17g", r.line, got, want)
		}
		a, b := r.int(t, "A"), r.int(t, "B")
		pa, pb := r.float(t, "prior_a"), r.float(t, "prior_b")
		// Differences of log-gamma (or log-beta) values of size up to
		// ~(A+B+L) log(A+B+L) ~ 7000 here: each carries an absolute error
		// of a few eps times that, so the tolerance scales with it.
		big := float64(a+b+l+2) * math.Log(float64(a+b+l+2))
		ctol := 1e-13 + 16*eps*big
		got, want = d.CountLogPred(a, a+b, pa, pb), r.float(t, "count_logpred")
		worstCount = math.Max(worstCount, math.Abs(got-want))
		if math.Abs(got-want) > ctol {
			t.Errorf("line %d: CountLogPred(%d, %d, %v, %v) = %.17g, SciPy betabinom says %.17g (diff %.2g > %.2g)",
				r.line, a, a+b, pa, pb, got, want, got-want, ctol)
		}
	}
	t.Logf("largest differences from SciPy: value part %.2g (relative, floor 1), count part %.2g (absolute)", worstValue, worstCount)
	if !sawShortL || !sawLongL {
		t.Errorf("table must hold L <= 40 and L > 40 to reach both branches of logBetaRatio")
	}
}

// TestValueLogLikMatchesExpWeibull recomputes the order-statistic density
// term by term from ExpWeibull (David and Nagaraja, Order Statistics, 3rd
// ed., section 2.2) for random segments and data over a wide range.
func TestValueLogLikMatchesExpWeibull(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(7, 11))
	prior := DefaultPrior()
	prior.LogA.Sigma, prior.LogK.Sigma = 1.5, 1.5 // reach extreme kernels
	for i := range 500 {
		th := prior.DrawTheta(src)
		ew := th.EW()
		y, l := randomTopValues(src, 60)
		d := MustDatum(y, l)
		want := orderStatLogDensity(ew, y, l)
		// Same algebra, different grouping of ~3n terms (the kernel sums
		// log x, z and log G before scaling): 1e-11 relative with a 1e-11
		// floor covers extreme kernels where the terms reach ~1e4.
		if got := d.ValueLogLik(th); !closeRel(got, want, 1e-11, 1e-11) {
			t.Errorf("case %d: theta %+v, L %d, y %v: ValueLogLik = %.17g, term-by-term %.17g", i, th, l, y, got, want)
		}
	}
}

// randomTopValues draws L in 1..maxL, n in 0..L and n values in
// [0.01, 1.51), sorted descending.
func randomTopValues(src *rand.Rand, maxL int) (y []float64, l int) {
	l = 1 + src.IntN(maxL)
	y = make([]float64, src.IntN(l+1))
	for j := range y {
		y[j] = 0.01 + 1.5*src.Float64()
	}
	sort.Sort(sort.Reverse(sort.Float64Slice(y)))
	return y, l
}

// orderStatLogDensity is the log density of y as the top n = len(y) order
// statistics of L iid draws from ew, term by term from ExpWeibull (David
// and Nagaraja, Order Statistics, 3rd ed., section 2.2):
//
//	log(L!/(L-n)!) + sum_m log f(y_m) + (L-n) log F(y_n);  0 for n = 0.
func orderStatLogDensity(ew ExpWeibull, y []float64, l int) float64 {
	n := len(y)
	if n == 0 {
		return 0
	}
	lgL, _ := math.Lgamma(float64(l + 1))
	lgLn, _ := math.Lgamma(float64(l - n + 1))
	out := lgL - lgLn + float64(l-n)*ew.LogCDF(y[n-1])
	for _, v := range y {
		out += ew.LogProb(v)
	}
	return out
}

// TestCountLogPredNormalised checks that the beta-binomial predictive sums
// to 1 over n = 0..L, on both sides of the L = 40 switch in logBetaRatio.
func TestCountLogPredNormalised(t *testing.T) {
	t.Parallel()
	tests := []struct {
		l, reported, considered int
		pa, pb                  float64
	}{
		{1, 0, 0, 1, 1},
		{10, 0, 0, 1, 1},
		{10, 7, 30, 1, 1},
		{10, 3, 4, 0.5, 2},
		{25, 130, 1000, 1, 1},
		{40, 12, 200, 1, 1},
		{41, 12, 200, 1, 1},
		{60, 0, 0, 1, 1},
		{60, 130, 1000, 1, 1},
		{200, 900, 4000, 0.5, 2},
	}
	for _, tc := range tests {
		t.Run(fmt.Sprintf("L=%d,A=%d,AB=%d", tc.l, tc.reported, tc.considered), func(t *testing.T) {
			t.Parallel()
			values := make([]float64, tc.l)
			for i := range values {
				values[i] = 1 / float64(i+1)
			}
			var sum float64
			for n := 0; n <= tc.l; n++ {
				d := MustDatum(values[:n], tc.l)
				sum += math.Exp(d.CountLogPred(tc.reported, tc.considered, tc.pa, tc.pb))
			}
			// Below L = 40 the product form is good to a few eps per term
			// (observed ~1e-14 on the sum), so 1e-13. Above, each term's log
			// carries ~eps times the log-gamma sizes (~4e4 at L = 200 with
			// A+B = 4000; observed 3e-12), so 1e-10.
			tol := 1e-13
			if tc.l > 40 {
				tol = 1e-10
			}
			if math.Abs(sum-1) > tol {
				t.Errorf("sum over n of exp(CountLogPred) = 1 %+.3g", sum-1)
			}
		})
	}
}

// TestLogBetaRatioBranches compares the rising-factorial product (L <= 40)
// with the log-beta difference it replaces, at the switch L = 40.
func TestLogBetaRatioBranches(t *testing.T) {
	t.Parallel()
	for _, ab := range [][2]float64{{1, 1}, {0.5, 2}, {13, 41}, {131, 871}} {
		for n := 0; n <= 40; n++ {
			got := logBetaRatio(ab[0], ab[1], n, 40)
			want := lbeta(ab[0]+float64(n), ab[1]+float64(40-n)) - lbeta(ab[0], ab[1])
			// lbeta at a+b ~ 1000 is ~5000 in size: its difference carries
			// ~1e-12 absolute error; the product form is far better.
			if math.Abs(got-want) > 1e-11 {
				t.Errorf("a=%v b=%v n=%d: product %.17g, lbeta %.17g", ab[0], ab[1], n, got, want)
			}
		}
	}
}

// TestNewDatum checks validation, the copy of the input and the accessors.
func TestNewDatum(t *testing.T) {
	t.Parallel()
	bad := []struct {
		name   string
		values []float64
		l      int
	}{
		{"not descending", []float64{0.3, 0.5}, 10},
		{"NaN", []float64{0.5, math.NaN()}, 10},
		{"+Inf", []float64{math.Inf(1)}, 10},
		{"-Inf", []float64{0.5, math.Inf(-1)}, 10},
		{"zero", []float64{0.5, 0}, 10},
		{"negative", []float64{-0.1}, 10},
		{"n > L", []float64{0.5, 0.4, 0.3}, 2},
		{"L = 0", nil, 0},
		{"L < 0", nil, -3},
		{"L too large", []float64{0.5}, MaxCompetitors + 1},
	}
	for _, tc := range bad {
		if _, err := NewDatum(tc.values, tc.l); !errors.Is(err, ErrDatum) {
			t.Errorf("%s: NewDatum(%v, %d) error = %v, want one wrapping ErrDatum", tc.name, tc.values, tc.l, err)
		}
	}
	good := []struct {
		name   string
		values []float64
		l      int
	}{
		{"none reported", nil, 1},
		{"ties", []float64{0.5, 0.5, 0.2}, 3},
		{"largest L", []float64{1.2}, MaxCompetitors},
	}
	for _, tc := range good {
		d, err := NewDatum(tc.values, tc.l)
		if err != nil {
			t.Errorf("%s: NewDatum(%v, %d): %v", tc.name, tc.values, tc.l, err)
			continue
		}
		if d.N() != len(tc.values) || d.L() != tc.l {
			t.Errorf("%s: N, L = %d, %d, want %d, %d", tc.name, d.N(), d.L(), len(tc.values), tc.l)
		}
	}
	in := []float64{0.9, 0.4}
	d := MustDatum(in, 10)
	in[0] = 7
	if d.Values()[0] != 0.9 {
		t.Errorf("NewDatum kept the caller's slice: Values()[0] = %v after the input changed", d.Values()[0])
	}
	empty := MustDatum(nil, 10)
	if v := empty.ValueLogLik(Theta{LogA: 0.3, LogK: -0.2, LogS: -1}); v != 0 {
		t.Errorf("ValueLogLik with n = 0 = %v, want 0", v)
	}
	func() {
		defer func() {
			if recover() == nil {
				t.Errorf("MustDatum with ascending values did not panic")
			}
		}()
		MustDatum([]float64{0.1, 0.2}, 10)
	}()
}

var benchSink float64

// BenchmarkValueLogLik scores one datum with n = 5 of L = 10 under one
// segment. The project target is <= 300 ns per call on one core.
func BenchmarkValueLogLik(b *testing.B) {
	d := MustDatum([]float64{1.1, 0.8, 0.8, 0.35, 0.05}, 10)
	th := Theta{LogA: math.Log(2.5), LogK: math.Log(2.2), LogS: math.Log(0.3)}
	var s float64
	for b.Loop() {
		s += d.ValueLogLik(th)
	}
	benchSink = s
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(d.N()), "ns/value")
}

// BenchmarkCountLogPred times the beta-binomial count term on both sides
// of the L = 40 switch.
func BenchmarkCountLogPred(b *testing.B) {
	for _, l := range []int{10, 60} {
		b.Run(fmt.Sprintf("L=%d", l), func(b *testing.B) {
			d := MustDatum([]float64{0.9, 0.6, 0.33, 0.2}, l)
			var s float64
			for b.Loop() {
				s += d.CountLogPred(130, 1000, 1, 1)
			}
			benchSink = s
		})
	}
}

// TestSizeCountLogPred checks the fused candidate term used by the
// Algorithm-8 placement against its two separate parts, log(size) and
// CountLogPred, on both sides of the L = 40 switch: a fused term that
// dropped the size or misplaced it in the product would fail.
func TestSizeCountLogPred(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(19, 23))
	for i := range 2000 {
		l := []int{1, 10, 40, 41, 60}[i%5]
		n := src.IntN(l + 1)
		y := make([]float64, n)
		for j := range y {
			y[j] = 1 - float64(j)/float64(n+1)
		}
		d := MustDatum(y, l)
		size := 1 + src.IntN(5000)
		considered := size * l
		reported := src.IntN(considered + 1)
		got := d.sizeCountLogPred(size, reported, considered, 1.5, 2.5)
		want := math.Log(float64(size)) + d.CountLogPred(reported, considered, 1.5, 2.5)
		if math.Abs(got-want) > 1e-12*math.Max(1, math.Abs(want)) {
			t.Errorf("L %d n %d size %d A %d of %d: fused %.17g, parts %.17g", l, n, size, reported, considered, got, want)
		}
	}
}
