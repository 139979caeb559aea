package sequential_test

import (
	"math"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"rivalmix/sequential"
	"rivalmix/sequential/synth"
)

// agreement compares two weighted posteriors over the same products:
// co-segment probabilities (mean and max absolute difference over pairs),
// the number of segments (total variation) and the next-value exceedance
// probabilities (mean absolute difference).
type agreement struct {
	simMean, simMax, kTV, exceedMean float64
}

func compare(t testing.TB, a, b []sequential.Draw, data []*sequential.Datum) agreement {
	t.Helper()
	var g agreement
	g.simMean, g.simMax = similarityDiffs(sequential.SimilarityMatrix(a), sequential.SimilarityMatrix(b))
	opt := sequential.DefaultSummaryOptions()
	ua, err := sequential.Summarize(a, data, opt)
	if err != nil {
		t.Fatal(err)
	}
	ub, err := sequential.Summarize(b, data, opt)
	if err != nil {
		t.Fatal(err)
	}
	for k := 1; k < 64; k++ {
		g.kTV += math.Abs(ua.NumSegments[k] - ub.NumSegments[k])
	}
	g.kTV /= 2
	n := 0
	for i := range ua.Next {
		if ua.Next[i].Defined {
			g.exceedMean += math.Abs(ua.Next[i].PExceed - ub.Next[i].PExceed)
			n++
		}
	}
	g.exceedMean /= float64(max(n, 1))
	return g
}

func (g agreement) check(t *testing.T, stage string) {
	t.Helper()
	t.Logf("%s: similarity mean |diff| %.4f, max %.4f; TV of K %.4f; p_exceed mean |diff| %.4f",
		stage, g.simMean, g.simMax, g.kTV, g.exceedMean)
	// The acceptance levels of the sequential-updater issue.
	if g.simMean > 0.02 || g.simMax > 0.10 || g.kTV > 0.10 || g.exceedMean > 0.03 {
		t.Errorf("%s: particles disagree with the long batch run beyond (0.02, 0.10, 0.10, 0.03)", stage)
	}
}

func gibbsReference(t testing.TB, data []*sequential.Datum, sweeps int, seed uint64) []sequential.Draw {
	t.Helper()
	draws, err := gibbsChain(data, sweeps, seed)
	if err != nil {
		t.Fatal(err)
	}
	return draws
}

// gibbsChain runs one batch chain of the given length (a tenth burned,
// every tenth sweep kept) from its own seed.
func gibbsChain(data []*sequential.Datum, sweeps int, seed uint64) ([]sequential.Draw, error) {
	cfg := sequential.DefaultGibbsConfig()
	cfg.Sweeps, cfg.Burn, cfg.Thin = sweeps, sweeps/10, 10
	src := rand.New(rand.NewPCG(seed, 77))
	g, err := sequential.NewGibbs(data, cfg, src)
	if err != nil {
		return nil, err
	}
	return g.Run(src, nil), nil
}

// referenceChains is how many independent batch chains a reference pools.
// In diagnostic runs on 18 simulated categories of 300 products, two
// single 20,000-sweep chains differed in their largest co-segment
// probability by 0.026-0.103 (once in 54 comparisons above the 0.10
// level), so one chain is too coarse a yardstick for that level; pooling
// three cuts the reference's own noise by about sqrt(3).
const referenceChains = 3

