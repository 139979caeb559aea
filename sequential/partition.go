package sequential

import (
	"errors"
	"fmt"
	"math"
	"slices"
)

// This file holds the partition side of the posterior summaries: weights,
// co-clustering probabilities and the expected Binder loss of a candidate
// segmentation (its minimisation is in binder.go). Everything works from
// contingency counts of a candidate against each draw, so memory stays
// linear in the number of products; only SimilarityMatrix builds an
// N x N matrix.

// ErrDraws reports weighted draws that cannot be summarised: none at all,
// labels that do not match the data or the draw's segments, or weights
// and concentrations that are not finite.
var ErrDraws = errors.New("sequential: invalid draws")

// NormalizedWeights returns the normalised importance weight of each draw,
// w_d = exp(LogWeight_d - max) / sum, each in [0, 1] and summing to 1 up
// to rounding. Subtracting the largest log weight first means no weight
// overflows however large the common offset. A LogWeight of -Inf gives
// weight 0.
//
// It panics if draws is empty, a LogWeight is NaN or +Inf, or every
// LogWeight is -Inf; Summarize reports the same conditions as errors.
func NormalizedWeights(draws []Draw) []float64 {
	w, err := normalizedWeights(draws)
	if err != nil {
		panic(err.Error())
	}
	return w
}

func normalizedWeights(draws []Draw) ([]float64, error) {
	if len(draws) == 0 {
		return nil, fmt.Errorf("%w: no draws", ErrDraws)
	}
	top := math.Inf(-1)
	for d, dr := range draws {
		lw := dr.LogWeight
		if math.IsNaN(lw) || math.IsInf(lw, 1) {
			return nil, fmt.Errorf("%w: draw %d has log weight %v", ErrDraws, d, lw)
		}
		top = math.Max(top, lw)
	}
	if math.IsInf(top, -1) {
		return nil, fmt.Errorf("%w: every log weight is -Inf", ErrDraws)
	}
	w := make([]float64, len(draws))
	var sum float64
	for d, dr := range draws {
		w[d] = math.Exp(dr.LogWeight - top)
		sum += w[d]
	}
	for d := range w {
		w[d] /= sum
	}
	return w, nil
}

// checkLabelLengths panics unless every draw labels the same number of
// products; it returns that number.
func checkLabelLengths(draws []Draw) int {
	if len(draws) == 0 {
		panic("sequential: no draws")
	}
	n := len(draws[0].Labels)
	for d := range draws {
		if len(draws[d].Labels) != n {
			panic(fmt.Sprintf("sequential: draw %d labels %d products, draw 0 labels %d", d, len(draws[d].Labels), n))
		}
	}
	return n
}

// Similarity returns, for each pair (i, j) of product indices, the
// posterior probability that products i and j share a segment: the
// weighted mean over draws of the same-label indicator, or, for a draw
// with placement probabilities (Draw.Soft), of the mean of the
// probabilities with which i's update put i with j and j's update put j
// with i. In [0, 1] (1 when i == j). It costs O(draws x pairs) time and
// no N x N memory.
//
// It panics if draws is empty, the draws label different numbers of
// products, an index is out of range, or the weights are invalid (see
// NormalizedWeights).
func Similarity(draws []Draw, pairs [][2]int) []float64 {
	n := checkLabelLengths(draws)
	for _, p := range pairs {
		if p[0] < 0 || p[0] >= n || p[1] < 0 || p[1] >= n {
			panic(fmt.Sprintf("sequential: Similarity: pair %v outside 0..%d", p, n-1))
		}
	}
	w := NormalizedWeights(draws)
	out := make([]float64, len(pairs))
	var wsum float64
	for d, dr := range draws {
		wsum += w[d]
		if dr.Soft != nil {
			if w[d] == 0 {
				continue
			}
			before := dr.Soft.startLabels(dr.Labels)
			for k, p := range pairs {
				out[k] += w[d] * softPair(dr, before, p[0], p[1])
			}
			continue
		}
		for k, p := range pairs {
			if dr.Labels[p[0]] == dr.Labels[p[1]] {
				out[k] += w[d]
			}
		}
	}
	for k, p := range pairs {
		if p[0] == p[1] {
			out[k] = 1
			continue
		}
		out[k] = math.Min(out[k]/wsum, 1)
	}
	return out
}

