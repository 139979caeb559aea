package sequential

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"testing"
)

// randomDraws returns nd draws over n products with labels below kmax
// (spread over the uint16 range when sparse is set, to exercise
// non-contiguous labels) and log weights with a spread of a few units.
func randomDraws(src *rand.Rand, n, nd, kmax int, sparse bool) []Draw {
	prior := DefaultPrior()
	draws := make([]Draw, nd)
	for d := range draws {
		names := make([]uint16, kmax)
		for c := range names {
			names[c] = uint16(c)
			if sparse {
				names[c] = uint16(src.IntN(1 << 16))
			}
		}
		labels := make([]uint16, n)
		for i := range labels {
			labels[i] = names[src.IntN(kmax)]
		}
		top := int(slices.Max(names))
		segs := make([]Theta, top+1) // unused entries keep the zero Theta
		for _, c := range names {
			segs[c] = prior.DrawTheta(src)
		}
		draws[d] = Draw{LogWeight: 2 * src.NormFloat64(), Labels: labels, Segments: segs, Alpha: 0.5 + src.Float64()}
	}
	return draws
}

// pairwiseBinder is the O(N^2) definition of the expected Binder loss:
// the weighted mean over draws of the number of pairs i < j on which the
// draw and the candidate disagree about sharing a segment.
func pairwiseBinder(draws []Draw, partition []int) float64 {
	var loss, wsum float64
	for _, dr := range draws {
		w := math.Exp(dr.LogWeight)
		wsum += w
		for i := range partition {
			for j := i + 1; j < len(partition); j++ {
				if (dr.Labels[i] == dr.Labels[j]) != (partition[i] == partition[j]) {
					loss += w
				}
			}
		}
	}
	return loss / wsum
}

func labelsAsInts(l []uint16) []int {
	out := make([]int, len(l))
	for i, v := range l {
		out[i] = int(v)
	}
	return out
}

// setPartitions enumerates every partition of n products as restricted
// growth strings (a[0] = 0, a[i] <= max(a[:i]) + 1).
func setPartitions(n int) [][]int {
	var out [][]int
	a := make([]int, n)
	var rec func(i, top int)
	rec = func(i, top int) {
		if i == n {
			out = append(out, slices.Clone(a))
			return
		}
		for c := 0; c <= top+1; c++ {
			a[i] = c
			rec(i+1, max(top, c))
		}
	}
	if n > 0 {
		rec(1, 0)
	}
	return out
}

// singleMoves returns every partition reachable from p by moving one
// product to another segment or to a new singleton.
func singleMoves(p []int) [][]int {
	k := 0
	for _, c := range p {
		k = max(k, c+1)
	}
	var out [][]int
	for i := range p {
		for c := 0; c <= k; c++ {
			if c == p[i] {
				continue
			}
			q := slices.Clone(p)
			q[i] = c
			out = append(out, q)
		}
	}
	return out
}

func wantClose(t *testing.T, name string, got, want, rel float64) {
	t.Helper()
	if math.Abs(got-want) > rel*math.Max(1, math.Abs(want)) {
		t.Errorf("%s = %.17g, want %.17g (tolerance %g relative)", name, got, want, rel)
	}
}

func TestExpectedBinderMatchesPairwise(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(1, 2))
	for trial := 0; trial < 300; trial++ {
		n := 2 + src.IntN(11)
		draws := randomDraws(src, n, 1+src.IntN(8), 1+src.IntN(4), trial%3 == 0)
		cand := make([]int, n)
		for i := range cand {
			cand[i] = src.IntN(4) - 2 // any integers name segments, negatives too
		}
		// Both sides sum integer pair counts with the same weights; the
		// contingency form reorders the arithmetic, so agreement is to
		// rounding, well inside 1e-12 relative.
		wantClose(t, fmt.Sprintf("trial %d ExpectedBinder", trial), ExpectedBinder(draws, cand), pairwiseBinder(draws, cand), 1e-12)
	}
}

