package sequential_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
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

// referenceChains is how many independent batch chains a reference pools.
// Two single 20,000-sweep chains once differed in their largest
// co-segment probability by up to 0.103, about the 0.10 level itself, so
// one chain is too coarse a yardstick; pooling three cuts the reference's
// own noise by about sqrt(3), and the spread between them is logged.
const referenceChains = 3

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

// workload names the four kinds of change of the agreement harness.
var workloads = []string{"build", "redraw", "reestimate", "singles"}

// workloadResult is one workload's outcome in one category.
type workloadResult struct {
	workload string
	g        agreement
	// batch is the batch sampler at its defaults on the same data, and
	// batchCPU its CPU (zero when not run).
	batch    agreement
	batchCPU time.Duration
	spread   float64 // the reference chains' largest co-segment difference
	cpu      time.Duration
	step     sequential.StepReport
	distinct int
}

func (r workloadResult) meets() bool { return r.g.meetsWith(r.spread) }

// harnessSizes are the agreement harness's sizes: products per category
// (0 keeps the category's own 250 to 400), reference sweeps per chain and
// the number of single-product changes of the fourth workload.
type harnessSizes struct {
	products, refSweeps, singles int
	// batch also runs the batch sampler at its defaults on each
	// workload's data, for comparison.
	batch bool
}

// applyRefit brings a refit's products into ps the way the service does:
// a Replace each (an Add for a new product), a settle after every 256
// changes, and the refit-end step.
func applyRefit(t testing.TB, ps *sequential.Particles, products []synth.Product) {
	t.Helper()
	for i := range products {
		var err error
		if ps.Has(products[i].ID) {
			_, err = ps.Replace(products[i].ID, products[i].Datum())
		} else {
			_, err = ps.Add(products[i].ID, products[i].Datum())
		}
		if err != nil {
			t.Fatal(err)
		}
		if ps.Pending() >= 256 {
			ps.SettleInRefit()
		}
	}
	ps.SettleRefit()
}

// runWorkloads runs the four workloads on one category and compares each
// with a pooled reference on the same data: (a) the first build from the
// first refit's products; from that state, (b) a refit that redraws
// every product from its segment, (c) a refit that re-estimates every
// product (log-scale noise of sd 0.1), and (d) a stream of single-product
// redraws, each a Replace and a Settle, with no refit end.
func runWorkloads(t testing.TB, c *harnessCategory, sz harnessSizes, pc sequential.ParticleConfig) []workloadResult {
	t.Helper()
	var out []workloadResult
	finish := func(name string, ps *sequential.Particles, cpu time.Duration, seed uint64) {
		data := ps.Data()
		pool, spread := harnessReference(t, data, sz.refSweeps, seed)
		ref := factsOf(pool, data)
		g := agreementOf(factsOf(ps.Draws(), data), ref)
		r := workloadResult{workload: name, g: g, spread: spread, cpu: cpu, step: ps.LastStep(), distinct: ps.DistinctStates()}
		if sz.batch {
			gc := sequential.DefaultGibbsConfig()
			src := rand.New(rand.NewPCG(seed, 99))
			start := time.Now()
			gb, err := sequential.NewGibbs(data, gc, src)
			if err != nil {
				t.Fatal(err)
			}
			draws := gb.Run(src, nil)
			r.batchCPU = time.Since(start)
			r.batch = agreementOf(factsOf(draws, data), ref)
		}
		out = append(out, r)
	}
	first := c.seq.Refit(0)
	if sz.products > 0 && sz.products < len(first) {
		first = first[:sz.products]
	}
	ps, err := sequential.NewParticles(pc, 1, 2)
	if err != nil {
		t.Fatal(err)
	}
	start := time.Now()
	applyRefit(t, ps, first)
	finish("build", ps, time.Since(start), 11)
	base := ps.Encode()
	restore := func() *sequential.Particles {
		q, err := sequential.DecodeParticles(base, pc.Workers)
		if err != nil {
			t.Fatal(err)
		}
		return q
	}
	src := rand.New(rand.NewPCG(c.src.Uint64(), 5))
	copyProducts := func() []synth.Product {
		out := make([]synth.Product, len(first))
		copy(out, first)
		return out
	}

	redrawn := copyProducts()
	for i := range redrawn {
		synth.Redraw(c.cfg, &redrawn[i], src)
	}
	ps = restore()
	start = time.Now()
	applyRefit(t, ps, redrawn)
	finish("redraw", ps, time.Since(start), 21)

	perturbed := copyProducts()
	for i := range perturbed {
		synth.Perturb(&perturbed[i], 0.1, src)
	}
	ps = restore()
	start = time.Now()
	applyRefit(t, ps, perturbed)
	finish("reestimate", ps, time.Since(start), 31)

	singles := copyProducts()
	ps = restore()
	start = time.Now()
	for k := 0; k < sz.singles; k++ {
		i := src.IntN(len(singles))
		synth.Redraw(c.cfg, &singles[i], src)
		if _, err := ps.Replace(singles[i].ID, singles[i].Datum()); err != nil {
			t.Fatal(err)
		}
		ps.Settle()
	}
	finish("singles", ps, time.Since(start), 41)
	return out
}