// softPair returns a soft draw's co-segment probability of i != j: the
// mean of P(i's update put i in j's segment) and the converse, j's label
// at i's update being its label before the scan (before) when j > i and
// after it otherwise.
func softPair(dr Draw, before []uint16, i, j int) float64 {
	at := func(i, j int) uint16 {
		if j > i {
			return before[j]
		}
		return dr.Labels[j]
	}
	return 0.5 * (dr.Soft.placement(i, at(i, j)) + dr.Soft.placement(j, at(j, i)))
}

// SimilarityMatrix returns the full N x N posterior similarity matrix,
// [i][j] = P(products i and j share a segment) in [0, 1] as Similarity
// computes it, symmetric with unit diagonal. It needs N^2 floats of memory
// and O(draws x N^2) time in the worst case, so it is meant for small
// categories, tests and displays of a few hundred products; the service
// uses ExpectedBinder and PointPartition, which never build it.
//
// It panics on the same misuse as Similarity.
func SimilarityMatrix(draws []Draw) [][]float64 {
	n := checkLabelLengths(draws)
	w := NormalizedWeights(draws)
	flat := make([]float64, n*n)
	m := make([][]float64, n)
	for i := range m {
		m[i] = flat[i*n : (i+1)*n : (i+1)*n]
	}
	var wsum float64
	var hard []Draw
	var hardW []float64
	for d, dr := range draws {
		wsum += w[d]
		if dr.Soft == nil {
			hard = append(hard, dr)
			hardW = append(hardW, w[d])
			continue
		}
		if w[d] == 0 {
			continue
		}
		before := dr.Soft.startLabels(dr.Labels)
		for i := 0; i < n; i++ {
			seg, p := dr.Soft.entries(i)
			for j := 0; j < n; j++ {
				if j == i {
					continue
				}
				l := dr.Labels[j]
				if j > i {
					l = before[j]
				}
				for e, x := range seg {
					if x == l {
						m[i][j] += 0.5 * w[d] * float64(p[e])
						break
					}
				}
			}
		}
	}
	if len(hard) > 0 {
		for _, p := range distinctPartitions(hard, hardW) {
			if p.w == 0 {
				continue
			}
			for c := 0; c < p.k; c++ {
				mem := p.members(c)
				for x, i := range mem {
					for _, j := range mem[x+1:] {
						m[i][j] += p.w
					}
				}
			}
		}
	}
	for i := range m {
		m[i][i] = 1
		for j := i + 1; j < n; j++ {
			v := math.Min((m[i][j]+m[j][i])/wsum, 1)
			m[i][j], m[j][i] = v, v
		}
	}
	return m
}

// ExpectedBinder returns the posterior expected Binder loss of a
// candidate partition of the products (equal costs for the two kinds of
// error, counted over unordered pairs i < j): the weighted mean over draws
// of the number of pairs that the candidate and the draw treat
// differently, in [0, N(N-1)/2]. partition[i] is product i's segment;
// any integer values name segments.
//
// Each draw contributes sum_k C(n_k,2) + sum_l C(m_l,2) - 2 sum_kl C(n_kl,2)
// from its contingency table against the candidate (n_k draw segment
// sizes, m_l candidate segment sizes, n_kl their overlaps), in O(N) time
// per draw. Draws with placement probabilities contribute the loss
// against their co-segment probabilities instead (see Similarity), in
// O(N K) time per draw.
//
// It panics if draws is empty, a draw's labels or partition differ in
// length, or the weights are invalid (see NormalizedWeights).
func ExpectedBinder(draws []Draw, partition []int) float64 {
	n := checkLabelLengths(draws)
	if len(partition) != n {
		panic(fmt.Sprintf("sequential: ExpectedBinder: partition has %d products, draws have %d", len(partition), n))
	}
	w := NormalizedWeights(draws)
	for _, dr := range draws {
		if dr.Soft != nil {
			return expectedBinderParts(pairParts(draws, w, nil), partition)
		}
	}
	z, k := compactInts(partition)
	order, start := groupBySegment(z, k)
	candPairs := pairsWithin(start)
	cnt := make([]int32, maxLabel(draws)+1)
	var loss, wsum float64
	for d, dr := range draws {
		wsum += w[d]
		if w[d] == 0 {
			continue
		}
		drawPairs := samePairs(dr.Labels, cnt)
		agree := agreePairs(order, start, dr.Labels, cnt)
		loss += w[d] * float64(drawPairs+candPairs-2*agree)
	}
	return loss / wsum
}

