package sequential

import (
	"math"
	"math/rand/v2"
	"sort"
	"testing"
)

// gewekePrior narrows the base measure so that simulated values stay far
// from floating-point underflow; the test checks the sampler's code, which
// does not depend on the hyperparameters' values.
func gewekePrior() Prior {
	p := DefaultPrior()
	p.LogA = Normal{0, 0.5}
	p.LogK = Normal{0.3, 0.5}
	p.LogS = Normal{math.Log(0.3), 0.5}
	p.AlphaShape, p.AlphaRate = 2, 2
	return p
}

// simulateData draws every datum of st from p(y | z, theta) with p
// integrated over its Beta prior: one fresh p per segment, then counts
// and the top n of L iid EW values. It rewrites st's data and count totals.
func simulateData(st *State, l int, src *rand.Rand) {
	ps := make([]float64, len(st.segs))
	for c := range ps {
		ps[c] = betaRand(src, st.prior.CountA, st.prior.CountB)
		st.segs[c].reported, st.segs[c].considered = 0, 0
	}
	for i := range st.data {
		c := st.label(i)
		ew := st.segs[c].theta.EW()
		vals := make([]float64, l)
		for j := range vals {
			vals[j] = ew.Rand(src)
		}
		sort.Sort(sort.Reverse(sort.Float64Slice(vals)))
		n := 0
		for j := 0; j < l; j++ {
			if src.Float64() < ps[c] {
				n++
			}
		}
		d := MustDatum(vals[:n], l)
		st.data[i] = &d
		st.segs[c].reported += n
		st.segs[c].considered += l
	}
}

// priorState draws (alpha, z, theta) from the prior: alpha from its
// Gamma, z from the Chinese restaurant process, theta from G0.
func priorState(prior *Prior, n int, src *rand.Rand) *State {
	st := newState(prior, 3, n, prior.DrawAlpha(src))
	for i := 0; i < n; i++ {
		st.data[i] = &Datum{l: 1} // placeholder counts, replaced by simulateData
		st.n++
		d := st.data[i]
		u := src.Float64() * (float64(i) + st.alpha)
		acc := 0.0
		var c uint16 = Absent
		for k := range st.segs {
			acc += float64(st.segs[k].size)
			if u < acc && st.segs[k].size > 0 {
				c = uint16(k)
				break
			}
		}
		if c == Absent {
			c = st.newSegment(prior.DrawTheta(src))
		}
		st.join(i, d, c)
	}
	return st
}

// gewekeStats are label-invariant statistics of the joint state.
func gewekeStats(st *State) []float64 {
	c := st.label(0)
	t := st.segs[c].theta
	return []float64{
		float64(st.numSegments()),
		st.alpha,
		float64(st.segs[c].size),
		t.LogA, t.LogK, t.LogS,
		float64(st.data[0].N()),
	}
}

var gewekeNames = []string{"K", "alpha", "size of product 0's segment", "log a of product 0's segment", "log k", "log s", "n_0"}

// gewekeZ runs Geweke's (2004) joint-distribution test: the means of the
// statistics under the marginal-conditional simulator (exact draws from
// the joint prior of parameters and data) and under the successive-
// conditional simulator (alternate a sampler sweep given the data with a
// fresh draw of the data given the parameters) must agree. It returns the
// z-score of each statistic; the successive chain's variance is corrected
// for autocorrelation with batch means (50 batches).
func gewekeZ(t *testing.T, sweepPrior, genPrior Prior, nProducts, l, m1, m2 int, seed uint64) []float64 {
	t.Helper()
	var mem [][]int
	return gewekeZWith(t, sweepPrior, genPrior, nProducts, l, m1, m2, seed, func(st *State, src *rand.Rand) {
		for i := range st.data {
			st.reassign(i, src)
		}
		mem = st.updateKernelsAndAlpha(mem, src)
	})
}

// gewekeZWith is gewekeZ with the sampler's moves given as step, which
// must leave the posterior given the data invariant.
func gewekeZWith(t *testing.T, sweepPrior, genPrior Prior, nProducts, l, m1, m2 int, seed uint64, step func(*State, *rand.Rand)) []float64 {
	t.Helper()
	src := rand.New(rand.NewPCG(seed, 7))
	ns := len(gewekeNames)

	mc := make([][]float64, ns)
	for r := 0; r < m1; r++ {
		st := priorState(&genPrior, nProducts, src)
		simulateData(st, l, src)
		for j, v := range gewekeStats(st) {
			mc[j] = append(mc[j], v)
		}
	}

	st := priorState(&genPrior, nProducts, src)
	simulateData(st, l, src)
	st.prior = &sweepPrior
	sc := make([][]float64, ns)
	for r := 0; r < m2; r++ {
		step(st, src)
		simulateData(st, l, src)
		for j, v := range gewekeStats(st) {
			sc[j] = append(sc[j], v)
		}
	}

	z := make([]float64, ns)
	for j := range z {
		m1v, v1 := meanVar(mc[j])
		m2v, v2 := batchMeanVar(sc[j], 50)
		z[j] = (m1v - m2v) / math.Sqrt(v1/float64(len(mc[j]))+v2)
	}
	return z
}