// pooledReference runs referenceChains batch chains of the given length
// concurrently, from seeds seed, seed+10, seed+20, and returns all their
// draws together. It logs the largest co-segment difference between any
// two of the chains: the noise floor of the comparison.
func pooledReference(t testing.TB, data []*sequential.Datum, sweeps int, seed uint64) []sequential.Draw {
	t.Helper()
	chains := make([][]sequential.Draw, referenceChains)
	errs := make([]error, referenceChains)
	var wg sync.WaitGroup
	for k := range chains {
		wg.Add(1)
		go func() {
			defer wg.Done()
			chains[k], errs[k] = gibbsChain(data, sweeps, seed+10*uint64(k))
		}()
	}
	wg.Wait()
	var pool []sequential.Draw
	for k, c := range chains {
		if errs[k] != nil {
			t.Fatal(errs[k])
		}
		pool = append(pool, c...)
	}
	sims := make([][][]float64, len(chains))
	for k, c := range chains {
		sims[k] = sequential.SimilarityMatrix(c)
	}
	spread := 0.0
	for a := range sims {
		for b := a + 1; b < len(sims); b++ {
			_, m := similarityDiffs(sims[a], sims[b])
			spread = math.Max(spread, m)
		}
	}
	t.Logf("reference: %d chains of %d sweeps; largest co-segment difference between two of them %.4f", referenceChains, sweeps, spread)
	return pool
}

// similarityDiffs returns the mean and the largest absolute difference
// between two co-segment probability matrices over the same products,
// over the pairs i < j.
func similarityDiffs(sa, sb [][]float64) (mean, largest float64) {
	pairs := 0
	for i := range sa {
		for j := i + 1; j < len(sa); j++ {
			d := math.Abs(sa[i][j] - sb[i][j])
			mean += d
			largest = math.Max(largest, d)
			pairs++
		}
	}
	return mean / float64(max(pairs, 1)), largest
}

// agreementConfig is the particle budget with which the agreement levels
// hold: P = 256 and, at the end of each refit, 30 full sweeps of which the
// last 12 are kept as draws. In our runs 20 and 8 left the largest
// co-segment difference after the refit at 0.09 to 0.13 and P = 512 with
// 20 and 8 at 0.094: the limit is how many distinct macro-configurations
// (which segments exist) the particles carry, not their number. The
// service defaults (10 and 4) trade that accuracy for a third of the cost
// (README, Benchmarks).
func agreementConfig() sequential.ParticleConfig {
	pc := sequential.DefaultParticleConfig()
	pc.RefitSweeps, pc.KeepSweeps = 30, 12
	return pc
}

// TestParticlesAgreeWithBatch runs the particle updater the way the
// service does (micro-batches of 256 changes, a settle after each and at
// the end of a refit) over a first pass of Adds, then over a full second
// refit of Replaces with 5% of products removed, and compares each stage
// with a long batch run on the same data: three 20,000-sweep Gibbs
// chains pooled (pooledReference).
//
// It passes with this category (seed 41). It does not pass with every
// simulated category: DEVELOPERS.md has 18 diagnostic runs of the same
// kind (10 categories, refits that redraw or re-estimate every product).
// Against three pooled chains the particles met every level in 15 of
// them; the other three missed the 0.10 co-segment level by 1.8 to 8
// times the largest difference between two of the chains (0.047-0.099),
// so the particles are the ones off. The worst (re-estimate, seed 7;
// TV of K 0.22) was already off after the adds; in an earlier analysis of
// it the particles had split a large segment that the posterior mostly
// keeps whole, and single-product moves cannot merge such a split back
// within the settle's sweeps. The open issue on the updater records this.
func TestParticlesAgreeWithBatch(t *testing.T) {
	t.Parallel()
	n, sweeps := 300, 20000
	if testing.Short() {
		n, sweeps = 80, 3000
	}
	src := rand.New(rand.NewPCG(41, 42))
	cfg := synth.Scenario()
	cfg.Products = n
	seq := synth.NewSequence(cfg, 2, 0, src)

	ps, err := sequential.NewParticles(agreementConfig(), 1, 2)
	if err != nil {
		t.Fatal(err)
	}
	const batch = 256
	products := seq.Refit(0)
	for i := range products {
		if _, err := ps.Add(products[i].ID, products[i].Datum()); err != nil {
			t.Fatal(err)
		}
		if (i+1)%batch == 0 {
			ps.Settle()
		}
	}
	ps.SettleRefit()
	t.Logf("after adds: ESS %.0f of %d, %d ancestors", ps.ESS(), ps.NumParticles(), ps.Diversity())
	compare(t, ps.Draws(), pooledReference(t, ps.Data(), sweeps, 1), ps.Data()).check(t, "after a first pass of adds")

	products = seq.Refit(1)
	removed := 0
	for i := range products {
		if i%20 == 7 {
			if err := ps.Remove(products[i].ID); err != nil {
				t.Fatal(err)
			}
			removed++
		} else if _, err := ps.Replace(products[i].ID, products[i].Datum()); err != nil {
			t.Fatal(err)
		}
		if (i+1)%batch == 0 {
			ps.Settle()
		}
	}
	ps.SettleRefit()
	t.Logf("after the refit (%d removed): ESS %.0f of %d, %d ancestors", removed, ps.ESS(), ps.NumParticles(), ps.Diversity())
	compare(t, ps.Draws(), pooledReference(t, ps.Data(), sweeps, 2), ps.Data()).check(t, "after a refit of replaces and removes")
}