func TestPointPartitionNeverWorseThanBestDraw(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(3, 4))
	for trial := 0; trial < 200; trial++ {
		n := 2 + src.IntN(30)
		draws := randomDraws(src, n, 1+src.IntN(12), 1+src.IntN(5), trial%4 == 0)
		part, loss := PointPartition(draws, 50)
		best := math.Inf(1)
		for _, dr := range draws {
			best = math.Min(best, ExpectedBinder(draws, labelsAsInts(dr.Labels)))
		}
		if loss > best+1e-12*math.Max(1, best) {
			t.Errorf("trial %d: loss %v worse than best draw %v", trial, loss, best)
		}
		wantClose(t, "reported loss", loss, ExpectedBinder(draws, part), 1e-12)
		checkCanonical(t, part)
	}
}

func TestPointPartitionStartsFromBestDraw(t *testing.T) {
	t.Parallel()
	// With no improvement sweeps the result is the best draw's own
	// partition. The 150-segment cases make the draw-against-draw tables
	// too large for the dense count, exercising the grouped one.
	src := rand.New(rand.NewPCG(19, 20))
	for trial := 0; trial < 40; trial++ {
		n, kmax := 2+src.IntN(30), 1+src.IntN(5)
		if trial%4 == 0 {
			n, kmax = 400, 150
		}
		draws := randomDraws(src, n, 1+src.IntN(10), kmax, trial%3 == 0)
		part, loss := PointPartition(draws, 0)
		best, bestD := math.Inf(1), -1
		for d, dr := range draws {
			if l := ExpectedBinder(draws, labelsAsInts(dr.Labels)); l < best {
				best, bestD = l, d
			}
		}
		wantClose(t, fmt.Sprintf("trial %d loss", trial), loss, best, 1e-12)
		if ari := AdjustedRand(part, labelsAsInts(draws[bestD].Labels)); ari != 1 {
			t.Errorf("trial %d: partition differs from best draw %d (ARI %v)", trial, bestD, ari)
		}
	}
}

// checkCanonical asserts the numbering promised by PointPartition:
// 0..K-1, sizes non-increasing, equal sizes ordered by smallest member.
func checkCanonical(t *testing.T, part []int) {
	t.Helper()
	k := 0
	for _, c := range part {
		k = max(k, c+1)
	}
	size := make([]int, k)
	first := make([]int, k)
	for c := range first {
		first[c] = -1
	}
	for i, c := range part {
		if c < 0 {
			t.Fatalf("negative segment %d", c)
		}
		size[c]++
		if first[c] < 0 {
			first[c] = i
		}
	}
	for c := 0; c < k; c++ {
		if size[c] == 0 {
			t.Fatalf("segment %d of %d is empty: %v", c, k, part)
		}
		if c > 0 && (size[c] > size[c-1] || size[c] == size[c-1] && first[c] < first[c-1]) {
			t.Fatalf("segments not in canonical order: %v", part)
		}
	}
}

func TestPointPartitionAgreeingDraws(t *testing.T) {
	t.Parallel()
	truth := []uint16{0, 0, 1, 2, 1, 0, 2, 2, 2, 3}
	want := []int{1, 1, 2, 0, 2, 1, 0, 0, 0, 3} // sizes 4, 3, 2, 1
	src := rand.New(rand.NewPCG(5, 6))
	var draws []Draw
	for d := 0; d < 7; d++ {
		// The same partition under different segment names.
		perm := src.Perm(40)
		labels := make([]uint16, len(truth))
		for i, c := range truth {
			labels[i] = uint16(perm[c])
		}
		draws = append(draws, Draw{LogWeight: src.NormFloat64(), Labels: labels, Segments: make([]Theta, 40), Alpha: 1})
	}
	part, loss := PointPartition(draws, 50)
	if !slices.Equal(part, want) {
		t.Errorf("partition %v, want %v", part, want)
	}
	if loss != 0 {
		t.Errorf("loss %v, want 0", loss)
	}
}

