package sequential

import (
	"fmt"
	"math"
	"slices"

	"gonum.org/v1/gonum/stat/distuv"
)

// DecayBand is the posterior predictive law of a point segment's decay
// curve: for a typical member with L candidate competitors, the law of
// the j-th largest relative cross-elasticity, j = 1..L, mixed over the
// draws and the members' segment kernels in each draw.
type DecayBand struct {
	// L is the number of candidates the curve is drawn for: the most
	// common L_i among the segment's members (the larger on a tie).
	L int
	// Probs are the probabilities of the quantiles, as asked for.
	Probs []float64
	// Q[j-1][p] is the Probs[p]-quantile of the j-th largest of L
	// (relative cross-elasticity), found to 1e-9 relative accuracy.
	Q [][]float64
}

// OrderStatCDF returns P(Y_(j) <= x) for Y_(j) the j-th largest of l iid
// draws from ew, 1 <= j <= l: the chance that at most j-1 of the l draws
// exceed x, sum_{m<j} C(l,m) (1-F)^m F^(l-m) with F = ew.CDF(x) (David
// and Nagaraja, "Order Statistics", section 2.1). It equals the
// regularized incomplete beta I_F(l-j+1, j).
func OrderStatCDF(ew ExpWeibull, l, j int, x float64) float64 {
	if x <= 0 {
		return 0
	}
	logF := ew.LogCDF(x)
	return orderStatCDF(logF, l, j)
}

// orderStatCDF is OrderStatCDF from log F(x). The terms of the binomial
// sum are built from the first, F^l, by the ratio of neighbours
// (l-m)/(m+1) (1-F)/F, so one evaluation costs two exponentials whatever
// j is.
func orderStatCDF(logF float64, l, j int) float64 {
	if logF >= 0 {
		return 1
	}
	if math.IsInf(logF, -1) {
		return 0
	}
	odds := math.Exp(Log1mExp(-logF) - logF) // (1-F)/F
	term := math.Exp(float64(l) * logF)      // m = 0: F^l
	s := term
	for m := 0; m+1 < j; m++ {
		term *= float64(l-m) / float64(m+1) * odds
		s += term
	}
	return min(s, 1)
}

// OrderStatQuantile returns the u-quantile of the j-th largest of l iid
// draws from ew: ew.Quantile(B) with B the u-quantile of Beta(l-j+1, j),
// the law of F(Y_(j)).
func OrderStatQuantile(ew ExpWeibull, l, j int, u float64) float64 {
	return ew.Quantile(distuv.Beta{Alpha: float64(l - j + 1), Beta: float64(j)}.Quantile(u))
}

// weightedKernel is one kernel of a decay mixture and its weight.
type weightedKernel struct {
	ew ExpWeibull
	w  float64
}

// DecayBands returns the decay band of each point segment c = 0..k-1 of
// partition, at the quantile probabilities probs (each in (0, 1)). In a
// draw of weight w_d each member of segment c contributes its kernel in
// that draw with weight w_d / |c|; equal kernels (copies made by
// resampling) are merged. The j-th largest's CDF is the mixture of
// OrderStatCDF over those kernels, and each quantile is found by
// bisection on log x between the smallest and largest per-kernel
// quantile, which bracket it.
//
// Errors wrap ErrDraws (no draws, bad weights, labels that do not match)
// or ErrConfig (probs outside (0, 1), a partition that does not match).
func DecayBands(draws []Draw, data []*Datum, partition []int, k int, probs []float64) ([]DecayBand, error) {
	if err := checkSummaryInput(draws, data); err != nil {
		return nil, err
	}
	if len(partition) != len(data) {
		return nil, fmt.Errorf("%w: partition of %d products for %d data", ErrConfig, len(partition), len(data))
	}
	for _, p := range probs {
		if !(p > 0 && p < 1) {
			return nil, fmt.Errorf("%w: decay band probability %v, want in (0, 1)", ErrConfig, p)
		}
	}
	w, err := normalizedWeights(draws)
	if err != nil {
		return nil, err
	}
	members := make([][]int, k)
	for i, c := range partition {
		if c < 0 || c >= k {
			return nil, fmt.Errorf("%w: product %d in segment %d of %d", ErrConfig, i, c, k)
		}
		members[c] = append(members[c], i)
	}
	out := make([]DecayBand, k)
	for c, mem := range members {
		out[c] = DecayBand{Probs: slices.Clone(probs)}
		if len(mem) == 0 {
			continue
		}
		l := typicalL(data, mem)
		mix := segmentKernels(draws, w, mem)
		out[c].L = l
		out[c].Q = make([][]float64, l)
		for j := 1; j <= l; j++ {
			row := make([]float64, len(probs))
			for p, u := range probs {
				row[p] = mixedOrderQuantile(mix, l, j, u)
			}
			out[c].Q[j-1] = row
		}
	}
	return out, nil
}

// typicalL returns the most common L among the members, the larger on a
// tie.
func typicalL(data []*Datum, mem []int) int {
	count := map[int]int{}
	best, bestN := 0, 0
	for _, i := range mem {
		l := data[i].L()
		count[l]++
		if n := count[l]; n > bestN || (n == bestN && l > best) {
			best, bestN = l, n
		}
	}
	return best
}

// segmentKernels collects the members' kernels over the draws, merging
// equal ones, in first-seen order.
func segmentKernels(draws []Draw, w []float64, mem []int) []weightedKernel {
	index := map[Theta]int{}
	var mix []weightedKernel
	share := 1 / float64(len(mem))
	for d, dr := range draws {
		if w[d] == 0 {
			continue
		}
		for _, i := range mem {
			t := dr.Segments[dr.Labels[i]]
			at, ok := index[t]
			if !ok {
				at = len(mix)
				index[t] = at
				mix = append(mix, weightedKernel{ew: t.EW()})
			}
			mix[at].w += w[d] * share
		}
	}
	return mix
}

// MixedOrderQuantile returns the u-quantile of the j-th largest of l
// draws from a kernel chosen with the given weights (normalised here):
// the inverse of sum_k w_k OrderStatCDF(kernel_k, l, j, x).
func MixedOrderQuantile(kernels []ExpWeibull, weights []float64, l, j int, u float64) float64 {
	mix := make([]weightedKernel, len(kernels))
	var s float64
	for i := range kernels {
		s += weights[i]
	}
	for i, ew := range kernels {
		mix[i] = weightedKernel{ew: ew, w: weights[i] / s}
	}
	return mixedOrderQuantile(mix, l, j, u)
}

func mixedOrderQuantile(mix []weightedKernel, l, j int, u float64) float64 {
	bq := distuv.Beta{Alpha: float64(l - j + 1), Beta: float64(j)}.Quantile(u)
	lo, hi := math.Inf(1), 0.0
	var wsum float64
	for _, m := range mix {
		q := m.ew.Quantile(bq)
		lo, hi = min(lo, q), max(hi, q)
		wsum += m.w
	}
	if hi <= lo || math.IsInf(hi, 1) || lo <= 0 {
		return hi
	}
	a, b := math.Log(lo), math.Log(hi)
	for b-a > 1e-10 {
		t := (a + b) / 2
		var cdf float64
		for _, m := range mix {
			cdf += m.w * orderStatCDF(m.ew.A*logGFromLogZ(m.ew.K*(t-math.Log(m.ew.S))), l, j)
		}
		if cdf/wsum < u {
			a = t
		} else {
			b = t
		}
	}
	return math.Exp((a + b) / 2)
}
