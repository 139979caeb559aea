package sequential

import "math"

// Log-space helpers shared by the updater and the samplers.

// maxOf returns the largest element of x (-Inf for an empty slice).
func maxOf(x []float64) float64 {
	m := math.Inf(-1)
	for _, v := range x {
		m = math.Max(m, v)
	}
	return m
}

// logSumExp returns log sum exp(x) for non-empty x.
func logSumExp(x []float64) float64 {
	m := maxOf(x)
	if math.IsInf(m, 0) {
		return m
	}
	sum := 0.0
	for _, v := range x {
		sum += math.Exp(v - m)
	}
	return m + math.Log(sum)
}

// log1pExp returns log(1 + e^x) without overflow.
func log1pExp(x float64) float64 {
	if x > 35 {
		return x
	}
	return math.Log1p(math.Exp(x))
}

// essAfter returns the effective sample size (sum w)^2 / sum w^2 of the
// log weights logw + incr (logw alone when incr is nil).
func essAfter(logw, incr []float64) float64 {
	at := func(p int) float64 {
		if incr == nil {
			return logw[p]
		}
		return logw[p] + incr[p]
	}
	m := math.Inf(-1)
	for p := range logw {
		m = math.Max(m, at(p))
	}
	var s, s2 float64
	for p := range logw {
		w := math.Exp(at(p) - m)
		s += w
		s2 += w * w
	}
	return s * s / s2
}

// logMeanExpWeighted returns log sum_p W_p exp(x_p) with W the
// normalised weights exp(logw).
func logMeanExpWeighted(logw, x []float64) float64 {
	mw := maxOf(logw)
	m := math.Inf(-1)
	for p := range x {
		m = math.Max(m, logw[p]-mw+x[p])
	}
	var num, den float64
	for p := range x {
		a := logw[p] - mw
		den += math.Exp(a)
		num += math.Exp(a + x[p] - m)
	}
	return m + math.Log(num) - math.Log(den)
}