// PointPartition returns a point estimate of the segmentation, the
// partition with (locally) least expected Binder loss, and that loss
// (pairs of products, as ExpectedBinder). Segments are numbered 0..K-1 by
// size, largest first, ties broken by smallest member index.
//
// The search starts from the draw whose own partition has the least
// expected loss (Dahl's least-squares choice, ties to the earliest draw)
// and then sweeps the products, moving each to the existing segment or
// new singleton that lowers the expected loss most, while some move
// lowers it; at most maxSweeps (>= 0) sweeps. The change in loss of a
// move is read from per-draw contingency counts kept up to date, costing
// O(distinct draws x K) per product, never an N x N matrix. Choosing the
// start costs O(distinct draws^2 x N); draws with identical partitions
// are merged first.
//
// It panics if draws is empty, the draws label different numbers of
// products, maxSweeps < 0, or the weights are invalid.
func PointPartition(draws []Draw, maxSweeps int) ([]int, float64) {
	checkLabelLengths(draws)
	if maxSweeps < 0 {
		panic("sequential: PointPartition: maxSweeps < 0")
	}
	w := NormalizedWeights(draws)
	parts := distinctPartitions(draws, w)
	pairs := pairParts(draws, w, parts)
	part := pointPartition(parts, pairs, maxSweeps)
	return part, expectedBinderParts(pairs, part)
}

// AdjustedRand returns the adjusted Rand index of Hubert and Arabie
// (1985) between two partitions of the same products: 1 for identical
// partitions (up to renaming of segments), about 0 on average for
// unrelated ones, and negative when they agree less than chance. Segment
// names are arbitrary integers. When the index is undefined (fewer than
// two products, or both partitions all-in-one or both all-singletons) the
// partitions are necessarily identical and it returns 1.
//
// It panics if the lengths differ.
func AdjustedRand(a, b []int) float64 {
	if len(a) != len(b) {
		panic(fmt.Sprintf("sequential: AdjustedRand: partitions of %d and %d products", len(a), len(b)))
	}
	za, ka := compactInts(a)
	zb, _ := compactInts(b)
	order, start := groupBySegment(za, ka)
	cnt := make([]int32, len(b)+1)
	index := float64(agreePairs(order, start, zb, cnt))
	sa := float64(pairsWithin(start))
	sb := float64(samePairs(zb, cnt))
	n := float64(len(a))
	all := n * (n - 1) / 2
	if all == 0 {
		return 1
	}
	expected := sa * sb / all
	top := (sa + sb) / 2
	if top == expected {
		return 1
	}
	return (index - expected) / (top - expected)
}

// compactInts renames arbitrary integer segment names to 0..k-1 in order
// of first appearance.
func compactInts(x []int) ([]int32, int) {
	name := make(map[int]int32)
	z := make([]int32, len(x))
	for i, v := range x {
		c, ok := name[v]
		if !ok {
			c = int32(len(name))
			name[v] = c
		}
		z[i] = c
	}
	return z, len(name)
}

// groupBySegment lists the products segment by segment (ascending within
// each): segment c is order[start[c]:start[c+1]].
func groupBySegment(z []int32, k int) (order, start []int32) {
	start = make([]int32, k+1)
	for _, c := range z {
		start[c+1]++
	}
	for c := 0; c < k; c++ {
		start[c+1] += start[c]
	}
	order = make([]int32, len(z))
	next := slices.Clone(start[:k])
	for i, c := range z {
		order[next[c]] = int32(i)
		next[c]++
	}
	return order, start
}

