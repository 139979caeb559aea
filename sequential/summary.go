package sequential

import (
	"fmt"
	"math"
	"sort"

	"gonum.org/v1/gonum/stat/distuv"
)

// SummaryOptions tunes Summarize. Start from DefaultSummaryOptions.
type SummaryOptions struct {
	// Threshold is the relative cross-elasticity t > 0 at which
	// NextSummary.PExceed = P(Y_(n+1) > t) is evaluated.
	Threshold float64
	// QuantileLo and QuantileHi, 0 < QuantileLo < QuantileHi < 1, are the
	// probabilities of the interval reported for the next value.
	QuantileLo, QuantileHi float64
	// MaxSweeps >= 0 bounds the sweeps of single-product moves that
	// improve the point partition; 0 keeps the best draw's partition.
	MaxSweeps int
	// Prior supplies the Beta(CountA, CountB) prior of the report
	// probability p used by SegmentSummary.MeanReported.
	Prior Prior
	// Workers is the number of goroutines over products for the
	// next-value summaries; 0 means GOMAXPROCS. Results do not depend on
	// it.
	Workers int
	// ExcessFrom, in [0, 1], is the least PExceed at which
	// NextSummary.Excess is computed (about a hundred evaluations of the
	// next-value law per draw); below it Excess is 0. Alerts need it only
	// for products whose probability passes their alert probability.
	ExcessFrom float64
}

// DefaultSummaryOptions returns threshold 0.25, the 10% to 90% interval,
// at most 50 improvement sweeps, DefaultPrior and ExcessFrom 0.4 (the
// lowest probability at which an alert stays in force under the default
// alert settings of package alerts: AlertProb 0.5 - RealertMargin 0.1).
func DefaultSummaryOptions() SummaryOptions {
	return SummaryOptions{Threshold: 0.25, QuantileLo: 0.1, QuantileHi: 0.9, MaxSweeps: 50, Prior: DefaultPrior(), ExcessFrom: 0.4}
}

// Validate reports the first option out of range; errors wrap ErrConfig
// (or ErrPrior for the prior).
func (o SummaryOptions) Validate() error {
	if !(o.Threshold > 0) || math.IsInf(o.Threshold, 1) {
		return fmt.Errorf("%w: summary threshold %v, want finite and > 0", ErrConfig, o.Threshold)
	}
	if !(o.QuantileLo > 0 && o.QuantileLo < o.QuantileHi && o.QuantileHi < 1) {
		return fmt.Errorf("%w: summary quantiles %v, %v, want 0 < lo < hi < 1", ErrConfig, o.QuantileLo, o.QuantileHi)
	}
	if o.MaxSweeps < 0 {
		return fmt.Errorf("%w: summary max sweeps %d, want >= 0", ErrConfig, o.MaxSweeps)
	}
	if !(o.ExcessFrom >= 0 && o.ExcessFrom <= 1) {
		return fmt.Errorf("%w: summary excess_from %v, want in [0, 1]", ErrConfig, o.ExcessFrom)
	}
	return o.Prior.Validate()
}

// Summary answers the questions of model section 5 from weighted draws.
// Products are indexed as in the data passed to Summarize; point segments
// are indexed 0..K-1 as in Partition.
type Summary struct {
	// Partition is the point segmentation: Partition[i] in 0..K-1 is
	// product i's segment, numbered by size (largest first), ties by
	// smallest member index. See PointPartition.
	Partition []int
	// Binder is the posterior expected Binder loss of Partition, in pairs
	// of products, in [0, N(N-1)/2].
	Binder float64
	// NumSegments[k] is the posterior probability that k segments are
	// occupied; the values sum to 1 and absent keys have probability 0.
	NumSegments map[int]float64
	// AlphaMean is the posterior mean of the concentration alpha (> 0).
	AlphaMean float64
	// ESS is the effective sample size of the weights, 1 / sum w_d^2, in
	// [1, number of draws].
	ESS float64
	// Membership[i][c] in [0, 1] is the mean posterior similarity of
	// product i to the members of point segment c other than i itself;
	// it is 1 when c is the singleton {i}. Rows need not sum to 1.
	Membership [][]float64
	// Segments[c] summarises point segment c.
	Segments []SegmentSummary
	// Next[i] is the predictive law of product i's strongest unreported
	// competitor.
	Next []NextSummary
}

