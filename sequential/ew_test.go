package sequential

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// eps is the float64 machine epsilon, 2^-52.
const eps = 0x1p-52

// TestExpWeibullSciPy compares LogProb, CDF, LogCDF with
// scipy.stats.exponweib(a, c=k, scale=s).logpdf, .cdf, .logcdf from SciPy
// 1.10.1 (Debian python3-scipy 1.10.1-2), table testdata/ref/exponweib.csv.
func TestExpWeibullSciPy(t *testing.T) {
	t.Parallel()
	const (
		// Both sides evaluate the same closed form (model section 2) with
		// a few correctly rounded operations each; 1e-12 (~4500 eps)
		// leaves room for the different order of operations (SciPy
		// computes (x/s)**c by pow, Go by exp(k log(x/s))), whose error
		// grows with |k log(x/s)| <= 21 on this grid.
		relTol = 1e-12
		// log f is a sum of O(1) terms; near its zero crossing a relative
		// measure is meaningless, so an absolute floor of the same size.
		logpdfAbs = 1e-12
		// SciPy 1.10.1 has no exponweib._logcdf: logcdf is log(cdf), whose
		// absolute error is that of cdf relative, a few eps. Where cdf is
		// near 1 its logcdf (e.g. -2e-10) is only good to ~1e-6
		// relatively, so there the check is absolute: 1e-15 (~4.5 eps).
		logcdfAbs = 1e-15
	)
	var maxLogpdf, maxCDF, maxLogCDF float64
	for _, r := range readRefTable(t, "exponweib.csv") {
		d := ExpWeibull{A: r.float(t, "a"), K: r.float(t, "k"), S: r.float(t, "s")}
		x := r.float(t, "x")
		check := func(name string, got, want, rel, abs float64, worst *float64) {
			t.Helper()
			*worst = math.Max(*worst, math.Abs(got-want)/math.Max(rel*math.Abs(want), abs))
			if !closeRel(got, want, rel, abs) {
				t.Errorf("line %d: %+v.%s(%v) = %.17g, SciPy 1.10.1 says %.17g (rel err %.2g)",
					r.line, d, name, x, got, want, relErr(got, want))
			}
		}
		check("LogProb", d.LogProb(x), r.float(t, "logpdf"), relTol, logpdfAbs, &maxLogpdf)
		check("CDF", d.CDF(x), r.float(t, "cdf"), relTol, 0, &maxCDF)
		check("LogCDF", d.LogCDF(x), r.float(t, "logcdf"), relTol, logcdfAbs, &maxLogCDF)
		// Survival is 1 - CDF by expm1; the two must add to 1 within the
		// rounding of one exp and one expm1 (a few eps).
		if s := d.Survival(x) + d.CDF(x); math.Abs(s-1) > 4*eps {
			t.Errorf("line %d: %+v: Survival + CDF at %v = 1 %+.3g", r.line, d, x, s-1)
		}
	}
	t.Logf("largest error against SciPy as a fraction of its tolerance: logpdf %.2g, cdf %.2g, logcdf %.2g", maxLogpdf, maxCDF, maxLogCDF)
}

