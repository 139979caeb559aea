package sequential

import (
	"math"
	"math/rand/v2"
	"testing"
)

// smChain runs a chain on the five-product enumeration data from one
// segment and returns the partition of every iteration after burn-in.
// alone: each iteration is rate split-merge proposals and an alpha
// update, nothing else (the move alone must leave the posterior
// invariant: the kernels change only through it). Otherwise each
// iteration is a full batch sweep with rate proposals.
func smChain(t *testing.T, drop ratioTerm, alone bool, rate float64, iters int, seed uint64) ([]string, MoveStats) {
	t.Helper()
	e := exactFive()
	src := rand.New(rand.NewPCG(seed, 31))
	cfg := GibbsConfig{Prior: e.prior, Aux: 3, Sweeps: 1, Burn: 0, Thin: 1, SplitMerge: rate}
	g, err := NewGibbs(e.data, cfg, src)
	if err != nil {
		t.Fatal(err)
	}
	g.st.drop = drop
	var keys []string
	var moves MoveStats
	const burn = 500
	for it := 0; it < iters+burn; it++ {
		if alone {
			moves = moves.Add(g.st.splitMergeMoves(rate, src))
			g.st.updateAlpha(src)
		} else {
			g.Sweep(src)
		}
		if it >= burn {
			keys = append(keys, partitionKey(g.st.labels.l))
		}
	}
	if !alone {
		moves = g.Moves()
	}
	return keys, moves
}

// iactK returns the integrated autocorrelation time of the number of
// segments along the chain, by batch means: tau = batch size times the
// variance of the batch means over the variance of the series (Geyer
// 1992, batch means; 50 batches).
func iactK(keys []string) float64 {
	x := make([]float64, len(keys))
	for i, k := range keys {
		x[i] = float64(numBlocks(k))
	}
	_, v := meanVar(x)
	_, vm := batchMeanVar(x, 50)
	if v == 0 {
		return 1
	}
	return math.Max(1, vm*float64(len(x))/v)
}

// exactTV compares the chain's partition frequencies with the exact
// posterior: TV over partitions and over K, and the tolerances of
// checkExact at the effective sample size len(keys)/tau.
func exactTV(keys []string, tau float64) (tv, tvK, tol, tolK float64) {
	got := map[string]float64{}
	for _, k := range keys {
		got[k] += 1 / float64(len(keys))
	}
	want, wantK := exactFive().posterior().maps()
	neff := float64(len(keys)) / tau
	return totalVariation(got, want), totalVariation(blockCounts(got), wantK),
		2.5 * iidTV(want, neff), 3.5 * iidTV(wantK, neff)
}

// TestExactSplitMerge compares the partitions visited by chains that use
// the split-merge move with the exact posterior of the five-product
// category: the move alone (with alpha updates), and the move combined
// with the batch sampler's other moves. The effective sample size is the
// number of iterations over the integrated autocorrelation time of K.
func TestExactSplitMerge(t *testing.T) {
	t.Parallel()
	iters := 60000
	if testing.Short() {
		iters = 15000
	}
	for _, tc := range []struct {
		name  string
		alone bool
		rate  float64
	}{{"alone", true, 2}, {"with-gibbs", false, 1}} {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			keys, moves := smChain(t, keepAllTerms, tc.alone, tc.rate, iters, 41)
			tau := iactK(keys)
			tv, tvK, tol, tolK := exactTV(keys, tau)
			t.Logf("%d iterations, tau %.1f, moves %+v: TV over partitions %.4f (tol %.4f), TV of K %.4f (tol %.4f)",
				iters, tau, moves, tv, tol, tvK, tolK)
			if moves.SplitsAccepted == 0 || moves.MergesAccepted == 0 {
				t.Errorf("no split or no merge accepted: %+v", moves)
			}
			if !(tv <= tol) || !(tvK <= tolK) {
				t.Errorf("split-merge chain disagrees with the exact posterior: TV %.4f (tol %.4f), TV of K %.4f (tol %.4f)", tv, tol, tvK, tolK)
			}
		})
	}
}

// TestExactSplitMergeDetectsDroppedTerm shows that the enumeration check
// has power against each term of the ratio: with one of them left out,
// the move alone must fail the check above.
func TestExactSplitMergeDetectsDroppedTerm(t *testing.T) {
	t.Parallel()
	iters := 60000
	if testing.Short() {
		iters = 15000
	}
	for _, tc := range []struct {
		name string
		drop ratioTerm
	}{
		{"part-proposal-densities", dropPartDensities},
		{"union-proposal-density", dropUnionDensity},
		{"allocation", dropAllocation},
		{"count-term", dropCountTerm},
		{"crp-factor", dropCRPFactor},
	} {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			keys, moves := smChain(t, tc.drop, true, 2, iters, 41)
			tau := iactK(keys)
			tv, tvK, tol, tolK := exactTV(keys, tau)
			t.Logf("without the %s: tau %.1f, moves %+v: TV %.4f (tol %.4f), TV of K %.4f (tol %.4f)", tc.name, tau, moves, tv, tol, tvK, tolK)
			if tv <= tol && tvK <= tolK {
				t.Errorf("%s dropped from the ratio, yet the chain passed the enumeration check", tc.name)
			}
		})
	}
}

// TestGewekeSplitMerge runs Geweke's joint-distribution test (see
// TestGewekeJoint) with the split-merge move: alone with alpha updates,
// and with the batch sampler's other moves. A second part drops each
// term of the ratio in turn; the move alone must then fail the test on
// some statistic (|z| > 4).
func TestGewekeSplitMerge(t *testing.T) {
	t.Parallel()
	m1, m2 := 20000, 40000
	if testing.Short() {
		m1, m2 = 5000, 10000
	}
	p := gewekePrior()
	alone := func(drop ratioTerm) func(*State, *rand.Rand) {
		return func(st *State, src *rand.Rand) {
			st.drop = drop
			st.splitMergeMoves(2, src)
			st.updateAlpha(src)
		}
	}
	combined := func(st *State, src *rand.Rand) {
		var mem [][]int
		st.splitMergeMoves(1, src)
		for i := range st.data {
			st.reassign(i, src)
		}
		mem = st.updateKernelsAndAlpha(mem, src)
	}
	worst := func(z []float64) float64 {
		w := 0.0
		for _, v := range z {
			w = math.Max(w, math.Abs(v))
		}
		return w
	}
	for _, tc := range []struct {
		name string
		step func(*State, *rand.Rand)
		fail bool // a term is dropped: the test must fail
	}{
		{"alone", alone(keepAllTerms), false},
		{"with-gibbs", combined, false},
		{"without-part-proposal-densities", alone(dropPartDensities), true},
		{"without-union-proposal-density", alone(dropUnionDensity), true},
		{"without-allocation", alone(dropAllocation), true},
		{"without-count-term", alone(dropCountTerm), true},
		{"without-crp-factor", alone(dropCRPFactor), true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if tc.fail && testing.Short() {
				// At the short run's size the count term's effect
				// (|z| about 6 at full size) is within the noise.
				t.Skip("power check runs at full size only")
			}
			t.Parallel()
			z := gewekeZWith(t, p, p, 5, 4, m1, m2, 13, tc.step)
			w := worst(z)
			t.Logf("max |z| = %.2f: %.2f", w, z)
			switch {
			case !tc.fail && w > 4:
				t.Errorf("Geweke max |z| = %.2f, want <= 4", w)
			case tc.fail && w <= 4:
				t.Errorf("a term dropped from the ratio, yet the Geweke test passed (max |z| %.2f)", w)
			}
		})
	}
}