// SegmentSummary is the decay summary of one point segment.
type SegmentSummary struct {
	// Members are the products of the segment, ascending.
	Members []int
	// Median[j-1], j = 1, 2, 3, is the weighted median over draws of the
	// mean, over the members with L_i >= j, of the median of the j-th
	// largest of L_i iid draws from the member's segment kernel in that
	// draw (relative cross-elasticity). The median over draws, not the
	// mean, because a draw that puts a member without reported values in
	// a segment of its own gives it a kernel from the base measure, whose
	// order-statistic medians can be astronomically large. NaN when no
	// member has L_i >= j.
	Median [3]float64
	// MeanReported is the posterior mean, over draws and members, of the
	// expected number of reported competitors L_i E[p | other data], with
	// E[p | other data] = (CountA + A) / (CountA + CountB + A + B) and A, B
	// the reported and unreported counts of the member's segment in that
	// draw without the member itself (the beta-binomial predictive mean of
	// model section 3). In [0, max L_i].
	MeanReported float64
}

// NextSummary is the posterior predictive of a product's largest
// unreported relative cross-elasticity Y_(n+1), mixed over draws.
type NextSummary struct {
	// Defined is false when n = L: every candidate was reported and there
	// is no next value. PExceed is then 0 and the quantiles NaN.
	Defined bool
	// Threshold is the relative cross-elasticity t of PExceed.
	Threshold float64
	// PExceed is P(Y_(n+1) > Threshold), in [0, 1].
	PExceed float64
	// Excess is E[(Y_(n+1) - Threshold)+] >= 0, the expected amount by
	// which the next value exceeds the threshold (relative
	// cross-elasticity; MixedNext.ExpectedExcess); 0 when undefined or
	// PExceed < SummaryOptions.ExcessFrom.
	Excess float64
	// Median, Lo and Hi are the 0.5, QuantileLo and QuantileHi quantiles
	// of Y_(n+1) (relative cross-elasticity, in (0, y_n] when n >= 1),
	// found to 1e-9 relative accuracy.
	Median, Lo, Hi float64
}

// Summarize computes the posterior summaries of model section 5 from
// weighted draws over the products data (Labels[i] of every draw refers
// to data[i]). Equal LogWeight gives the batch sampler's equal-weight
// average; particles pass their importance weights.
//
// Errors wrap ErrDraws (no draws, labels that do not match data or the
// draw's Segments, non-finite weights, alpha or segment parameters),
// ErrDatum (a nil datum) or ErrConfig/ErrPrior (options).
//
// Cost, with D draws, N products and K point segments: O(D'^2 N) to pick
// the starting partition (D' distinct partitions), O(D' K N) per
// improvement sweep, O(D N K) for membership and O(D N) per evaluation
// of the next-value mixtures, of which each product needs about twenty
// (three quantiles of about seven each). Memory is O(D' N + N K).
func Summarize(draws []Draw, data []*Datum, opt SummaryOptions) (Summary, error) {
	if err := opt.Validate(); err != nil {
		return Summary{}, err
	}
	if err := checkSummaryInput(draws, data); err != nil {
		return Summary{}, err
	}
	w, err := normalizedWeights(draws)
	if err != nil {
		return Summary{}, err
	}
	var sum Summary
	var sumSq, wsum float64
	for d, dr := range draws {
		sumSq += w[d] * w[d]
		wsum += w[d]
		sum.AlphaMean += w[d] * dr.Alpha
	}
	sum.AlphaMean /= wsum
	sum.ESS = wsum * wsum / sumSq

	parts := distinctPartitions(draws, w)
	sum.NumSegments = make(map[int]float64)
	for _, p := range parts {
		if p.w > 0 {
			sum.NumSegments[p.k] += p.w / wsum
		}
	}
	pairs := pairParts(draws, w, parts)
	sum.Partition = pointPartition(parts, pairs, opt.MaxSweeps)
	sum.Binder = expectedBinderParts(pairs, sum.Partition)
	k := 0
	for _, c := range sum.Partition {
		k = max(k, c+1)
	}
	sum.Membership = membership(pairs, sum.Partition, k)
	sum.Segments = segmentSummaries(draws, w, data, sum.Partition, k, opt.Prior)
	sum.Next = nextSummaries(draws, w, data, opt)
	return sum, nil
}