// TestExpWeibullQuantileSciPy compares Quantile with
// scipy.stats.exponweib(a, c=k, scale=s).ppf(u) from SciPy 1.10.1, table
// testdata/ref/exponweib_ppf.csv, and checks F(Q(u)) = u.
func TestExpWeibullQuantileSciPy(t *testing.T) {
	t.Parallel()
	var worst, worstFrac float64
	for _, r := range readRefTable(t, "exponweib_ppf.csv") {
		a, k := r.float(t, "a"), r.float(t, "k")
		d := ExpWeibull{A: a, K: k, S: r.float(t, "s")}
		u, want := r.float(t, "u"), r.float(t, "ppf")
		got := d.Quantile(u)
		// SciPy evaluates s*(-log1p(-v))^(1/k) with v = u^(1/a). The
		// rounding of v (relative eps) is amplified in w = -log1p(-v) by
		// v/((1-v) w), and in w^(1/k) by 1/k: near u = 1 with large a,
		// 1-v is small and SciPy loses digits (model section 6). The
		// tolerance is that condition number times 8 eps, plus 1e-13 for
		// the evaluation error of both sides.
		v := math.Pow(u, 1/a)
		w := -math.Log1p(-v)
		tol := 1e-13 + 8*eps*(1+v/((1-v)*w*k))
		e := relErr(got, want)
		if e > tol {
			t.Errorf("line %d: %+v.Quantile(%v) = %.17g, SciPy 1.10.1 ppf says %.17g (rel err %.2g > %.2g)",
				r.line, d, u, got, want, e, tol)
		}
		worst, worstFrac = math.Max(worst, e), math.Max(worstFrac, e/tol)
		// Round trip the other way: CDF is well conditioned at Q(u)
		// (relative change of F = x f/F times that of x, at most a*k
		// for small x and tiny in the tail), so F(Q(u)) = u to ~1e-13.
		if back := d.CDF(got); !closeRel(back, u, 1e-13, 0) {
			t.Errorf("%+v: CDF(Quantile(%v)) = %.17g", d, u, back)
		}
	}
	t.Logf("largest relative difference from SciPy ppf: %.2g (%.2g of its tolerance)", worst, worstFrac)
}

// TestExpWeibullRoundTrip checks Q(F(x)) = x at the SciPy table's points.
func TestExpWeibullRoundTrip(t *testing.T) {
	t.Parallel()
	for _, r := range readRefTable(t, "exponweib.csv") {
		d := ExpWeibull{A: r.float(t, "a"), K: r.float(t, "k"), S: r.float(t, "s")}
		x := r.float(t, "x")
		u := d.CDF(x)
		if u == 1 {
			continue // F(x) rounds to 1: x cannot be recovered from u.
		}
		// Rounding u to float64 (relative eps) moves Q(u) by a relative
		// F/(x f) times that; 1e-13 (~450 eps) covers the evaluation of
		// F and Q, whose error grows like -log(u)/(a k) <= ~100 here.
		cond := u / (x * d.Prob(x))
		tol := 1e-13 * (1 + cond)
		if got := d.Quantile(u); relErr(got, x) > tol {
			t.Errorf("line %d: %+v: Quantile(CDF(%v)) = %.17g (rel err %.2g > %.2g)",
				r.line, d, x, got, relErr(got, x), tol)
		}
	}
}

// TestExpWeibullGonum checks the two special cases against gonum v0.17.0:
// ExpWeibull{1, k, s} is distuv.Weibull{K: k, Lambda: s}, and
// ExpWeibull{1, 1, s} is distuv.Exponential{Rate: 1/s}.
func TestExpWeibullGonum(t *testing.T) {
	t.Parallel()
	// gonum evaluates the same closed forms with a different order of
	// operations; a few eps per term on O(1)..O(30) terms: 1e-13 relative,
	// with an absolute floor 1e-13 where LogProb crosses zero.
	const tol = 1e-13
	xMult := []float64{1e-4, 0.05, 0.3, 0.7, 1, 1.6, 2.5, 4}
	// gonum's Quantile computes -log(1-p), which loses a relative eps/p
	// for small p; p >= 0.01 keeps that below 2.3e-14.
	ps := []float64{0.01, 0.3, 0.5, 0.9, 0.999}
	type lawPair struct {
		name string
		ref  interface {
			LogProb(float64) float64
			CDF(float64) float64
			Quantile(float64) float64
		}
		d ExpWeibull
	}
	var cases []lawPair
	for _, k := range []float64{0.6, 1, 2.2} {
		for _, s := range []float64{0.15, 0.3, 1} {
			cases = append(cases, lawPair{fmt.Sprintf("Weibull(k=%v,s=%v)", k, s), distuv.Weibull{K: k, Lambda: s}, ExpWeibull{A: 1, K: k, S: s}})
		}
	}
	for _, s := range []float64{0.15, 0.3, 1} {
		cases = append(cases, lawPair{fmt.Sprintf("Exponential(rate=1/%v)", s), distuv.Exponential{Rate: 1 / s}, ExpWeibull{A: 1, K: 1, S: s}})
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			for _, m := range xMult {
				x := m * c.d.S
				if got, want := c.d.LogProb(x), c.ref.LogProb(x); !closeRel(got, want, tol, tol) {
					t.Errorf("LogProb(%v) = %.17g, gonum says %.17g", x, got, want)
				}
				if got, want := c.d.CDF(x), c.ref.CDF(x); !closeRel(got, want, tol, 0) {
					t.Errorf("CDF(%v) = %.17g, gonum says %.17g", x, got, want)
				}
			}
			for _, p := range ps {
				if got, want := c.d.Quantile(p), c.ref.Quantile(p); !closeRel(got, want, tol, 0) {
					t.Errorf("Quantile(%v) = %.17g, gonum says %.17g", p, got, want)
				}
			}
		})
	}
}