// logResults writes one line per workload.
func logResults(t testing.TB, name string, res []workloadResult) {
	t.Helper()
	for _, r := range res {
		t.Logf("%-34s %-10s %v (spread %.4f) meets %-5v cpu %6.2fs; last step M=%d L=%d moved %.3f; distinct %d",
			name, r.workload, r.g, r.spread, r.meets(), r.cpu.Seconds(), r.step.Chains, r.step.Steps, r.step.Moved, r.distinct)
		if r.batchCPU > 0 {
			t.Logf("%-34s %-10s batch at defaults: %v meets %-5v cpu %6.2fs", name, r.workload, r.batch, r.batch.meetsWith(r.spread), r.batchCPU.Seconds())
		}
	}
}

// grossLevels are the bounds TestParticlesAgreeWithBatch enforces: about
// three times the acceptance levels of the updater issue (co-segment mean
// 0.02, largest 0.10, TV of K 0.10, exceedance 0.03), which the full
// harness (BenchmarkAgreementHarness) measures and reports but which
// neither the updater nor the batch sampler at its defaults meets in
// every simulated category (the closing notes of the updater issues have
// the tables). These catch an updater that has stopped tracking the
// posterior: TestParticlesAgreeWithBatch/stale shows that a population
// that does not follow the data fails them.
var grossLevels = agreement{simMean: 0.06, simMax: 0.40, kTV: 0.35, exceedMean: 0.05}

func (g agreement) within(l agreement) bool {
	return g.simMean <= l.simMean && g.simMax <= l.simMax && g.kTV <= l.kTV && g.exceedMean <= l.exceedMean
}

// TestParticlesAgreeWithBatch is the CI-sized subset of the agreement
// harness (BenchmarkAgreementHarness): two categories, one separated and
// one overlapping, each through the four workloads with the default
// settings, compared with a pooled batch reference. It logs the figures
// against the levels and beside the batch sampler at its defaults
// on the same data, and fails beyond grossLevels. In -short mode (the race
// run) the sizes are too small for the comparison to mean anything and
// only the run itself is checked.
func TestParticlesAgreeWithBatch(t *testing.T) {
	t.Parallel()
	sz := harnessSizes{products: 200, refSweeps: 8000, singles: 200, batch: true}
	if testing.Short() {
		sz = harnessSizes{products: 40, refSweeps: 500, singles: 20}
	}
	cats := harnessCategories(2, 4242)
	for _, c := range cats {
		t.Run(c.layout.String(), func(t *testing.T) {
			res := runWorkloads(t, c, sz, sequential.DefaultParticleConfig())
			logResults(t, c.name, res)
			if testing.Short() {
				return
			}
			for _, r := range res {
				if !r.g.within(grossLevels) {
					t.Errorf("%s, %s: particles far from the pooled batch reference: %v", c.name, r.workload, r.g)
				}
			}
		})
	}
	t.Run("stale", func(t *testing.T) {
		if testing.Short() {
			t.Skip("the power check needs the full-size reference")
		}
		// A population that does not track the data must fail the
		// bounds: the first category's population, built on its own
		// products, read as if it were the second's.
		a, b := harnessCategories(2, 4242), harnessCategories(2, 4242)
		own := b[1].seq.Refit(0)[:sz.products]
		ps, err := sequential.NewParticles(sequential.DefaultParticleConfig(), 1, 2)
		if err != nil {
			t.Fatal(err)
		}
		applyRefit(t, ps, a[0].seq.Refit(0)[:sz.products])
		data := dataOf(own)
		pool, _ := harnessReference(t, data, sz.refSweeps, 11)
		g := agreementOf(factsOf(ps.Draws(), data), factsOf(pool, data))
		t.Logf("another category's population against this one's reference: %v", g)
		if g.within(grossLevels) {
			t.Errorf("a population of another category passed the bounds (%v): they have no power", g)
		}
	})
}