func checkSummaryInput(draws []Draw, data []*Datum) error {
	if len(draws) == 0 {
		return fmt.Errorf("%w: no draws", ErrDraws)
	}
	for i, d := range data {
		if d == nil {
			return fmt.Errorf("%w: datum %d is nil", ErrDatum, i)
		}
	}
	for d, dr := range draws {
		if len(dr.Labels) != len(data) {
			return fmt.Errorf("%w: draw %d labels %d products, want %d", ErrDraws, d, len(dr.Labels), len(data))
		}
		if !(dr.Alpha > 0) || math.IsInf(dr.Alpha, 1) {
			return fmt.Errorf("%w: draw %d has alpha %v, want finite and > 0", ErrDraws, d, dr.Alpha)
		}
		for i, l := range dr.Labels {
			if int(l) >= len(dr.Segments) {
				return fmt.Errorf("%w: draw %d puts product %d in segment %d of %d", ErrDraws, d, i, l, len(dr.Segments))
			}
			t := dr.Segments[l]
			if !finite(t.LogA) || !finite(t.LogK) || !finite(t.LogS) {
				return fmt.Errorf("%w: draw %d segment %d has parameters %+v", ErrDraws, d, l, t)
			}
		}
	}
	return nil
}

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }

// membership returns [i][c], the mean similarity of product i to the other
// members of point segment c, from the contingency rows of the draws
// against the partition.
func membership(parts []*drawPartition, partition []int, k int) [][]float64 {
	z := make([]int32, len(partition))
	for i, c := range partition {
		z[i] = int32(c)
	}
	s := newBinderSearch(parts, z, k)
	flat := make([]float64, len(partition)*k)
	out := make([][]float64, len(partition))
	s.beginScan()
	for i := range out {
		row := flat[i*k : (i+1)*k : (i+1)*k]
		s.enter(i)
		s.affinity(i)
		for c := range row {
			q, others := s.aff[c]/s.wsum, float64(s.size[c])
			if c == partition[i] {
				others--
			}
			if others == 0 {
				row[c] = 1
				continue
			}
			row[c] = min(max(q/others, 0), 1)
		}
		out[i] = row
	}
	return out
}

// segmentSummaries computes the members, order-statistic medians and mean
// reported counts of each point segment.
func segmentSummaries(draws []Draw, w []float64, data []*Datum, partition []int, k int, prior Prior) []SegmentSummary {
	segs := make([]SegmentSummary, k)
	for i, c := range partition {
		segs[c].Members = append(segs[c].Members, i)
	}
	medians := newOrderMedians()
	medDraw := make([][3]float64, k)   // this draw's sums over members
	perDraw := make([][3][]float64, k) // per segment and j, one mean per draw
	var drawW []float64                // weights of the draws in perDraw
	medCount := make([][3]int, k)      // members with L >= j
	repSum := make([]float64, k)
	for i, c := range partition {
		for j := 0; j < 3; j++ {
			if data[i].L() > j {
				medCount[c][j]++
			}
		}
	}
	var reported, considered []int
	var cache []kernelMedians
	var wsum float64
	for d, dr := range draws {
		wsum += w[d]
		if w[d] == 0 {
			continue
		}
		ns := len(dr.Segments)
		reported = resetInts(reported, ns)
		considered = resetInts(considered, ns)
		if cap(cache) < ns {
			cache = make([]kernelMedians, ns)
		}
		cache = cache[:ns]
		for l := range cache {
			cache[l].l = 0
		}
		for i, l := range dr.Labels {
			reported[l] += data[i].N()
			considered[l] += data[i].L()
		}
		for c := range medDraw {
			medDraw[c] = [3]float64{}
		}
		for i, l := range dr.Labels {
			di, c := data[i], partition[i]
			km := &cache[l]
			if km.l != di.L() {
				km.l = di.L()
				km.med = medians.of(dr.Segments[l].EW(), di.L())
			}
			for j := 0; j < 3; j++ {
				if di.L() > j {
					medDraw[c][j] += km.med[j]
				}
			}
			a := prior.CountA + float64(reported[l]-di.N())
			b := prior.CountB + float64(considered[l]-reported[l]-(di.L()-di.N()))
			repSum[c] += w[d] * float64(di.L()) * a / (a + b)
		}
		drawW = append(drawW, w[d])
		for c := range medDraw {
			for j := 0; j < 3; j++ {
				if medCount[c][j] > 0 {
					perDraw[c][j] = append(perDraw[c][j], medDraw[c][j]/float64(medCount[c][j]))
				}
			}
		}
	}
	for c := range segs {
		for j := 0; j < 3; j++ {
			if medCount[c][j] == 0 {
				segs[c].Median[j] = math.NaN()
				continue
			}
			segs[c].Median[j] = weightedMedian(perDraw[c][j], drawW)
		}
		segs[c].MeanReported = repSum[c] / wsum / float64(len(segs[c].Members))
	}
	return segs
}

