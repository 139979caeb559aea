package sequential

import (
	"math"
	"testing"
)

// TestOrderStatAgainstSciPy checks the order-statistic CDF and the
// mixed quantile of decay bands against SciPy 1.10.1 (Debian
// python3-scipy), table testdata/ref/orderstat.csv written by
// testdata/ref/gen_orderstat.py: beta.cdf of exponweib.cdf, and
// exponweib.ppf of beta.ppf (one kernel) or brentq on the mixed CDF (two).
func TestOrderStatAgainstSciPy(t *testing.T) {
	t.Parallel()
	rows := readRefTable(t, "orderstat.csv")
	if len(rows) < 100 {
		t.Fatalf("reference table has %d rows", len(rows))
	}
	for _, r := range rows {
		ew1 := ExpWeibull{A: r.float(t, "a1"), K: r.float(t, "k1"), S: r.float(t, "s1")}
		ew2 := ExpWeibull{A: r.float(t, "a2"), K: r.float(t, "k2"), S: r.float(t, "s2")}
		w1 := r.float(t, "w1")
		l, j, u := r.int(t, "l"), r.int(t, "j"), r.float(t, "u")
		if got, want := OrderStatCDF(ew1, l, j, r.float(t, "x")), r.float(t, "cdf_x"); math.Abs(got-want) > 1e-12+1e-9*want {
			t.Errorf("line %d: OrderStatCDF(%+v, %d, %d) = %v, SciPy %v", r.line, ew1, l, j, got, want)
		}
		want := r.float(t, "q")
		var got float64
		if w1 == 1 {
			got = MixedOrderQuantile([]ExpWeibull{ew1}, []float64{1}, l, j, u)
			// The closed form must agree with the bisection.
			if cf := OrderStatQuantile(ew1, l, j, u); math.Abs(cf-want) > 1e-8*want {
				t.Errorf("line %d: OrderStatQuantile = %v, SciPy %v", r.line, cf, want)
			}
		} else {
			got = MixedOrderQuantile([]ExpWeibull{ew1, ew2}, []float64{w1, 1 - w1}, l, j, u)
		}
		// Tolerance: the bisection stops at 1e-10 in log x; SciPy's ppf
		// loses digits near u = 1 for large a (model.md section 6).
		if math.Abs(got-want) > 1e-8*want {
			t.Errorf("line %d: quantile u=%v of order %d of %d = %v, SciPy %v", r.line, u, j, l, got, want)
		}
	}
}

// TestOrderStatExponentialMinimum: the smallest of l iid Exponential(rate
// 1/s) is Exponential(rate l/s) (David and Nagaraja, section 2.1; EW with
// a = k = 1 is Exponential), so its u-quantile is -s log(1-u)/l; the
// largest has CDF (1-exp(-x/s))^l.
func TestOrderStatExponentialMinimum(t *testing.T) {
	t.Parallel()
	ew := ExpWeibull{A: 1, K: 1, S: 0.4}
	for _, l := range []int{1, 3, 10} {
		for _, u := range []float64{0.05, 0.5, 0.95} {
			want := -0.4 * math.Log1p(-u) / float64(l)
			if got := MixedOrderQuantile([]ExpWeibull{ew}, []float64{1}, l, l, u); math.Abs(got-want) > 1e-8*want {
				t.Errorf("minimum of %d, u=%v: %v, want %v", l, u, got, want)
			}
		}
		x := 0.3
		if got, want := OrderStatCDF(ew, l, 1, x), math.Pow(-math.Expm1(-x/0.4), float64(l)); math.Abs(got-want) > 1e-14 {
			t.Errorf("CDF of the maximum of %d at %v: %v, want %v", l, x, got, want)
		}
	}
}

// TestDecayBands: a segment whose members all sit in one kernel in every
// draw has the closed-form bands of that kernel; two segments keep apart;
// quantiles grow with the probability and fall with the order.
func TestDecayBands(t *testing.T) {
	t.Parallel()
	t1 := Theta{LogA: 0.2, LogK: 0.1, LogS: math.Log(0.3)}
	t2 := Theta{LogA: -0.3, LogK: 0.5, LogS: math.Log(0.08)}
	d10 := MustDatum([]float64{0.5, 0.3}, 10)
	d6 := MustDatum([]float64{0.1}, 6)
	data := []*Datum{&d10, &d10, &d10, &d6, &d6}
	draws := []Draw{
		{LogWeight: 0, Labels: []uint16{0, 0, 0, 1, 1}, Segments: []Theta{t1, t2}, Alpha: 1},
		{LogWeight: -0.5, Labels: []uint16{1, 1, 1, 0, 0}, Segments: []Theta{t2, t1}, Alpha: 1},
	}
	probs := []float64{0.05, 0.25, 0.5, 0.75, 0.95}
	bands, err := DecayBands(draws, data, []int{0, 0, 0, 1, 1}, 2, probs)
	if err != nil {
		t.Fatal(err)
	}
	if bands[0].L != 10 || bands[1].L != 6 || len(bands[0].Q) != 10 || len(bands[1].Q) != 6 {
		t.Fatalf("band sizes %d/%d, %d/%d", bands[0].L, len(bands[0].Q), bands[1].L, len(bands[1].Q))
	}
	for c, th := range []Theta{t1, t2} {
		b := bands[c]
		for j := 1; j <= b.L; j++ {
			for p, u := range probs {
				want := OrderStatQuantile(th.EW(), b.L, j, u)
				if got := b.Q[j-1][p]; math.Abs(got-want) > 1e-8*want {
					t.Errorf("segment %d order %d u=%v: %v, want %v", c, j, u, got, want)
				}
				if p > 0 && !(b.Q[j-1][p] > b.Q[j-1][p-1]) {
					t.Errorf("segment %d order %d: quantiles not increasing %v", c, j, b.Q[j-1])
				}
				if j > 1 && !(b.Q[j-1][p] < b.Q[j-2][p]) {
					t.Errorf("segment %d: order %d not below order %d at u=%v", c, j, j-1, u)
				}
			}
		}
	}
	if _, err := DecayBands(draws, data, []int{0, 0, 0, 1}, 2, probs); err == nil {
		t.Error("a short partition was accepted")
	}
	if _, err := DecayBands(draws, data, []int{0, 0, 0, 1, 1}, 2, []float64{1}); err == nil {
		t.Error("probability 1 was accepted")
	}
}
