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

// memoData draws a category of three segments of perSeg products each,
// values from each segment's kernel, L = 10 candidates.
func memoData(perSeg int, seed uint64) []*Datum {
	src := rand.New(rand.NewPCG(seed, 41))
	kernels := []Theta{
		{LogA: math.Log(2), LogK: math.Log(1.5), LogS: math.Log(0.3)},
		{LogA: math.Log(0.7), LogK: math.Log(3), LogS: math.Log(0.05)},
		{LogA: math.Log(1.2), LogK: math.Log(0.8), LogS: math.Log(1.5)},
	}
	var data []*Datum
	for i := 0; i < perSeg; i++ {
		for _, th := range kernels {
			ew := th.EW()
			vals := make([]float64, 10)
			for j := range vals {
				vals[j] = ew.Rand(src)
			}
			sortDesc(vals)
			d := MustDatum(vals[:1+src.IntN(5)], 10)
			data = append(data, &d)
		}
	}
	return data
}

// staleFits returns the number of segments of st whose memoised
// split-merge proposal differs from the fit to their members and data
// now, and the number that carry one.
func staleFits(st *State) (stale, memos int) {
	mem := st.members(nil)
	for c := range st.segs {
		g := &st.segs[c]
		if g.size == 0 || g.fit == nil {
			continue
		}
		memos++
		if *g.fit != fitMembers(st.prior, st.data, mem[c]) {
			stale++
		}
	}
	return stale, memos
}

// TestFitMemoKeepsChain runs two batch chains from one seed, one reusing
// the segments' memoised split-merge proposals and one refitting every
// proposal, and requires the same chain, bit for bit: labels, kernels
// and alpha after every sweep. A memo that differed from the fit it
// replaces (a fit that depended on more than the member set and data)
// would change an acceptance or a draw and part the chains. Every memo
// present after a sweep must also equal the fit to its segment now.
func TestFitMemoKeepsChain(t *testing.T) {
	t.Parallel()
	data := memoData(12, 1)
	cfg := DefaultGibbsConfig()
	cfg.SplitMerge = 4
	sweeps := 60
	if testing.Short() {
		sweeps = 25
	}
	var chains [2]*Gibbs
	var srcs [2]*rand.Rand
	for k := range chains {
		srcs[k] = rand.New(rand.NewPCG(5, 6))
		g, err := NewGibbs(data, cfg, srcs[k])
		if err != nil {
			t.Fatal(err)
		}
		g.st.noFitMemo = k == 1
		chains[k] = g
	}
	for s := 0; s < sweeps; s++ {
		for k, g := range chains {
			g.Sweep(srcs[k])
		}
		a, b := chains[0].st, chains[1].st
		for i := range data {
			if a.label(i) != b.label(i) {
				t.Fatalf("sweep %d: product %d in segment %d with the memo, %d without", s, i, a.label(i), b.label(i))
			}
		}
		// Bit-identical is the claim, so the comparison is exact.
		if math.Float64bits(a.alpha) != math.Float64bits(b.alpha) {
			t.Fatalf("sweep %d: alpha %v with the memo, %v without", s, a.alpha, b.alpha)
		}
		for c := range a.segs {
			if a.segs[c].size > 0 && a.segs[c].theta != b.segs[c].theta {
				t.Fatalf("sweep %d: segment %d kernel %+v with the memo, %+v without", s, c, a.segs[c].theta, b.segs[c].theta)
			}
		}
		if stale, _ := staleFits(a); stale > 0 {
			t.Fatalf("sweep %d: %d segments carry a fit that is not their members' fit", s, stale)
		}
	}
	with, without := chains[0].Moves(), chains[1].Moves()
	if with.FitsReused == 0 {
		t.Errorf("the memoised chain reused no fit (%+v): the test compared nothing", with)
	}
	if without.FitsReused != 0 {
		t.Errorf("the chain without the memo reused %d fits", without.FitsReused)
	}
	if with.FitsMade+with.FitsReused != without.FitsMade {
		t.Errorf("fits asked for: %d + %d with the memo, %d without", with.FitsMade, with.FitsReused, without.FitsMade)
	}
	t.Logf("memo: %d fits reused, %d made; %+v", with.FitsReused, with.FitsMade, with)
}

// TestFitMemoClearedByReplace brings products in, builds the population,
// makes split-merge proposals in every particle (which leave memoised
// fits behind), then re-estimates
// products by Replaces that keep the assignments, and requires that no
// particle's segment carries a fit made for a member's old datum. The
// same run with the clearing in swapDatum turned off must find such a
// fit, so the check would notice the clearing removed.
func TestFitMemoClearedByReplace(t *testing.T) {
	t.Parallel()
	data := memoData(8, 2)
	for _, keepStale := range []bool{false, true} {
		cfg := DefaultParticleConfig()
		cfg.Particles = 32
		cfg.SplitMerge = 4
		cfg.KeepESS = 1e-9                     // keep the assignments whenever the weights are finite
		cfg.BuildChains, cfg.BuildBurn = 4, 20 // a quick start: its accuracy is not checked
		ps, err := NewParticles(cfg, 9, 10)
		if err != nil {
			t.Fatal(err)
		}
		for i, d := range data {
			if _, err := ps.Add(exactID(i), *d); err != nil {
				t.Fatal(err)
			}
		}
		ps.SettleRefit()
		// The steps end with a scan, which clears most fits; a few more
		// proposals (each leaving the posterior invariant) leave fits of
		// the segments as they stand.
		src := rand.New(rand.NewPCG(11, 12))
		memos := 0
		for _, st := range ps.parts {
			st.splitMergeMoves(4, src)
			st.keepStaleFits = keepStale
			_, m := staleFits(st)
			memos += m
		}
		if memos == 0 {
			t.Fatal("no particle carries a memoised fit after the build: nothing to check")
		}
		kept0, _ := ps.ReplaceForms()
		for i, d := range data {
			// The same values a fifth higher: the assignments fit as well,
			// so the Replace keeps them.
			vals := make([]float64, d.N())
			for j := range vals {
				vals[j] = 1.2 * math.Exp(d.logY[j])
			}
			if _, err := ps.Replace(exactID(i), MustDatum(vals, d.L())); err != nil {
				t.Fatal(err)
			}
		}
		if kept, _ := ps.ReplaceForms(); kept == kept0 {
			t.Fatal("no Replace kept its assignments: swapDatum was not exercised")
		}
		stale := 0
		for _, st := range ps.parts {
			s, _ := staleFits(st)
			stale += s
		}
		switch {
		case !keepStale && stale > 0:
			t.Errorf("%d segments carry a fit to a member's old datum after Replaces", stale)
		case keepStale && stale == 0:
			t.Errorf("with the clearing off no stale fit was found: the check has no power")
		}
	}
}