// weightedMedian returns the smallest x[i] at which the cumulative weight,
// in ascending order of x, reaches half the total.
func weightedMedian(x, w []float64) float64 {
	idx := make([]int, len(x))
	for i := range idx {
		idx[i] = i
	}
	sort.Slice(idx, func(a, b int) bool { return x[idx[a]] < x[idx[b]] })
	total := 0.0
	for _, v := range w {
		total += v
	}
	acc := 0.0
	for _, i := range idx {
		acc += w[i]
		if acc >= total/2 {
			return x[i]
		}
	}
	return x[idx[len(idx)-1]]
}

func resetInts(x []int, n int) []int {
	if cap(x) < n {
		return make([]int, n)
	}
	x = x[:n]
	clear(x)
	return x
}

// kernelMedians caches the order-statistic medians of one segment kernel
// for one number of candidates l (0 = empty).
type kernelMedians struct {
	l   int
	med [3]float64
}

// orderMedians caches, per number of candidates L, the medians of
// Beta(L-j+1, j), j = 1, 2, 3: the law of F(Y) for Y the j-th largest of
// L iid draws with continuous CDF F.
type orderMedians map[int][3]float64

func newOrderMedians() orderMedians { return make(orderMedians) }

// of returns the medians of the three largest of l iid draws from ew
// (NaN where l < j).
func (m orderMedians) of(ew ExpWeibull, l int) [3]float64 {
	u, ok := m[l]
	if !ok {
		for j := 1; j <= 3; j++ {
			if l < j {
				u[j-1] = math.NaN()
				continue
			}
			u[j-1] = distuv.Beta{Alpha: float64(l - j + 1), Beta: float64(j)}.Quantile(0.5)
		}
		m[l] = u
	}
	var out [3]float64
	for j, uj := range u {
		if math.IsNaN(uj) {
			out[j] = math.NaN()
			continue
		}
		out[j] = ew.Quantile(uj)
	}
	return out
}

// nextSummaries mixes the next-value law of every product over the draws.
func nextSummaries(draws []Draw, w []float64, data []*Datum, opt SummaryOptions) []NextSummary {
	out := make([]NextSummary, len(data))
	// Products are independent: split them in chunks over the cores, each
	// writing only its own entries, so the result does not depend on the
	// number of workers.
	const chunk = 64
	parallelFor(opt.Workers, (len(data)+chunk-1)/chunk, func(c int) {
		var mix MixedNext
		for i := c * chunk; i < min((c+1)*chunk, len(data)); i++ {
			di := data[i]
			mix.fill(draws, w, di, i)
			ns := NextSummary{Defined: mix.Defined(), Threshold: opt.Threshold}
			if !ns.Defined {
				ns.Median, ns.Lo, ns.Hi = math.NaN(), math.NaN(), math.NaN()
			} else {
				ns.PExceed = mix.Exceed(opt.Threshold)
				if ns.PExceed >= opt.ExcessFrom {
					ns.Excess = mix.ExpectedExcess(opt.Threshold)
				}
				ns.Median = mix.Quantile(0.5)
				ns.Lo = mix.Quantile(opt.QuantileLo)
				ns.Hi = mix.Quantile(opt.QuantileHi)
			}
			out[i] = ns
		}
	})
	return out
}