// TestExpWeibullEdges checks the documented values at the ends of the
// support and the panic on a misused Quantile.
func TestExpWeibullEdges(t *testing.T) {
	t.Parallel()
	d := ExpWeibull{A: 2.5, K: 2.2, S: 0.3}
	for _, x := range []float64{0, -1} {
		if v := d.LogProb(x); !math.IsInf(v, -1) {
			t.Errorf("LogProb(%v) = %v, want -Inf", x, v)
		}
		if v := d.LogCDF(x); !math.IsInf(v, -1) {
			t.Errorf("LogCDF(%v) = %v, want -Inf", x, v)
		}
		if v := d.Survival(x); v != 1 {
			t.Errorf("Survival(%v) = %v, want 1", x, v)
		}
	}
	if v := d.CDF(math.Inf(1)); v != 1 {
		t.Errorf("CDF(+Inf) = %v, want 1", v)
	}
	if v := d.Quantile(0); v != 0 {
		t.Errorf("Quantile(0) = %v, want 0", v)
	}
	if v := d.Quantile(1); !math.IsInf(v, 1) {
		t.Errorf("Quantile(1) = %v, want +Inf", v)
	}
	for _, u := range []float64{-0.1, 1.1, math.NaN()} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("Quantile(%v) did not panic", u)
				}
			}()
			d.Quantile(u)
		}()
	}
}