// meets reports whether g is within the acceptance levels.
func (g agreement) meets() bool {
	return g.simMean <= 0.02 && g.simMax <= 0.10 && g.kTV <= 0.10 && g.exceedMean <= 0.03
}

// BenchmarkRefitVsBatch measures, on one core (Workers = 1), the CPU
// time the particle updater needs to bring the posterior up to date after
// (a) a whole refit of N = 300 products and (b) a single product's refit,
// against re-running the batch sampler from scratch until it reaches the
// same agreement with a reference that pools three 20,000-sweep chains
// (in two of three runs).
// Two kinds of refit:
//
//   - redraw: every product's vector is drawn afresh from its segment
//     (synth's default; the hardest case), with the budget of
//     TestParticlesAgreeWithBatch (30 refit-end sweeps, 12 kept);
//   - redraw-move-all: the same with random_share 1;
//   - reestimate: every product's competitors are re-estimated with
//     log-scale noise of sd 0.1 (synth's Sequence.Drift), with 2
//     refit-end sweeps, both kept;
//   - reestimate-keeping: the same with keep_ess 0.9.
//
// Each logs whether the particles meet the agreement levels. For the
// reestimate case that depends on the seed: with this one the particles
// meet them, with another (43, 44, in a diagnostic run) the largest
// co-segment difference was 0.144 with 2 sweeps, 0.118 with 10 and 0.105
// with 30; the 0.10 level sits near the Monte Carlo noise of 256
// particles against 1,800 reference draws. Run it once:
//
//	go test -run XXX -bench RefitVsBatch -benchtime 1x ./sequential/
func BenchmarkRefitVsBatch(b *testing.B) {
	b.Run("redraw", func(b *testing.B) { refitVsBatch(b, 0, agreementConfig()) })
	// The same with every product moved at a settle that follows a
	// resampling (random_share 1), which keeps streams of single refits
	// near the batch posterior (DEVELOPERS.md).
	b.Run("redraw-move-all", func(b *testing.B) {
		pc := agreementConfig()
		pc.RandomShare = 1
		refitVsBatch(b, 0, pc)
	})
	b.Run("reestimate", func(b *testing.B) {
		pc := agreementConfig()
		pc.RefitSweeps, pc.KeepSweeps = 2, 2
		refitVsBatch(b, benchDrift, pc)
	})
	// The same with Replaces that keep the assignments when the weights
	// allow (keep_ess 0.9).
	b.Run("reestimate-keeping", func(b *testing.B) {
		pc := agreementConfig()
		pc.RefitSweeps, pc.KeepSweeps = 2, 2
		pc.KeepESS = benchKeepESS
		refitVsBatch(b, benchDrift, pc)
	})
}