func meanVar(x []float64) (mean, variance float64) {
	for _, v := range x {
		mean += v
	}
	mean /= float64(len(x))
	for _, v := range x {
		variance += (v - mean) * (v - mean)
	}
	return mean, variance / float64(len(x)-1)
}

// batchMeanVar returns the mean of x and the batch-means estimate of the
// variance of that mean.
func batchMeanVar(x []float64, batches int) (mean, varOfMean float64) {
	size := len(x) / batches
	bm := make([]float64, batches)
	for b := range bm {
		bm[b], _ = meanVar(x[b*size : (b+1)*size])
	}
	mean, v := meanVar(bm)
	return mean, v / float64(batches)
}

// TestGewekeJoint checks the batch sampler's moves (Algorithm 8
// reassignment with p collapsed, the slice and Metropolis updates of
// theta, Escobar-West alpha) by Geweke's (2004) joint-distribution test
// on 5 products with L = 4. With 7 statistics, |z| < 4 for all of them has a false-alarm
// chance below 1e-3 under correct code (normal tails), so a failure
// means a real discrepancy; the seed is fixed.
func TestGewekeJoint(t *testing.T) {
	t.Parallel()
	m1, m2 := 20000, 40000
	if testing.Short() {
		m1, m2 = 5000, 10000
	}
	p := gewekePrior()
	z := gewekeZ(t, p, p, 5, 4, m1, m2, 11)
	for j, v := range z {
		t.Logf("%-32s z = %+.2f", gewekeNames[j], v)
		if math.Abs(v) > 4 {
			t.Errorf("%s: Geweke z = %.2f, want |z| <= 4", gewekeNames[j], v)
		}
	}
}

// TestGewekeDetectsBrokenUpdate shows the test above has power: the
// sampler's kernel update uses a base measure whose log-scale mean is
// shifted by 0.4 from the one that generated the data, a bug of the size
// of a wrong default. Some statistic must then leave |z| <= 4.
func TestGewekeDetectsBrokenUpdate(t *testing.T) {
	t.Parallel()
	m1, m2 := 20000, 40000
	if testing.Short() {
		m1, m2 = 5000, 10000
	}
	gen := gewekePrior()
	broken := gen
	broken.LogS.Mu += 0.4
	z := gewekeZ(t, broken, gen, 5, 4, m1, m2, 11)
	worst := 0.0
	for j, v := range z {
		t.Logf("%-32s z = %+.2f", gewekeNames[j], v)
		worst = math.Max(worst, math.Abs(v))
	}
	if worst <= 4 {
		t.Errorf("broken sampler passed the Geweke test (max |z| = %.2f); the test has no power", worst)
	}
}

// TestCRPExpectedSegments checks the Chinese-restaurant simulator that the
// Geweke test uses as its exact reference: with alpha fixed, the expected
// number of segments among n products is sum_{i=1..n} alpha/(alpha+i-1)
// (Antoniak 1974). 20,000 draws; tolerance 4 standard errors of the mean.
func TestCRPExpectedSegments(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		alpha float64
		n     int
	}{{0.5, 10}, {1, 25}, {3, 40}} {
		prior := DefaultPrior()
		// A Gamma prior so narrow that alpha is effectively fixed: shape
		// 1e8 and rate 1e8/alpha give sd alpha*1e-4.
		prior.AlphaShape, prior.AlphaRate = 1e8, 1e8/tc.alpha
		src := rand.New(rand.NewPCG(uint64(tc.n), 1))
		const draws = 20000
		ks := make([]float64, draws)
		for r := range ks {
			ks[r] = float64(priorState(&prior, tc.n, src).numSegments())
		}
		mean, v := meanVar(ks)
		want := 0.0
		for i := 1; i <= tc.n; i++ {
			want += tc.alpha / (tc.alpha + float64(i) - 1)
		}
		se := math.Sqrt(v / draws)
		if math.Abs(mean-want) > 4*se {
			t.Errorf("alpha %v, n %d: mean K %.4f, Antoniak's E[K] = %.4f (4 SE = %.4f)", tc.alpha, tc.n, mean, want, 4*se)
		}
	}
}
