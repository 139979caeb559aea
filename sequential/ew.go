package sequential

import (
	"math"
	"math/rand/v2"
)

// ExpWeibull is the exponentiated Weibull distribution (Mudholkar and
// Srivastava, 1993) on x > 0, the law of one latent relative
// cross-elasticity inside a segment:
//
//	G(x) = 1 - exp(-(x/S)^K)    (Weibull CDF)
//	F(x) = G(x)^A               (exponentiated Weibull CDF)
//
// A > 0 is the exponentiation power, K > 0 the Weibull shape and S > 0 the
// scale, in relative-elasticity units. A = 1 is the Weibull distribution;
// the maximum of m independent draws is ExpWeibull{m*A, K, S}.
type ExpWeibull struct {
	A, K, S float64
}

// Log1mExp returns log(1 - exp(-z)) for z > 0 without cancellation
// (Maechler 2012): log(-expm1(-z)) for z <= ln 2, log1p(-exp(-z)) above,
// each through the table-driven routines of fastmath.go. It returns -Inf
// for z == 0 and NaN for z < 0.
func Log1mExp(z float64) float64 {
	switch {
	case z < 0 || math.IsNaN(z):
		return math.NaN()
	case z <= math.Ln2:
		return logFast(-expm1Fast(-z))
	default:
		return log1pFast(-expFast(-z))
	}
}

// logWeibullCDF returns log G(x) = log(1 - exp(-(x/s)^k)) given log x.
func logWeibullCDF(logx, k, logs float64) float64 {
	return logGFromLogZ(k * (logx - logs))
}

// logGFromLogZ returns log(1 - exp(-z)) given t = log z. For z below
// 1e-13 it uses the series log z - z/2 (the next term, z^2/24, is below
// 1e-27), which stays finite where z itself underflows to 0 and
// Log1mExp(0) would give -Inf.
func logGFromLogZ(t float64) float64 {
	if t < -30 {
		return t - 0.5*expFast(t)
	}
	return Log1mExp(expFast(t))
}

// LogProb returns the log density at x; -Inf for x <= 0.
func (d ExpWeibull) LogProb(x float64) float64 {
	if x <= 0 {
		return math.Inf(-1)
	}
	lx := math.Log(x / d.S)
	t := d.K * lx
	return math.Log(d.A) + math.Log(d.K) - math.Log(d.S) + (d.K-1)*lx - math.Exp(t) + (d.A-1)*logGFromLogZ(t)
}

// Prob returns the density at x.
func (d ExpWeibull) Prob(x float64) float64 { return math.Exp(d.LogProb(x)) }

// LogCDF returns log F(x); -Inf for x <= 0.
func (d ExpWeibull) LogCDF(x float64) float64 {
	if x <= 0 {
		return math.Inf(-1)
	}
	return d.A * logGFromLogZ(d.K*math.Log(x/d.S))
}

// CDF returns F(x) = P(X <= x).
func (d ExpWeibull) CDF(x float64) float64 { return math.Exp(d.LogCDF(x)) }

// Survival returns 1 - F(x) computed without cancellation for small F.
func (d ExpWeibull) Survival(x float64) float64 { return -math.Expm1(d.LogCDF(x)) }

// Quantile returns Q(u) = S * (-log(1 - u^(1/A)))^(1/K) for u in [0, 1].
// It panics for u outside [0, 1], which is programmer misuse.
func (d ExpWeibull) Quantile(u float64) float64 {
	if u < 0 || u > 1 || math.IsNaN(u) {
		panic("sequential: ExpWeibull.Quantile: u outside [0, 1]")
	}
	// -log(1 - u^(1/A)) through Log1mExp keeps digits both when u^(1/A)
	// is near 1 and when it is tiny (where 1 - u^(1/A) rounds to 1).
	w := -Log1mExp(-math.Log(u) / d.A)
	return d.S * math.Pow(w, 1/d.K)
}

// Rand draws one value using src by inversion.
func (d ExpWeibull) Rand(src *rand.Rand) float64 {
	// u strictly inside (0, 1): Quantile(0) = 0 and Quantile(1) = +Inf
	// are not draws of a positive finite value.
	u := src.Float64()
	for u == 0 {
		u = src.Float64()
	}
	return d.Quantile(u)
}
