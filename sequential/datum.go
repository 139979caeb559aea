package sequential

import (
	"errors"
	"fmt"
	"math"
)

// ErrDatum reports a datum that breaks the rules of the model: values must
// be finite, positive and descending, and there can be no more of them
// than candidate competitors.
var ErrDatum = errors.New("sequential: invalid datum")

// MaxCompetitors is the largest number of candidate competitors L that a
// datum may declare.
const MaxCompetitors = 1000

// Datum is one product's refit result as the model sees it: the top n of
// L latent relative cross-elasticities, sorted descending, all > 0.
// Quantities shared by every segment that scores the datum are computed
// once in NewDatum. A Datum is immutable after construction and safe for
// concurrent use.
type Datum struct {
	values []float64
	logY   []float64
	l      int
	// logChoose = log C(L,n), the binomial coefficient of the count part;
	// logFall = log(L!/(L-n)!), the order-statistic constant of the value part.
	logChoose, logFall float64
}

// NewDatum validates and copies values (descending, finite, > 0) and
// the number of candidate competitors l (1 <= l <= MaxCompetitors,
// len(values) <= l). Errors wrap ErrDatum.
func NewDatum(values []float64, l int) (Datum, error) {
	if l < 1 || l > MaxCompetitors {
		return Datum{}, fmt.Errorf("%w: competitors %d outside 1..%d", ErrDatum, l, MaxCompetitors)
	}
	if len(values) > l {
		return Datum{}, fmt.Errorf("%w: %d values but only %d competitors considered", ErrDatum, len(values), l)
	}
	d := Datum{values: make([]float64, len(values)), logY: make([]float64, len(values)), l: l}
	for i, v := range values {
		if math.IsNaN(v) || math.IsInf(v, 0) || v <= 0 {
			return Datum{}, fmt.Errorf("%w: value %d is %v, want finite and > 0", ErrDatum, i, v)
		}
		if i > 0 && v > values[i-1] {
			return Datum{}, fmt.Errorf("%w: value %d (%v) exceeds value %d (%v), want descending", ErrDatum, i, v, i-1, values[i-1])
		}
		d.values[i] = v
		d.logY[i] = math.Log(v)
	}
	n := len(values)
	lgL, _ := math.Lgamma(float64(l + 1))
	lgLn, _ := math.Lgamma(float64(l - n + 1))
	lgn, _ := math.Lgamma(float64(n + 1))
	d.logFall = lgL - lgLn
	d.logChoose = lgL - lgLn - lgn
	return d, nil
}

// MustDatum is NewDatum for values known to be valid (tests, generators);
// it panics on error.
func MustDatum(values []float64, l int) Datum {
	d, err := NewDatum(values, l)
	if err != nil {
		panic(err)
	}
	return d
}

// N returns the number of reported values n.
func (d *Datum) N() int { return len(d.values) }

// L returns the number of candidate competitors considered.
func (d *Datum) L() int { return d.l }

// Values returns the reported values, descending. The slice is shared;
// callers must not modify it.
func (d *Datum) Values() []float64 { return d.values }

// Theta holds one segment's kernel parameters on the log scale: log of the
// exponentiation power a, of the Weibull shape k and of the scale s
// (relative-elasticity units). The report probability p is integrated out
// and never stored.
type Theta struct {
	LogA, LogK, LogS float64
}

// EW returns the exponentiated Weibull law of the segment.
func (t Theta) EW() ExpWeibull {
	return ExpWeibull{A: math.Exp(t.LogA), K: math.Exp(t.LogK), S: math.Exp(t.LogS)}
}

// kernel caches the transcendental functions of a Theta that every datum
// needs, so scoring a datum costs one exp and one log1mexp per value.
type kernel struct {
	a, k, logS, lnorm float64 // lnorm = log a + log k - log s
}

func (t Theta) kernel() kernel {
	return kernel{a: expFast(t.LogA), k: expFast(t.LogK), logS: t.LogS, lnorm: t.LogA + t.LogK - t.LogS}
}

// ValueLogLik returns the log density of the datum's values as the top n
// order statistics of L iid ExpWeibull draws (David and Nagaraja, Order
// Statistics, 3rd ed., section 2.2):
//
//	log(L!/(L-n)!) + sum_m log f(y_m) + (L-n) log F(y_n)
//
// It is 0 for n = 0.
func (d *Datum) ValueLogLik(t Theta) float64 {
	kn := t.kernel()
	return d.valueLogLik(&kn)
}