func TestPointPartitionBruteForce(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(7, 8))
	global := 0
	const trials = 300
	for trial := 0; trial < trials; trial++ {
		n := 3 + trial%4 // 3..6 products: at most Bell(6) = 203 partitions
		draws := randomDraws(src, n, 2+src.IntN(6), 1+src.IntN(4), false)
		part, loss := PointPartition(draws, 50)
		opt := math.Inf(1)
		for _, p := range setPartitions(n) {
			opt = math.Min(opt, ExpectedBinder(draws, p))
		}
		if loss < opt-1e-12 {
			t.Fatalf("trial %d: loss %v below the enumerated optimum %v", trial, loss, opt)
		}
		if loss <= opt+1e-12 {
			global++
		}
		// Local optimum: the search stops only when no single move gains
		// more than its rounding guard (about 1e-11 here), so no move may
		// lower the loss by more than 1e-9.
		for _, q := range singleMoves(part) {
			if l := ExpectedBinder(draws, q); l < loss-1e-9 {
				t.Errorf("trial %d: move %v -> %v lowers loss %v -> %v", trial, part, q, loss, l)
			}
		}
	}
	t.Logf("point partition hit the global optimum in %d of %d enumerated cases", global, trials)
}

func TestSimilarityMatchesMatrix(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(9, 10))
	for trial := 0; trial < 50; trial++ {
		n := 1 + src.IntN(15)
		draws := randomDraws(src, n, 1+src.IntN(10), 1+src.IntN(4), trial%2 == 0)
		m := SimilarityMatrix(draws)
		var pairs [][2]int
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				pairs = append(pairs, [2]int{i, j})
			}
		}
		s := Similarity(draws, pairs)
		for x, p := range pairs {
			i, j := p[0], p[1]
			if m[i][j] != m[j][i] {
				t.Fatalf("matrix not symmetric at %d,%d", i, j)
			}
			if i == j && m[i][j] != 1 {
				t.Fatalf("diagonal %d is %v", i, m[i][j])
			}
			// Same weights summed in a different order: rounding only.
			if math.Abs(s[x]-m[i][j]) > 1e-14 {
				t.Fatalf("Similarity(%d,%d) = %v, matrix %v", i, j, s[x], m[i][j])
			}
		}
	}
}

// twoDraws is the hand-worked case of the membership and segment-count
// tests: three products, weights 1/4 and 3/4.
//
//	draw A (w = 1/4): {0, 1} {2}     draw B (w = 3/4): {0} {1, 2}
//
// Similarities: p01 = 1/4, p02 = 0, p12 = 3/4.
func twoDraws() []Draw {
	segs := []Theta{{0, 0, math.Log(0.3)}, {0.2, 0.1, math.Log(0.5)}, {-0.1, 0.3, math.Log(0.2)}}
	return []Draw{
		{LogWeight: math.Log(0.25), Labels: []uint16{0, 0, 1}, Segments: segs, Alpha: 1},
		{LogWeight: math.Log(0.75), Labels: []uint16{2, 1, 1}, Segments: segs, Alpha: 3},
	}
}

func threeData() []*Datum {
	d0 := MustDatum([]float64{0.6, 0.3}, 10)
	d1 := MustDatum([]float64{0.5, 0.4, 0.2, 0.1}, 10)
	d2 := MustDatum(nil, 10)
	return []*Datum{&d0, &d1, &d2}
}