func refitVsBatch(b *testing.B, drift float64, pc sequential.ParticleConfig) {
	t := b
	src := rand.New(rand.NewPCG(41, 42))
	cfg := synth.Scenario()
	cfg.Products = 300
	seq := synth.NewSequence(cfg, 2, 0, src)
	seq.Drift = drift
	pc.Workers = 1
	ps, err := sequential.NewParticles(pc, 1, 2)
	if err != nil {
		b.Fatal(err)
	}
	products := seq.Refit(0)
	for i := range products {
		if _, err := ps.Add(products[i].ID, products[i].Datum()); err != nil {
			b.Fatal(err)
		}
		if (i+1)%256 == 0 {
			ps.Settle()
		}
	}
	// The posterior before the refit is settled as well as the agreement
	// test settles it, whatever the refit's own budget.
	ps.SettleFull(30)
	products = seq.Refit(1)
	b.ResetTimer()
	start := time.Now()
	for i := range products {
		if _, err := ps.Replace(products[i].ID, products[i].Datum()); err != nil {
			b.Fatal(err)
		}
		if (i+1)%256 == 0 {
			ps.Settle()
		}
	}
	ps.SettleRefit()
	refitCPU := time.Since(start)
	b.StopTimer()
	data := ps.Data()
	ref := pooledReference(t, data, 20000, 9)
	g := compare(t, ps.Draws(), ref, data)
	b.Logf("particles after the refit: %+v, meets targets %v", g, g.meets())

	// One product's refit: Replace and the default settle, timed as the
	// mean over 20 such refits one after the other (so the occasional
	// resampling and its moves are counted at their rate).
	const singles = 20
	var singleCPU time.Duration
	for k, i := 0, 17; k < singles; k, i = k+1, i+1 {
		if i%20 == 7 { // removed above
			i++
		}
		one := products[i]
		if drift > 0 {
			synth.Perturb(&one, drift, src)
		} else {
			synth.Redraw(cfg, &one, src)
		}
		start = time.Now()
		if _, err := ps.Replace(one.ID, one.Datum()); err != nil {
			b.Fatal(err)
		}
		ps.Settle()
		singleCPU += time.Since(start)
	}
	singleCPU /= singles
	// The singles are timed only if they keep the posterior as close to
	// a long batch run as the whole refit left it.
	after := ps.Data()
	gs := compare(t, ps.Draws(), pooledReference(t, after, 20000, 39), after)
	b.Logf("particles after the %d single refits: %+v, meets targets %v", singles, gs, gs.meets())

	// The batch sampler from scratch, doubling its length until it agrees
	// with the reference: at each length three runs (seeds 3, 4, 5), and
	// the length counts once two of the three meet the levels; its CPU
	// is the mean of the three. One lucky run does not set the baseline.
	var batchCPU time.Duration
	batchSweeps := 0
	for sweeps := 250; sweeps <= 16000; sweeps *= 2 {
		var sum time.Duration
		met := 0
		for seed := uint64(3); seed <= 5; seed++ {
			start = time.Now()
			draws := gibbsReference(t, data, sweeps, seed)
			d := time.Since(start)
			sum += d
			gb := compare(t, draws, ref, data)
			b.Logf("batch %5d sweeps, seed %d: %+v in %v", sweeps, seed, gb, d)
			if gb.meets() {
				met++
			}
		}
		if met >= 2 {
			batchCPU, batchSweeps = sum/3, sweeps
			break
		}
	}
	b.ReportMetric(refitCPU.Seconds(), "refit-s")
	b.ReportMetric(singleCPU.Seconds(), "single-refit-s")
	if batchCPU > 0 {
		b.ReportMetric(batchCPU.Seconds(), "batch-s")
		b.ReportMetric(float64(batchSweeps), "batch-sweeps")
		b.ReportMetric(batchCPU.Seconds()/refitCPU.Seconds(), "ratio-refit")
		b.ReportMetric(batchCPU.Seconds()/singleCPU.Seconds(), "ratio-single")
	}
}