// pairsWithin returns sum_c C(m_c, 2) for the segment sizes encoded by start.
func pairsWithin(start []int32) int64 {
	var s int64
	for c := 0; c+1 < len(start); c++ {
		m := int64(start[c+1] - start[c])
		s += m * (m - 1) / 2
	}
	return s
}

// samePairs returns the number of unordered pairs with equal labels.
// cnt must be zero and long enough for every label; it is left zero.
func samePairs[L uint16 | int32](labels []L, cnt []int32) int64 {
	var s int64
	for _, l := range labels {
		s += int64(cnt[l])
		cnt[l]++
	}
	for _, l := range labels {
		cnt[l] = 0
	}
	return s
}

// agreePairs returns sum_kl C(n_kl, 2), the number of unordered pairs that
// share a segment both in the grouped partition (order, start) and in
// labels. Counting within one group, the j-th member whose label is l
// adds the j-1 earlier ones, so no table is formed. cnt must be zero and
// long enough for every label; it is left zero.
func agreePairs[L uint16 | int32](order, start []int32, labels []L, cnt []int32) int64 {
	var s int64
	for c := 0; c+1 < len(start); c++ {
		mem := order[start[c]:start[c+1]]
		for _, i := range mem {
			l := labels[i]
			s += int64(cnt[l])
			cnt[l]++
		}
		for _, i := range mem {
			cnt[labels[i]] = 0
		}
	}
	return s
}

// drawPartition is one distinct partition among the draws. Labels are
// renamed 0..k-1 in order of first appearance, so two draws with the same
// partition have equal z and are merged, their weights added.
type drawPartition struct {
	z     []int32
	k     int
	order []int32 // products grouped by segment; see groupBySegment
	start []int32
	pairs int64   // sum_c C(n_c, 2)
	w     float64 // total normalised weight of the merged draws
	// soft, for a draw that carries placement probabilities, holds them
	// in the compact labels of z; such draws are never merged.
	soft *softPart
}

// softPart is a draw's Soft in the compact labels of its drawPartition:
// product i's entries are seg[off[i]:off[i+1]] with probabilities p, and
// movers lists the products the scan moved (ascending), with their
// compact labels before (from) and after (to) the scan. Labels that occur
// only before the scan, or only among the placement candidates, have
// compact numbers k0..k-1 beyond those of z and no members.
type softPart struct {
	off    []int32
	seg    []int32
	p      []float64
	movers []softMover
}

type softMover struct{ i, from, to int32 }

// softPartition builds the unmerged drawPartition of a draw with Soft.
func softPartition(dr Draw, w float64) *drawPartition {
	n := len(dr.Labels)
	rename := make([]int32, len(dr.Segments))
	for i := range rename {
		rename[i] = -1
	}
	k := int32(0)
	name := func(l uint16) int32 {
		if rename[l] < 0 {
			rename[l] = k
			k++
		}
		return rename[l]
	}
	z := make([]int32, n)
	for i, l := range dr.Labels {
		z[i] = name(l)
	}
	k0 := int(k)
	sp := &softPart{off: make([]int32, n+1)}
	for i := 0; i < n; i++ {
		seg, p := dr.Soft.entries(i)
		for e, l := range seg {
			sp.seg = append(sp.seg, name(l))
			sp.p = append(sp.p, float64(p[e]))
		}
		sp.off[i+1] = int32(len(sp.seg))
	}
	for _, m := range dr.Soft.Movers {
		sp.movers = append(sp.movers, softMover{i: int32(m.Product), from: name(m.From), to: z[m.Product]})
	}
	order, start := groupBySegment(z, int(k))
	return &drawPartition{z: z, k: int(k), order: order, start: start, pairs: pairsWithin(start[:k0+1]), w: w, soft: sp}
}