// BenchmarkAgreementHarness runs the full agreement harness: 20
// categories (10 separated, 10 overlapping, 250 to 400 products) through
// the four workloads (600 single changes), each compared with three
// pooled 20,000-sweep batch chains, and logs a table and the count that
// meet the levels, beside the batch sampler at its defaults on the same
// data. Run it once, it takes hours on two cores:
//
//	go test -run XXX -bench AgreementHarness -benchtime 1x -timeout 600m -v ./sequential/
func BenchmarkAgreementHarness(b *testing.B) {
	sz := harnessSizes{refSweeps: referenceSweeps, singles: 600, batch: true}
	met, total, batchMet := 0, 0, 0
	perWorkload := map[string][2]int{}
	var lines []string
	for _, c := range harnessCategories(20, 2026) {
		res := runWorkloads(b, c, sz, sequential.DefaultParticleConfig())
		logResults(b, c.name, res)
		for _, r := range res {
			total++
			pw := perWorkload[r.workload]
			pw[1]++
			if r.meets() {
				met++
				pw[0]++
			}
			if r.batch.meetsWith(r.spread) {
				batchMet++
			}
			perWorkload[r.workload] = pw
			lines = append(lines, fmt.Sprintf("| %s | %s | %.4f | %.4f | %.4f | %.4f | %.4f | %v | %.4f | %.4f | %.4f | %v |", c.name, r.workload,
				r.g.simMean, r.g.simMax, r.spread, r.g.kTV, r.g.exceedMean, r.meets(),
				r.batch.simMean, r.batch.simMax, r.batch.kTV, r.batch.meetsWith(r.spread)))
		}
	}
	b.Logf("\n| category | workload | co-seg mean | co-seg max | ref spread | TV of K | p_exceed | meets | batch mean | batch max | batch TV K | batch meets |\n|---|---|---|---|---|---|---|---|---|---|---|---|\n%s", strings.Join(lines, "\n"))
	for _, w := range workloads {
		b.Logf("%s: %d of %d meet the levels", w, perWorkload[w][0], perWorkload[w][1])
	}
	b.Logf("all: %d of %d; the batch sampler at its defaults on the same data: %d of %d", met, total, batchMet, total)
	b.ReportMetric(float64(met), "met")
	b.ReportMetric(float64(total), "runs")
}

// BenchmarkReplayVsBatch measures, on one core, eight weekly refits of a
// category of 300 products (each redrawing every product, or
// re-estimating it with log-scale noise of sd 0.1) brought in
// the way the service and replay do (Replaces, a settle every 256
// changes, the refit-end step, the summary), against re-fitting each
// refit's data with the batch sampler at its defaults (and summarising).
// After the last refit both are compared with a pooled reference. Both
// sides come from one run:
//
//	go test -run XXX -bench ReplayVsBatch -benchtime 1x -timeout 60m ./sequential/
func BenchmarkReplayVsBatch(b *testing.B) {
	for _, layout := range []synth.Layout{synth.Separated, synth.Overlapping} {
		for _, drift := range []float64{0, 0.1} {
			name := layout.String() + "-redraw"
			if drift > 0 {
				name = layout.String() + "-reestimate"
			}
			b.Run(name, func(b *testing.B) { replayVsBatch(b, layout, drift) })
		}
	}
}

func replayVsBatch(b *testing.B, layout synth.Layout, drift float64) {
	{
		{
			src := rand.New(rand.NewPCG(8, uint64(layout)))
			cfg := synth.RandomConfig(300, layout, src)
			seq := synth.NewSequence(cfg, 8, 0, src)
			seq.Drift = drift
			pc := sequential.DefaultParticleConfig()
			pc.Workers = 1
			ps, err := sequential.NewParticles(pc, 1, 2)
			if err != nil {
				b.Fatal(err)
			}
			opt := sequential.DefaultSummaryOptions()
			opt.Workers = 1
			var cpuParticles, cpuBatch time.Duration
			var batchDraws []sequential.Draw
			var batchData []*sequential.Datum
			for r := 0; r < 8; r++ {
				products := seq.Refit(r)
				start := time.Now()
				applyRefit(b, ps, products)
				if _, err := ps.Summary(opt); err != nil {
					b.Fatal(err)
				}
				cpuParticles += time.Since(start)

				data := dataOf(products)
				batchData = data
				start = time.Now()
				gc := sequential.DefaultGibbsConfig()
				gsrc := rand.New(rand.NewPCG(uint64(r), 3))
				g, err := sequential.NewGibbs(data, gc, gsrc)
				if err != nil {
					b.Fatal(err)
				}
				batchDraws = g.Run(gsrc, nil)
				if _, err := sequential.Summarize(batchDraws, data, opt); err != nil {
					b.Fatal(err)
				}
				cpuBatch += time.Since(start)
				b.Logf("refit %d: particles %v so far, batch %v so far; last step M=%d L=%d moved %.3f",
					r, cpuParticles, cpuBatch, ps.LastStep().Chains, ps.LastStep().Steps, ps.LastStep().Moved)
			}
			data := ps.Data()
			pool, spread := harnessReference(b, data, referenceSweeps, 51)
			ref := factsOf(pool, data)
			gp := agreementOf(factsOf(ps.Draws(), data), ref)
			gb := agreementOf(factsOf(batchDraws, batchData), ref)
			b.Logf("after the last refit (reference spread %.4f): particles %v (meets %v); batch %v (meets %v)",
				spread, gp, gp.meetsWith(spread), gb, gb.meetsWith(spread))
			b.Logf("CPU over 8 refits: particles %v, batch %v, ratio %.3f", cpuParticles, cpuBatch, cpuParticles.Seconds()/cpuBatch.Seconds())
			b.ReportMetric(cpuParticles.Seconds(), "particles-s")
			b.ReportMetric(cpuBatch.Seconds(), "batch-s")
			b.ReportMetric(cpuParticles.Seconds()/cpuBatch.Seconds(), "particles/batch")
		}
	}
}