// MixedNext is the posterior predictive law of one product's largest
// unreported relative cross-elasticity Y_(n+1): the NextValue laws of the
// product's segment in each draw, mixed with the draws' weights. It is
// undefined (Defined false, every method NaN) when n = L. A MixedNext is
// safe for concurrent reads.
type MixedNext struct {
	laws []NextValue
	w    []float64
	wsum float64
}

// quantileTol is the relative accuracy of MixedNext.Quantile in x.
const quantileTol = 1e-9

// NextValueMixture returns the predictive law of product i's next value,
// whose datum is d, mixing over draws with the given normalised weights
// (as from NormalizedWeights; draws of weight 0 are skipped).
//
// It panics if len(weights) != len(draws), i is outside a draw's labels,
// or a label is outside the draw's Segments.
func NextValueMixture(draws []Draw, weights []float64, d *Datum, i int) MixedNext {
	if len(weights) != len(draws) {
		panic(fmt.Sprintf("sequential: NextValueMixture: %d weights for %d draws", len(weights), len(draws)))
	}
	var m MixedNext
	m.fill(draws, weights, d, i)
	return m
}

// fill rebuilds m for product i, reusing its storage.
func (m *MixedNext) fill(draws []Draw, w []float64, d *Datum, i int) {
	m.laws, m.w, m.wsum = m.laws[:0], m.w[:0], 0
	if d.N() >= d.L() {
		return
	}
	for k, dr := range draws {
		if w[k] == 0 {
			continue
		}
		if i < 0 || i >= len(dr.Labels) || int(dr.Labels[i]) >= len(dr.Segments) {
			panic(fmt.Sprintf("sequential: NextValueMixture: product %d has no segment in draw %d", i, k))
		}
		nv, _ := NewNextValue(dr.Segments[dr.Labels[i]], d)
		m.laws = append(m.laws, nv)
		m.w = append(m.w, w[k])
		m.wsum += w[k]
	}
}

// Defined reports whether the product has a next value (n < L).
func (m MixedNext) Defined() bool { return len(m.laws) > 0 }

// CDF returns P(Y_(n+1) <= x) for x in relative cross-elasticity units.
func (m MixedNext) CDF(x float64) float64 {
	if !m.Defined() {
		return math.NaN()
	}
	var s float64
	for k, nv := range m.laws {
		s += m.w[k] * nv.CDF(x)
	}
	return min(s/m.wsum, 1)
}

// Exceed returns P(Y_(n+1) > t), summed from each draw's upper tail so
// that small probabilities keep their digits.
func (m MixedNext) Exceed(t float64) float64 {
	if !m.Defined() {
		return math.NaN()
	}
	var s float64
	for k, nv := range m.laws {
		s += m.w[k] * nv.Exceed(t)
	}
	return min(s/m.wsum, 1)
}

// Quantile returns the u-quantile of Y_(n+1), u in [0, 1], to relative
// accuracy 1e-9: 0 for u = 0, the upper end of the support (y_n, or +Inf
// when n = 0) for u = 1. It panics for u outside [0, 1].
//
// The mixed CDF has no closed-form inverse, but the root lies between the
// smallest and largest per-draw quantile at u. Within that bracket the
// root is found on log x by Newton steps, the slope coming almost free
// with the CDF, with a bisection step whenever Newton would leave the
// bracket or is not at least halving its step; so it never does worse
// than bisection and typically needs about six mixture evaluations where
// bisection to 1e-9 needs about thirty.
func (m MixedNext) Quantile(u float64) float64 {
	if u < 0 || u > 1 || math.IsNaN(u) {
		panic("sequential: MixedNext.Quantile: u outside [0, 1]")
	}
	if !m.Defined() {
		return math.NaN()
	}
	if u == 0 {
		return 0
	}
	lo, hi, start := math.Inf(1), 0.0, 0.0
	for k, nv := range m.laws {
		q := nv.Quantile(u)
		lo, hi = min(lo, q), max(hi, q)
		start += m.w[k] * logFast(max(q, math.SmallestNonzeroFloat64))
	}
	if u == 1 || hi <= lo {
		return hi
	}
	a := math.Log(max(lo, math.SmallestNonzeroFloat64))
	b := math.Log(hi)
	t := min(max(start/m.wsum, a), b)
	tol := math.Log1p(quantileTol)
	prevStep := b - a
	for it := 0; it < 400; it++ {
		x := expFast(t)
		cdf, slope := m.cdfSlope(x, t)
		f := cdf - u
		switch {
		case f < 0:
			a = t
		case f > 0:
			b = t
		default:
			return x
		}
		next := (a + b) / 2
		if slope > 0 && math.Abs(f) < math.Abs(prevStep*slope)/2 {
			if n := t - f/slope; n > a && n < b {
				next = n
			}
		}
		prevStep = next - t
		t = next
		if math.Abs(prevStep) <= tol/4 || b-a <= tol {
			break
		}
	}
	return math.Exp(t)
}