func (d *Datum) valueLogLik(kn *kernel) float64 {
	n := len(d.logY)
	if n == 0 {
		return 0
	}
	// sum_m log G(z_m) is taken as the log of a running product of the
	// G factors (each in (0, 1]), folded into logAcc before it could
	// underflow: one log per datum instead of one per value. The
	// table-driven expFast, expm1Fast and logFast (fastmath.go) are
	// within about half an ulp of the exact values.
	//
	// The values go in blocks of valueBlock, each in two passes: all the
	// z = exp(t) first, then all the G = 1 - exp(-z). Within a pass the
	// exponentials are independent, so the processor overlaps them; in
	// one pass each G would wait for its own z.
	//
	// Where t = k log(y/s) < -30, log G = t - z/2 (see logGFromLogZ), and
	// the value's terms (k-1) log(y/s) + (a-1) log G are summed as
	// (ak - 1) log(y/s) - (a-1) z/2: for a huge k the two products are
	// huge and nearly cancel, and summed apart they leave rounding errors
	// of the size of their magnitude (a kernel with k = e^40 once scored
	// +131,072 that way instead of about -100).
	const valueBlock = 16
	var sumLx, sumZ, logAcc, lgLast, tinyLx, tinyZ float64
	prod := 1.0
	var ts, zs [valueBlock]float64
	for lo := 0; lo < n; lo += valueBlock {
		ys := d.logY[lo:min(lo+valueBlock, n)]
		for i, ly := range ys {
			lx := ly - kn.logS
			t := kn.k * lx
			z := expFast(t)
			sumZ += z
			if t < -30 {
				tinyLx += lx
				tinyZ += z
			} else {
				sumLx += lx
			}
			ts[i], zs[i] = t, z
		}
		for i := range ys {
			t, z := ts[i], zs[i]
			if t < -30 {
				lgLast = t - 0.5*z
				continue
			}
			// G = 1 - exp(-z) by one expm1, accurate relative to G
			// both for small z and where G is near 1.
			g := -expm1Fast(-z)
			if lo+i == n-1 {
				lgLast = logFast(g)
			}
			prod *= g
			if prod < 1e-280 {
				logAcc += logFast(prod)
				prod = 1
			}
		}
	}
	sumLG := logAcc + logFast(prod)
	ll := d.logFall + float64(n)*kn.lnorm + (kn.k-1)*sumLx - sumZ + (kn.a-1)*sumLG + float64(d.l-n)*kn.a*lgLast
	if tinyLx != 0 {
		ll += (kn.a*kn.k-1)*tinyLx - (kn.a-1)*0.5*tinyZ
	}
	return ll
}

// valueSplit splits the datum's value log density (valueLogLik) at the
// kernel's k and s into the parts that do not and that do depend on a:
//
//	valueLogLik = rest + n log a + a g
//	rest = log(L!/(L-n)!) + n (log k - log s) + (k-1) sum_m log(y_m/s) - sum_m z_m - sum_m log G_m
//	g    = sum_m log G_m + (L-n) log G_n
//
// with z_m = (y_m/s)^k and G_m = 1 - exp(-z_m); logKS = log k - log s.
// For n = 0 both are 0.
func (d *Datum) valueSplit(kn *kernel, logKS float64) (rest, g float64) {
	n := len(d.logY)
	if n == 0 {
		return 0, 0
	}
	// Where t < -30, (k-1) log(y/s) - log G = -log(y/s) + z/2 is summed
	// in that form (see valueLogLik on the cancellation it avoids).
	var sumLx, sumZ, sumLG, lg, tiny float64
	for _, ly := range d.logY {
		lx := ly - kn.logS
		t := kn.k * lx
		z := math.Exp(t)
		sumZ += z
		if t < -30 {
			lg = t - 0.5*z // see logGFromLogZ
			tiny += -lx + 0.5*z
		} else {
			lg = Log1mExp(z)
			sumLx += lx
			sumLG += lg
		}
		g += lg
	}
	rest = d.logFall + float64(n)*logKS + (kn.k-1)*sumLx - sumZ - sumLG + tiny
	g += float64(d.l-n) * lg
	return rest, g
}

// LogLik returns the full log likelihood of the datum given the segment's
// kernel and report probability p in (0, 1): binomial count part plus the
// order-statistic value part (model section 2).
func (d *Datum) LogLik(t Theta, p float64) float64 {
	n := float64(len(d.values))
	return d.logChoose + n*math.Log(p) + (float64(d.l)-n)*math.Log1p(-p) + d.ValueLogLik(t)
}

// CountLogPred returns the log beta-binomial predictive probability of the
// datum's count n given a segment whose other members reported `reported`
// values out of `considered` candidates in total, under a Beta(pa, pb)
// prior on p:
//
//	C(L,n) B(pa+A+n, pb+B+L-n) / B(pa+A, pb+B),  A = reported, B = considered - reported
func (d *Datum) CountLogPred(reported, considered int, pa, pb float64) float64 {
	return d.logChoose + logBetaRatio(pa+float64(reported), pb+float64(considered-reported), len(d.values), d.l)
}

// sizeCountLogPred returns log(size) + CountLogPred(reported, considered,
// pa, pb): the CRP-weighted count term of an Algorithm-8 candidate, with
// one logarithm for both factors.
func (d *Datum) sizeCountLogPred(size, reported, considered int, pa, pb float64) float64 {
	return d.logChoose + logBetaRatioTimes(float64(size), pa+float64(reported), pb+float64(considered-reported), len(d.values), d.l)
}

// logBetaRatio returns log B(a+n, b+L-n) - log B(a, b).
func logBetaRatio(a, b float64, n, l int) float64 {
	return logBetaRatioTimes(1, a, b, n, l)
}

// logBetaRatioTimes returns log(scale) + log B(a+n, b+L-n) - log B(a, b)
// for scale >= 1.
func logBetaRatioTimes(scale, a, b float64, n, l int) float64 {
	if l <= 40 {
		// Rising factorials as one product: fewer transcendental calls
		// than six log-gamma evaluations. Each factor lies in (0, 1], and
		// for L <= 40 the product cannot underflow.
		r := scale
		ab := a + b
		for j := 0; j < n; j++ {
			r *= (a + float64(j)) / (ab + float64(j))
		}
		for j := 0; j < l-n; j++ {
			r *= (b + float64(j)) / (ab + float64(n+j))
		}
		return logFast(r)
	}
	return logFast(scale) + (lbeta(a+float64(n), b+float64(l-n)) - lbeta(a, b))
}

func lbeta(a, b float64) float64 {
	x, _ := math.Lgamma(a)
	y, _ := math.Lgamma(b)
	z, _ := math.Lgamma(a + b)
	return x + y - z
}