// TestLog1mExp compares Log1mExp with the direct formula where that is
// safe, and with its series at both ends.
func TestLog1mExp(t *testing.T) {
	t.Parallel()
	tests := []struct {
		name string
		z    float64
		want float64
		tol  float64 // relative
	}{
		// Direct log(1 - exp(-z)) is safe for z in [0.1, 3]: the
		// subtraction 1 - exp(-z) loses at most log2(1/(1-exp(-0.1)))
		// ~ 3.3 bits, and the log of a number near 1 amplifies its
		// rounding by at most 1/|log(1-exp(-3))| ~ 20; 1e-13 (~450 eps)
		// is ample. (At z = 30 the direct form is off by ~2e-4.)
		{"direct 0.1", 0.1, math.Log(1 - math.Exp(-0.1)), 1e-13},
		{"direct 0.5", 0.5, math.Log(1 - math.Exp(-0.5)), 1e-13},
		{"direct 1", 1, math.Log(1 - math.Exp(-1)), 1e-13},
		{"direct 3", 3, math.Log(1 - math.Exp(-3)), 1e-13},
		// At the switch point, 1 - exp(-ln 2) = 1/2 exactly.
		{"ln2", math.Ln2, -math.Ln2, 2 * eps},
		// Small z: log(1-exp(-z)) = log z - z/2 + z^2/24 - z^4/2880 + ...
		// (Taylor series of log((1-exp(-z))/z), from memory, checked by
		// the direct formula at z = 0.1 above). Truncation after z^2 is
		// below z^4/2880, negligible at these z.
		{"series 1e-300", 1e-300, math.Log(1e-300) - 0.5e-300, 2 * eps},
		{"series 1e-20", 1e-20, math.Log(1e-20) - 0.5e-20, 2 * eps},
		{"series 1e-8", 1e-8, math.Log(1e-8) - 0.5e-8 + 1e-16/24, 4 * eps},
		{"series 1e-3", 1e-3, math.Log(1e-3) - 0.5e-3 + 1e-6/24, 4 * eps},
		// Large z: log1p(-e) = -e - e^2/2 - ..., e = exp(-z); e/2 relative
		// truncation is below 1e-17 for z >= 40.
		{"series 40", 40, -math.Exp(-40), 4 * eps},
		{"series 100", 100, -math.Exp(-100), 4 * eps},
		{"series 700", 700, -math.Exp(-700), 4 * eps},
	}
	for _, tc := range tests {
		if got := Log1mExp(tc.z); relErr(got, tc.want) > tc.tol {
			t.Errorf("%s: Log1mExp(%v) = %.17g, want %.17g (rel err %.2g > %.2g)",
				tc.name, tc.z, got, tc.want, relErr(got, tc.want), tc.tol)
		}
	}
	// Continuity across the switch point: the two branches agree to a
	// couple of eps on either side of ln 2.
	lo, hi := Log1mExp(math.Nextafter(math.Ln2, 0)), Log1mExp(math.Nextafter(math.Ln2, 1))
	if relErr(lo, hi) > 8*eps {
		t.Errorf("Log1mExp jumps at ln 2: %.17g, %.17g", lo, hi)
	}
	if v := Log1mExp(0); !math.IsInf(v, -1) {
		t.Errorf("Log1mExp(0) = %v, want -Inf", v)
	}
	if v := Log1mExp(math.Inf(1)); v != 0 {
		t.Errorf("Log1mExp(+Inf) = %v, want 0", v)
	}
	for _, z := range []float64{-1e-300, -1, math.NaN()} {
		if v := Log1mExp(z); !math.IsNaN(v) {
			t.Errorf("Log1mExp(%v) = %v, want NaN", z, v)
		}
	}
}

// TestExpWeibullMaxHarmonic draws the maximum of L iid Exponential(1)
// values as one ExpWeibull{A: L, K: 1, S: 1} draw (the maximum of L iid
// ExpWeibull(1,1,1) is ExpWeibull(L,1,1)) and compares the sample mean
// with E[max] = H_L = sum_{i<=L} 1/i (David and Nagaraja, Order
// Statistics, 3rd ed.: by Renyi's representation the maximum is
// sum_i E_i/i with E_i iid Exp(1), so Var[max] = sum_i 1/i^2).
func TestExpWeibullMaxHarmonic(t *testing.T) {
	t.Parallel()
	const m = 200000
	for i, l := range []int{1, 5, 10, 40} {
		t.Run(fmt.Sprintf("L=%d", l), func(t *testing.T) {
			t.Parallel()
			src := rand.New(rand.NewPCG(20240611, uint64(i)))
			d := ExpWeibull{A: float64(l), K: 1, S: 1}
			var sum float64
			for range m {
				sum += d.Rand(src)
			}
			var h, v float64
			for j := 1; j <= l; j++ {
				h += 1 / float64(j)
				v += 1 / float64(j*j)
			}
			mean := sum / m
			// Four standard errors: a correct sampler fails with
			// probability ~6e-5 per L; the seed is fixed, so the outcome
			// is reproducible.
			se := math.Sqrt(v / m)
			if math.Abs(mean-h) > 4*se {
				t.Errorf("mean of max of %d Exp(1) = %.5f, want H_%d = %.5f (4 SE = %.5f)", l, mean, l, h, 4*se)
			}
		})
	}
}