// cdfSlope returns the mixed CDF at x = exp(lx) and its derivative with
// respect to log x. With z = (x/s)^k, d log G / d log x = k z exp(-z) / G,
// and every branch below gets it from quantities it already has, so the
// slope costs no further transcendental calls.
func (m MixedNext) cdfSlope(x, lx float64) (cdf, slope float64) {
	for j := range m.laws {
		nv := &m.laws[j]
		w := m.w[j]
		if x >= nv.capX {
			cdf += w
			continue
		}
		lz := nv.k * (lx - nv.logS)
		z := expFast(lz)
		var logG, dlogG float64
		switch {
		case z < 1e-8:
			// G = z (1 - z/2 + z^2/6 ...): log G from log z stays exact
			// where z or G underflows; the next terms are below 1e-17.
			logG, dlogG = lz-z/2, nv.k*(1-z/2)
		case z <= math.Ln2:
			em := expm1Fast(-z) // -G
			logG, dlogG = logFast(-em), nv.k*z*(1+em)/-em
		default:
			surv := expFast(-z) // 1 - G
			logG, dlogG = log1pFast(-surv), nv.k*z*surv/(1-surv)
		}
		f := expFast(nv.power * (logG - nv.capLogG))
		cdf += w * f
		slope += w * f * nv.power * dlogG
	}
	return min(cdf/m.wsum, 1), slope / m.wsum
}

// excessDraws bounds the laws whose expected excess MixedNext.ExpectedExcess
// integrates: each costs about fifty evaluations of the law, and over 256
// particles that was three times the cost of the rest of a summary.
const excessDraws = 64

// ExpectedExcess returns E[(Y_(n+1) - t)+] under the mixture: the
// weighted mean of each draw's NextValue.ExpectedExcess (the expectation
// of a mixture is the mixture of expectations). With more than
// excessDraws draws of positive weight it is estimated from excessDraws
// of them, taken by systematic resampling of the weights at the fixed
// points (j + 1/2) / excessDraws (so the result is deterministic and a
// law of weight w is taken w * excessDraws times, rounded): a
// Monte Carlo estimate, used only to rank alerts.
func (m MixedNext) ExpectedExcess(t float64) float64 {
	if !m.Defined() {
		return math.NaN()
	}
	// Particles that descend from one ancestor often share the
	// product's segment kernel: each distinct law is integrated once.
	seen := make(map[NextValue]float64)
	excess := func(nv NextValue) float64 {
		e, ok := seen[nv]
		if !ok {
			e = nv.ExpectedExcess(t)
			seen[nv] = e
		}
		return e
	}
	positive := 0
	for _, w := range m.w {
		if w > 0 {
			positive++
		}
	}
	var s float64
	if positive <= excessDraws {
		for k, nv := range m.laws {
			s += m.w[k] * excess(nv)
		}
		return s / m.wsum
	}
	k, cum := 0, m.w[0]
	for j := range excessDraws {
		u := (float64(j) + 0.5) / excessDraws * m.wsum
		for cum < u && k+1 < len(m.laws) {
			k++
			cum += m.w[k]
		}
		s += excess(m.laws[k])
	}
	return s / excessDraws
}
