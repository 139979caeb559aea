package sequential

import "math"

// NextValue is the law of the largest unreported relative
// cross-elasticity Y_(n+1) of a product, given its segment's kernel and
// its own smallest reported value (model section 2). Because the maximum
// of m iid ExpWeibull(a,k,s) draws is ExpWeibull(m a, k, s),
//
//	P(Y_(n+1) <= x) = (G(x) / G(y_n))^(a (L-n)),  0 < x <= y_n,  n >= 1
//	P(Y_(1)   <= x) = G(x)^(a L),                                 n = 0
//
// with G the Weibull CDF. The zero value is not valid.
type NextValue struct {
	k, logS float64
	power   float64 // a (L - n)
	capLogG float64 // log G(y_n); 0 when n = 0
	capX    float64 // y_n; +Inf when n = 0
}

// NewNextValue returns the next-value law for datum d under segment t.
// ok is false when n = L: every candidate was reported.
func NewNextValue(t Theta, d *Datum) (nv NextValue, ok bool) {
	n := d.N()
	if n >= d.L() {
		return NextValue{}, false
	}
	k := math.Exp(t.LogK)
	nv = NextValue{k: k, logS: t.LogS, power: math.Exp(t.LogA) * float64(d.L()-n), capX: math.Inf(1)}
	if n > 0 {
		nv.capX = d.values[n-1]
		nv.capLogG = logWeibullCDF(d.logY[n-1], k, t.LogS)
	}
	return nv, true
}

// LogCDF returns log P(Y_(n+1) <= x).
func (nv NextValue) LogCDF(x float64) float64 {
	if x <= 0 {
		return math.Inf(-1)
	}
	if x >= nv.capX {
		return 0
	}
	return nv.power * (logWeibullCDF(math.Log(x), nv.k, nv.logS) - nv.capLogG)
}

// CDF returns P(Y_(n+1) <= x).
func (nv NextValue) CDF(x float64) float64 { return math.Exp(nv.LogCDF(x)) }

// Exceed returns P(Y_(n+1) > t), the chance that the strongest competitor
// the refit did not report has a relative cross-elasticity above t.
func (nv NextValue) Exceed(t float64) float64 { return -math.Expm1(nv.LogCDF(t)) }

// Quantile returns x_u = s (-log(1 - G(y_n) u^(1/(a(L-n)))))^(1/k) for u in
// (0, 1]; it panics outside [0, 1].
func (nv NextValue) Quantile(u float64) float64 {
	if u < 0 || u > 1 || math.IsNaN(u) {
		panic("sequential: NextValue.Quantile: u outside [0, 1]")
	}
	if u == 0 {
		return 0
	}
	// lg = log(G(y_n) u^(1/power)) <= 0; -log(1 - exp(lg)) through
	// Log1mExp keeps digits at both ends.
	lg := nv.capLogG + math.Log(u)/nv.power
	w := -Log1mExp(-lg)
	x := math.Exp(nv.logS) * math.Pow(w, 1/nv.k)
	return math.Min(x, nv.capX)
}