// pairParts returns the partitions the pair probabilities are read from:
// the merged partitions when no draw carries placement probabilities,
// otherwise one part per draw, soft where the draw has a Soft.
func pairParts(draws []Draw, w []float64, merged []*drawPartition) []*drawPartition {
	soft := false
	for _, dr := range draws {
		soft = soft || dr.Soft != nil
	}
	if !soft {
		return merged
	}
	out := make([]*drawPartition, 0, len(draws))
	for d, dr := range draws {
		if w[d] == 0 {
			continue
		}
		if dr.Soft != nil {
			out = append(out, softPartition(dr, w[d]))
		} else {
			out = append(out, distinctPartitions(draws[d:d+1], w[d:d+1])...)
		}
	}
	return out
}

// hasSoft reports whether any part carries placement probabilities.
func hasSoft(parts []*drawPartition) bool {
	for _, p := range parts {
		if p.soft != nil {
			return true
		}
	}
	return false
}

func (p *drawPartition) members(c int) []int32 { return p.order[p.start[c]:p.start[c+1]] }

// distinctPartitions merges draws with identical partitions, keeping the
// order of first appearance (so ties resolve to the earliest draw).
func distinctPartitions(draws []Draw, w []float64) []*drawPartition {
	n := len(draws[0].Labels)
	rename := make([]int32, maxLabel(draws)+1)
	for i := range rename {
		rename[i] = -1
	}
	buf := make([]int32, n)
	seen := make(map[uint64][]int)
	var parts []*drawPartition
	for d, dr := range draws {
		k := int32(0)
		for i, l := range dr.Labels {
			c := rename[l]
			if c < 0 {
				c = k
				rename[l] = k
				k++
			}
			buf[i] = c
		}
		for _, l := range dr.Labels {
			rename[l] = -1
		}
		h := hashLabels(buf)
		found := false
		for _, u := range seen[h] {
			if slices.Equal(parts[u].z, buf) {
				parts[u].w += w[d]
				found = true
				break
			}
		}
		if found {
			continue
		}
		z := slices.Clone(buf)
		order, start := groupBySegment(z, int(k))
		seen[h] = append(seen[h], len(parts))
		parts = append(parts, &drawPartition{z: z, k: int(k), order: order, start: start, pairs: pairsWithin(start), w: w[d]})
	}
	return parts
}

// maxLabel returns the largest label of any draw (0 if there are none).
func maxLabel(draws []Draw) int {
	top := uint16(0)
	for _, dr := range draws {
		for _, l := range dr.Labels {
			top = max(top, l)
		}
	}
	return int(top)
}

// hashLabels is 64-bit FNV-1a over the labels; collisions are resolved by
// comparing the labels themselves.
func hashLabels(z []int32) uint64 {
	h := uint64(14695981039346656037)
	for _, c := range z {
		h ^= uint64(uint32(c))
		h *= 1099511628211
	}
	return h
}

// expectedBinderParts is ExpectedBinder over the parts of pairParts.
// With placement probabilities the co-segment probability of i and j in a
// draw is the mean of the probability that i's update put i with j and
// the same for j, and the loss is
//
//	candPairs + sum_(i<j) pi_ij - 2 sum_(i<j, same candidate segment) pi_ij
//	  = candPairs + (1/2) sum_i [sum_l q_i(l) - 2 q_i(own)]
//
// with q_i(l) the summed probabilities of i with the members of candidate
// segment l (affinity), each pair counted from both ends.
func expectedBinderParts(parts []*drawPartition, partition []int) float64 {
	z, k := compactInts(partition)
	order, start := groupBySegment(z, k)
	candPairs := pairsWithin(start)
	if hasSoft(parts) {
		s := newBinderSearch(parts, z, k)
		var acc float64
		s.beginScan()
		for i := range z {
			s.enter(i)
			s.affinity(i)
			for _, a := range s.aff {
				acc += 0.5 * a
			}
			acc -= s.aff[z[i]]
		}
		return float64(candPairs) + acc/s.wsum
	}
	cnt := make([]int32, len(partition)+1)
	var loss, wsum float64
	for _, p := range parts {
		wsum += p.w
		if p.w == 0 {
			continue
		}
		agree := agreePairs(order, start, p.z, cnt)
		loss += p.w * float64(p.pairs+candPairs-2*agree)
	}
	return loss / wsum
}