func TestMembershipHandWorked(t *testing.T) {
	t.Parallel()
	// Expected Binder loss by hand (pairs 01, 02, 12; a pair together in
	// the candidate costs 1 - p, apart costs p):
	//   {0}{1,2}: 1/4 + 0 + 1/4 = 1/2     (draw B's partition)
	//   {0,1}{2}: 3/4 + 0 + 3/4 = 3/2     (draw A's partition)
	//   singletons: 1/4 + 0 + 3/4 = 1;  all together: 3/4 + 1 + 1/4 = 2
	//   {0,2}{1}: 1/4 + 1 + 3/4 = 2
	// so the point partition is {1,2} (segment 0, larger) and {0}
	// (segment 1), with loss 1/2. Membership = mean similarity to the
	// other members:
	//   product 0: seg 0 (p01 + p02)/2 = 1/8;  seg 1 is {0} itself: 1
	//   product 1: seg 0 p12 = 3/4;            seg 1 p10 = 1/4
	//   product 2: seg 0 p21 = 3/4;            seg 1 p20 = 0
	sum, err := Summarize(twoDraws(), threeData(), DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	if want := []int{1, 0, 0}; !slices.Equal(sum.Partition, want) {
		t.Fatalf("partition %v, want %v", sum.Partition, want)
	}
	wantClose(t, "Binder", sum.Binder, 0.5, 1e-15)
	want := [][]float64{{1.0 / 8, 1}, {3.0 / 4, 1.0 / 4}, {3.0 / 4, 0}}
	for i := range want {
		for c := range want[i] {
			wantClose(t, fmt.Sprintf("Membership[%d][%d]", i, c), sum.Membership[i][c], want[i][c], 1e-15)
		}
	}
	if !slices.Equal(sum.Segments[0].Members, []int{1, 2}) || !slices.Equal(sum.Segments[1].Members, []int{0}) {
		t.Errorf("members %v, %v", sum.Segments[0].Members, sum.Segments[1].Members)
	}
}

func TestNumSegmentsWeighted(t *testing.T) {
	t.Parallel()
	// Draw A has 2 occupied segments with weight 1/4, draw B 3 with 3/4
	// (segment 0 of B is unused and must not count).
	draws := []Draw{
		{LogWeight: math.Log(0.25) + 100, Labels: []uint16{0, 0, 1}, Segments: make([]Theta, 2), Alpha: 1},
		{LogWeight: math.Log(0.75) + 100, Labels: []uint16{1, 2, 3}, Segments: make([]Theta, 4), Alpha: 3},
	}
	sum, err := Summarize(draws, threeData(), DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	if len(sum.NumSegments) != 2 {
		t.Fatalf("NumSegments %v, want keys 2 and 3", sum.NumSegments)
	}
	wantClose(t, "P(K=2)", sum.NumSegments[2], 0.25, 1e-15)
	wantClose(t, "P(K=3)", sum.NumSegments[3], 0.75, 1e-15)
	// Posterior mean of alpha: 1/4 * 1 + 3/4 * 3 = 2.5;
	// ESS = 1 / (1/16 + 9/16) = 1.6.
	wantClose(t, "AlphaMean", sum.AlphaMean, 2.5, 1e-15)
	wantClose(t, "ESS", sum.ESS, 1.6, 1e-15)

	src := rand.New(rand.NewPCG(11, 12))
	data := make([]*Datum, 20)
	for i := range data {
		d := MustDatum([]float64{0.5}, 10)
		data[i] = &d
	}
	sum, err = Summarize(randomDraws(src, 20, 30, 6, true), data, DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	var total float64
	for _, p := range sum.NumSegments {
		total += p
	}
	wantClose(t, "sum of NumSegments", total, 1, 1e-14)
}

func TestAdjustedRand(t *testing.T) {
	t.Parallel()
	a := []int{0, 0, 0, 1, 1, 2, 2, 2, 2}
	if got := AdjustedRand(a, a); got != 1 {
		t.Errorf("identical: %v, want 1", got)
	}
	relabelled := []int{7, 7, 7, -3, -3, 40, 40, 40, 40}
	if got := AdjustedRand(a, relabelled); got != 1 {
		t.Errorf("relabelled: %v, want 1", got)
	}
	// Computed by hand from the Hubert and Arabie (1985) formula.
	// a = {0,1,2}{3,4,5}, b = {0,1}{2,3}{4,5}; contingency table
	//          b0 b1 b2 | rows
	//   a0      2  1  0 |  3
	//   a1      0  1  2 |  3
	//   cols    2  2  2 |  n = 6
	// index = sum C(n_ij,2) = 1 + 1 = 2; sum_i C(a_i,2) = 3 + 3 = 6;
	// sum_j C(b_j,2) = 3; C(6,2) = 15; expected = 6*3/15 = 6/5;
	// max = (6+3)/2 = 9/2; ARI = (2 - 6/5) / (9/2 - 6/5) = 8/33.
	wantClose(t, "hand-worked ARI", AdjustedRand([]int{0, 0, 0, 1, 1, 1}, []int{0, 0, 1, 1, 2, 2}), 8.0/33, 1e-15)
	if got := AdjustedRand([]int{0, 0, 0}, []int{5, 5, 5}); got != 1 {
		t.Errorf("both all-in-one: %v, want 1", got)
	}

	// Independent random partitions: the index is corrected for chance,
	// so its mean is about 0. With 50 products in 4 groups the standard
	// deviation of one index is about 0.028 (measured with this seed), so
	// the mean of 2000 has standard error about 6e-4; 0.003 is 5 of those.
	src := rand.New(rand.NewPCG(13, 14))
	const reps = 2000
	var mean float64
	x, y := make([]int, 50), make([]int, 50)
	for r := 0; r < reps; r++ {
		for i := range x {
			x[i], y[i] = src.IntN(4), src.IntN(4)
		}
		mean += AdjustedRand(x, y) / reps
	}
	if math.Abs(mean) > 0.003 {
		t.Errorf("mean ARI of independent partitions %v, want about 0", mean)
	}
}

func TestNextMixtureOneDrawIsNextValue(t *testing.T) {
	t.Parallel()
	th := Theta{LogA: 0.4, LogK: 0.3, LogS: math.Log(0.35)}
	for _, vals := range [][]float64{{0.8, 0.45}, nil} {
		d := MustDatum(vals, 10)
		draws := []Draw{{LogWeight: -3, Labels: []uint16{1}, Segments: []Theta{{}, th}, Alpha: 1}}
		mix := NextValueMixture(draws, NormalizedWeights(draws), &d, 0)
		nv, ok := NewNextValue(th, &d)
		if !ok || !mix.Defined() {
			t.Fatal("next value undefined")
		}
		for _, x := range []float64{0.01, 0.1, 0.3, 0.44, 0.6} {
			wantClose(t, fmt.Sprintf("CDF(%v)", x), mix.CDF(x), nv.CDF(x), 1e-15)
			wantClose(t, fmt.Sprintf("Exceed(%v)", x), mix.Exceed(x), nv.Exceed(x), 1e-15)
		}
		for _, u := range []float64{0.1, 0.5, 0.9} {
			wantClose(t, fmt.Sprintf("Quantile(%v)", u), mix.Quantile(u), nv.Quantile(u), 1e-15)
		}
	}
}

func TestNextMixtureQuantileAndExceed(t *testing.T) {
	t.Parallel()
	src := rand.New(rand.NewPCG(15, 16))
	for _, vals := range [][]float64{{0.9, 0.5, 0.3}, {0.2}, nil} {
		d := MustDatum(vals, 10)
		draws := randomDraws(src, 1, 64, 3, false)
		mix := NextValueMixture(draws, NormalizedWeights(draws), &d, 0)
		for _, u := range []float64{0.1, 0.5, 0.9} {
			q := mix.Quantile(u)
			// The root is found to 1e-9 relative in x, so the mixed CDF
			// must cross u between q(1 - 2e-9) and q(1 + 2e-9).
			if lo, hi := mix.CDF(q*(1-2e-9)), mix.CDF(q*(1+2e-9)); !(lo <= u && u <= hi) {
				t.Errorf("n=%d: Quantile(%v) = %v, CDF around it %v..%v", d.N(), u, q, lo, hi)
			}
			if d.N() > 0 && q > vals[len(vals)-1] {
				t.Errorf("n=%d: Quantile(%v) = %v above y_n", d.N(), u, q)
			}
		}
		prev := 1.0
		for x := 0.005; x < 2; x *= 1.2 {
			e := mix.Exceed(x)
			if e > prev || e < 0 {
				t.Fatalf("n=%d: Exceed(%v) = %v after %v: not non-increasing", d.N(), x, e, prev)
			}
			prev = e
		}
	}
	// Two far-apart kernels (scales 0.01 and 1, weights 0.4 and 0.6): the
	// mixed CDF has a near-flat stretch at 0.4 where Newton steps overshoot
	// and bisection must take over.
	d := MustDatum(nil, 10)
	far := []Draw{
		{LogWeight: math.Log(0.4), Labels: []uint16{0}, Segments: []Theta{{0, 0.5, math.Log(0.01)}}, Alpha: 1},
		{LogWeight: math.Log(0.6), Labels: []uint16{0}, Segments: []Theta{{0, 0.5, 0}}, Alpha: 1},
	}
	mix := NextValueMixture(far, NormalizedWeights(far), &d, 0)
	for _, u := range []float64{1e-6, 0.1, 0.39, 0.3999, 0.4001, 0.41, 0.5, 0.9, 1 - 1e-9} {
		q := mix.Quantile(u)
		if lo, hi := mix.CDF(q*(1-2e-9)), mix.CDF(q*(1+2e-9)); !(lo <= u && u <= hi) {
			t.Errorf("two kernels: Quantile(%v) = %v, CDF around it %v..%v", u, q, lo, hi)
		}
	}

	// A small exponentiation power (a = e^-4) puts the low quantiles where
	// G(x) is below 1e-8, the series branch of the slope.
	small := []Draw{{Labels: []uint16{0}, Segments: []Theta{{-4, 0.3, math.Log(0.3)}}, Alpha: 1}, far[1]}
	mix = NextValueMixture(small, []float64{0.7, 0.3}, &d, 0)
	for _, u := range []float64{1e-3, 0.01, 0.1, 0.5} {
		q := mix.Quantile(u)
		if lo, hi := mix.CDF(q*(1-2e-9)), mix.CDF(q*(1+2e-9)); !(lo <= u && u <= hi) {
			t.Errorf("small power: Quantile(%v) = %v, CDF around it %v..%v", u, q, lo, hi)
		}
	}

	full := MustDatum([]float64{0.5, 0.4}, 2)
	if mix := NextValueMixture(randomDraws(src, 1, 3, 2, false), []float64{0.2, 0.3, 0.5}, &full, 0); mix.Defined() || !math.IsNaN(mix.Quantile(0.5)) {
		t.Error("n = L: mixture should be undefined")
	}
}

// TestSegmentMedianRobust gives one draw in twenty a kernel of the kind a
// member without reported values gets when it sits alone (k = e^-3, from
// the base measure's tail): the median of the largest of its L = 10 draws
// is astronomical, and a posterior mean over draws would report it. The
// summary must stay at the other draws' value: the largest of L iid
// Exponential(s) draws has CDF (1 - e^(-x/s))^L (textbook fact), so its
// median is -s ln(1 - 2^(-1/L)).
func TestSegmentMedianRobust(t *testing.T) {
	t.Parallel()
	const s, l = 0.4, 10
	d := MustDatum([]float64{0.3}, l)
	var draws []Draw
	for i := 0; i < 20; i++ {
		th := Theta{LogA: 0, LogK: 0, LogS: math.Log(s)}
		if i == 7 {
			th.LogK = -3
		}
		draws = append(draws, Draw{Labels: []uint16{0}, Segments: []Theta{th}, Alpha: 1})
	}
	if med := newOrderMedians().of(draws[7].Segments[0].EW(), l)[0]; !(med > 1e6) {
		t.Fatalf("the outlying kernel's median is %v; the test needs it large", med)
	}
	sum, err := Summarize(draws, []*Datum{&d}, DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	wantClose(t, "median of the largest of 10", sum.Segments[0].Median[0], -s*math.Log(1-math.Pow(2, -1.0/l)), 1e-12)
}

func TestSegmentMedianExponential(t *testing.T) {
	t.Parallel()
	// With a = 1, k = 1 the kernel is Exponential with scale s, whose
	// median is s ln 2 (textbook fact); with L = 1 the largest value is
	// that single draw. Beta(1, 1) has median 1/2 exactly, and gonum's
	// incomplete-beta inverse recovers it to rounding.
	const s = 0.4
	d := MustDatum([]float64{0.3}, 1)
	draws := []Draw{{Labels: []uint16{0}, Segments: []Theta{{LogA: 0, LogK: 0, LogS: math.Log(s)}}, Alpha: 1}}
	sum, err := Summarize(draws, []*Datum{&d}, DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	seg := sum.Segments[0]
	wantClose(t, "median of the largest of 1", seg.Median[0], s*math.Ln2, 1e-14)
	if !math.IsNaN(seg.Median[1]) || !math.IsNaN(seg.Median[2]) {
		t.Errorf("medians of 2nd, 3rd largest of 1 value: %v, want NaN", seg.Median)
	}
	// Leave-one-out count predictive with no other members: the prior
	// mean of p, 1/2, times L = 1.
	wantClose(t, "MeanReported", seg.MeanReported, 0.5, 1e-15)
	if sum.Next[0].Defined {
		t.Error("n = L = 1 should have no next value")
	}
}

func TestSegmentMeanReported(t *testing.T) {
	t.Parallel()
	// One draw, one segment, two products with L = 10 and n = 2, 4 under
	// Beta(1, 1). By hand: product 0 sees the other's A = 4, B = 6, so
	// E[p] = (1+4)/(2+10) = 5/12 and 10 * 5/12 = 25/6; product 1 sees
	// A = 2, B = 8, E[p] = 3/12, giving 5/2. Mean (25/6 + 5/2)/2 = 10/3.
	d0 := MustDatum([]float64{0.5, 0.3}, 10)
	d1 := MustDatum([]float64{0.6, 0.5, 0.2, 0.1}, 10)
	draws := []Draw{{Labels: []uint16{0, 0}, Segments: []Theta{{0, 0, math.Log(0.3)}}, Alpha: 1}}
	sum, err := Summarize(draws, []*Datum{&d0, &d1}, DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	wantClose(t, "MeanReported", sum.Segments[0].MeanReported, 10.0/3, 1e-15)
}

func TestSummarizeErrors(t *testing.T) {
	t.Parallel()
	data := threeData()
	good := twoDraws()
	cases := []struct {
		name  string
		draws func() []Draw
		data  []*Datum
		want  error
	}{
		{"no draws", func() []Draw { return nil }, data, ErrDraws},
		{"length mismatch", func() []Draw { return good }, data[:2], ErrDraws},
		{"NaN weight", func() []Draw {
			d := slices.Clone(good)
			d[1].LogWeight = math.NaN()
			return d
		}, data, ErrDraws},
		{"+Inf weight", func() []Draw {
			d := slices.Clone(good)
			d[0].LogWeight = math.Inf(1)
			return d
		}, data, ErrDraws},
		{"label beyond segments", func() []Draw {
			d := slices.Clone(good)
			d[0].Labels = []uint16{0, 0, 9}
			return d
		}, data, ErrDraws},
		{"nil datum", func() []Draw { return good }, []*Datum{data[0], nil, data[2]}, ErrDatum},
	}
	for _, c := range cases {
		if _, err := Summarize(c.draws(), c.data, DefaultSummaryOptions()); !errors.Is(err, c.want) {
			t.Errorf("%s: error %v, want %v", c.name, err, c.want)
		}
	}
	// Not errors: a category with no products yet, and a particle whose
	// weight has fallen to zero (log weight -Inf) beside a live one.
	if sum, err := Summarize([]Draw{{Alpha: 1}}, nil, DefaultSummaryOptions()); err != nil || len(sum.Partition) != 0 {
		t.Errorf("no products: %v, %v", sum, err)
	}
	dead := slices.Clone(good)
	dead[0].LogWeight = math.Inf(-1)
	if sum, err := Summarize(dead, data, DefaultSummaryOptions()); err != nil || sum.ESS != 1 || sum.NumSegments[2] != 1 {
		t.Errorf("zero-weight draw: ESS %v, NumSegments %v, error %v", sum.ESS, sum.NumSegments, err)
	}

	opt := DefaultSummaryOptions()
	opt.QuantileLo = 0.95
	if _, err := Summarize(good, data, opt); !errors.Is(err, ErrConfig) {
		t.Errorf("bad quantiles: error %v, want ErrConfig", err)
	}
}

// benchCategory builds a category of n products in k true segments and nd
// weighted draws that each reassign about 3% of the products at random,
// sometimes into an extra segment.
func benchCategory(n, nd, k int) ([]Draw, []*Datum) {
	src := rand.New(rand.NewPCG(17, 18))
	prior := DefaultPrior()
	truth := make([]uint16, n)
	thetas := make([]Theta, k+1)
	for c := range thetas {
		thetas[c] = prior.DrawTheta(src)
	}
	data := make([]*Datum, n)
	latent := make([]float64, 10)
	for i := range truth {
		truth[i] = uint16(src.IntN(k))
		ew := thetas[truth[i]].EW()
		for j := range latent {
			latent[j] = ew.Rand(src)
		}
		sort.Sort(sort.Reverse(sort.Float64Slice(latent)))
		d := MustDatum(slices.Clone(latent[:src.IntN(7)]), 10)
		data[i] = &d
	}
	draws := make([]Draw, nd)
	for d := range draws {
		labels := slices.Clone(truth)
		for i := range labels {
			if src.Float64() < 0.03 {
				labels[i] = uint16(src.IntN(k + 1))
			}
		}
		segs := make([]Theta, k+1)
		for c := range segs {
			segs[c] = Theta{thetas[c].LogA + 0.1*src.NormFloat64(), thetas[c].LogK + 0.1*src.NormFloat64(), thetas[c].LogS + 0.1*src.NormFloat64()}
		}
		draws[d] = Draw{LogWeight: src.NormFloat64(), Labels: labels, Segments: segs, Alpha: 1 + src.Float64()}
	}
	return draws, data
}

func BenchmarkPointPartition(b *testing.B) {
	draws, _ := benchCategory(3000, 256, 5)
	b.ResetTimer()
	for b.Loop() {
		PointPartition(draws, 50)
	}
}

func BenchmarkSummarize(b *testing.B) {
	draws, data := benchCategory(3000, 256, 5)
	opt := DefaultSummaryOptions()
	b.ResetTimer()
	for b.Loop() {
		if _, err := Summarize(draws, data, opt); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/3000, "ns/product")
}

func ExampleAdjustedRand() {
	truth := []int{0, 0, 0, 1, 1, 1}
	found := []int{5, 5, 5, 2, 2, 2} // same segments, other names
	fmt.Println(AdjustedRand(truth, found))
	// Output: 1
}

func ExamplePointPartition() {
	// Three equally weighted draws over four products; two agree that
	// products 0-1 and 2-3 pair up.
	seg := make([]Theta, 3)
	draws := []Draw{
		{Labels: []uint16{0, 0, 1, 1}, Segments: seg, Alpha: 1},
		{Labels: []uint16{2, 2, 0, 0}, Segments: seg, Alpha: 1},
		{Labels: []uint16{0, 1, 1, 2}, Segments: seg, Alpha: 1},
	}
	part, loss := PointPartition(draws, 50)
	fmt.Println(part, fmt.Sprintf("%.4f", loss))
	// Output: [0 0 1 1] 1.0000
}
