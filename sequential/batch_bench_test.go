package sequential_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"sort"
	"testing"
	"time"

	"rivalmix/sequential"
	"rivalmix/sequential/synth"
)

// The benchmarks in this file measure the batch sampler's split-merge
// move and Rao-Blackwellised summaries. Each logs its figures; run them
// one at a time, for example
//
//	go test -run XXX -bench 'SplitMergeCost' -benchtime 1x ./sequential/
//	go test -run XXX -bench 'SplitMergeMixing' -benchtime 1x -timeout 60m ./sequential/
//	go test -run XXX -bench 'RaoBlackwellVariance' -benchtime 1x -timeout 60m ./sequential/
//	go test -run XXX -bench 'BatchToAgreement' -benchtime 1x -timeout 120m ./sequential/

// overlappingData draws an overlapping category of n products from seed.
func overlappingData(n int, seed uint64) ([]*sequential.Datum, synth.Config) {
	src := rand.New(rand.NewPCG(seed, 17))
	cfg := synth.RandomConfig(n, synth.Overlapping, src)
	return dataOf(synth.Generate(cfg, src)), cfg
}

// BenchmarkSplitMergeCost measures the CPU of one split-merge proposal
// relative to one sweep (Algorithm 8 over every product, kernels, alpha)
// at N = 300 and N = 3,000, on one core, from a state after 200 sweeps.
func BenchmarkSplitMergeCost(b *testing.B) {
	for _, n := range []int{300, 3000} {
		b.Run(fmt.Sprintf("n%d", n), func(b *testing.B) {
			data, _ := overlappingData(n, 1)
			cfg := sequential.DefaultGibbsConfig()
			cfg.SplitMerge = 0
			src := rand.New(rand.NewPCG(1, 2))
			g, err := sequential.NewGibbs(data, cfg, src)
			if err != nil {
				b.Fatal(err)
			}
			for s := 0; s < 200; s++ {
				g.Sweep(src)
			}
			const sweeps, proposals = 20, 200
			b.ResetTimer()
			start := time.Now()
			for s := 0; s < sweeps; s++ {
				g.Sweep(src)
			}
			perSweep := time.Since(start) / sweeps
			start = time.Now()
			moves := g.ProposeSplitMerge(src, proposals)
			perProposal := time.Since(start) / proposals
			b.StopTimer()
			b.ReportMetric(perSweep.Seconds()*1e3, "ms/sweep")
			b.ReportMetric(perProposal.Seconds()*1e3, "ms/proposal")
			b.ReportMetric(perProposal.Seconds()/perSweep.Seconds(), "proposal/sweep")
			b.Logf("N = %d, %d segments: sweep %v, proposal %v (%.2f sweeps); %+v", n, g.NumSegments(), perSweep, perProposal,
				perProposal.Seconds()/perSweep.Seconds(), moves)
		})
	}
}

// iact returns the integrated autocorrelation time of x (in steps) by
// Geyer's (1992) initial positive sequence estimator: 1 + 2 sum of
// autocorrelations, summed in adjacent pairs while the pair sums stay
// positive. It returns NaN for a constant series.
func iact(x []float64) float64 {
	n := len(x)
	var mean float64
	for _, v := range x {
		mean += v
	}
	mean /= float64(n)
	acov := func(k int) float64 {
		var s float64
		for i := 0; i+k < n; i++ {
			s += (x[i] - mean) * (x[i+k] - mean)
		}
		return s / float64(n)
	}
	c0 := acov(0)
	if c0 == 0 {
		return math.NaN()
	}
	tau := -1.0
	for k := 0; k+1 < n/2; k += 2 {
		g := (acov(k) + acov(k+1)) / c0
		if g <= 0 {
			break
		}
		tau += 2 * g
	}
	return math.Max(tau, 1)
}

// BenchmarkSplitMergeMixing runs, on three overlapping categories of 300
// products, chains of 10,000 sweeps with and without split-merge (0.5
// proposals per sweep), and reports the acceptance rates and the
// integrated autocorrelation times of the number of segments and of the
// co-segment indicators of 100 random pairs (those whose indicator varies
// in both chains), in sweeps and in CPU seconds (equal-CPU comparison).
func BenchmarkSplitMergeMixing(b *testing.B) {
	const sweeps = 10000
	for seed := uint64(1); seed <= 3; seed++ {
		b.Run(fmt.Sprintf("seed%d", seed), func(b *testing.B) {
			data, cfg := overlappingData(300, seed)
			type run struct {
				k      []float64
				labels [][]uint16
				cpu    time.Duration
				moves  sequential.MoveStats
			}
			chain := func(rate float64) run {
				gc := sequential.DefaultGibbsConfig()
				gc.SplitMerge = rate
				src := rand.New(rand.NewPCG(seed, 9))
				g, err := sequential.NewGibbs(data, gc, src)
				if err != nil {
					b.Fatal(err)
				}
				for s := 0; s < 500; s++ {
					g.Sweep(src)
				}
				before := g.Moves()
				var r run
				start := time.Now()
				for s := 0; s < sweeps; s++ {
					g.Sweep(src)
					r.k = append(r.k, float64(g.NumSegments()))
					r.labels = append(r.labels, g.Draw().Labels)
				}
				r.cpu = time.Since(start)
				m := g.Moves()
				r.moves = sequential.MoveStats{SplitsProposed: m.SplitsProposed - before.SplitsProposed,
					SplitsAccepted: m.SplitsAccepted - before.SplitsAccepted,
					MergesProposed: m.MergesProposed - before.MergesProposed,
					MergesAccepted: m.MergesAccepted - before.MergesAccepted}
				return r
			}
			plain, sm := chain(0), chain(0.5)
			src := rand.New(rand.NewPCG(seed, 10))
			var tauPlain, tauSM []float64
			for tries := 0; len(tauPlain) < 100 && tries < 20000; tries++ {
				i, j := src.IntN(len(data)), src.IntN(len(data))
				if i == j {
					continue
				}
				ind := func(r run) []float64 {
					x := make([]float64, len(r.labels))
					for s, l := range r.labels {
						if l[i] == l[j] {
							x[s] = 1
						}
					}
					return x
				}
				a, c := iact(ind(plain)), iact(ind(sm))
				if math.IsNaN(a) || math.IsNaN(c) {
					continue
				}
				tauPlain = append(tauPlain, a)
				tauSM = append(tauSM, c)
			}
			secPlain := plain.cpu.Seconds() / sweeps
			secSM := sm.cpu.Seconds() / sweeps
			kp, ks := iact(plain.k), iact(sm.k)
			mp, ms := median(tauPlain), median(tauSM)
			acc := func(a, p uint64) float64 { return float64(a) / float64(max(p, 1)) }
			b.Logf("%d true segments; sweep %.2f ms plain, %.2f ms with split-merge", len(cfg.Segments), secPlain*1e3, secSM*1e3)
			b.Logf("acceptance: splits %d/%d (%.2f%%), merges %d/%d (%.2f%%)", sm.moves.SplitsAccepted, sm.moves.SplitsProposed,
				100*acc(sm.moves.SplitsAccepted, sm.moves.SplitsProposed), sm.moves.MergesAccepted, sm.moves.MergesProposed,
				100*acc(sm.moves.MergesAccepted, sm.moves.MergesProposed))
			b.Logf("IACT of K: plain %.1f sweeps = %.3f s, split-merge %.1f sweeps = %.3f s", kp, kp*secPlain, ks, ks*secSM)
			b.Logf("IACT of %d pair indicators, median: plain %.1f sweeps = %.3f s, split-merge %.1f sweeps = %.3f s",
				len(tauPlain), mp, mp*secPlain, ms, ms*secSM)
			b.ReportMetric(100*acc(sm.moves.SplitsAccepted+sm.moves.MergesAccepted, sm.moves.SplitsProposed+sm.moves.MergesProposed), "accept-%")
			b.ReportMetric(kp*secPlain, "iactK-plain-s")
			b.ReportMetric(ks*secSM, "iactK-sm-s")
			b.ReportMetric(mp*secPlain, "iactPair-plain-s")
			b.ReportMetric(ms*secSM, "iactPair-sm-s")
		})
	}
}

func median(x []float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	y := append([]float64(nil), x...)
	sort.Float64s(y)
	return y[len(y)/2]
}

// BenchmarkRaoBlackwellVariance runs R = 12 independent short chains
// (500 sweeps, 100 burned) on an overlapping category of 300 products and
// reports the variance across runs of the co-segment probabilities of
// 200 random pairs and of the membership probabilities (each product to
// the point segments of a reference partition), estimated from the same
// draws with and without the recorded placement probabilities.
func BenchmarkRaoBlackwellVariance(b *testing.B) {
	const runs, sweeps = 12, 500
	data, _ := overlappingData(300, 4)
	src := rand.New(rand.NewPCG(4, 4))
	var pairs [][2]int
	for len(pairs) < 200 {
		i, j := src.IntN(len(data)), src.IntN(len(data))
		if i != j {
			pairs = append(pairs, [2]int{i, j})
		}
	}
	ref, err := batchChain(data, 4000, 4, 0.5, true, 99)
	if err != nil {
		b.Fatal(err)
	}
	refPart, _ := sequential.PointPartition(ref, 50)
	k := 0
	for _, c := range refPart {
		k = max(k, c+1)
	}
	// membership of product i to reference segment c: mean co-segment
	// probability with its members.
	members := make([][]int, k)
	for i, c := range refPart {
		members[c] = append(members[c], i)
	}
	var simRB, simHard, memRB, memHard [][]float64
	for r := 0; r < runs; r++ {
		draws, err := batchChain(data, sweeps, 1, 0.5, true, uint64(100+r))
		if err != nil {
			b.Fatal(err)
		}
		hard := make([]sequential.Draw, len(draws))
		for d := range draws {
			hard[d] = draws[d]
			hard[d].Soft = nil
		}
		simRB = append(simRB, sequential.Similarity(draws, pairs))
		simHard = append(simHard, sequential.Similarity(hard, pairs))
		mem := func(dr []sequential.Draw) []float64 {
			m := sequential.SimilarityMatrix(dr)
			var out []float64
			for i := range data {
				for c := 0; c < k; c++ {
					s, n := 0.0, 0
					for _, j := range members[c] {
						if j != i {
							s += m[i][j]
							n++
						}
					}
					if n > 0 {
						out = append(out, s/float64(n))
					}
				}
			}
			return out
		}
		memRB = append(memRB, mem(draws))
		memHard = append(memHard, mem(hard))
	}
	vRB, vHard := meanAcrossVariance(simRB), meanAcrossVariance(simHard)
	mRB, mHard := meanAcrossVariance(memRB), meanAcrossVariance(memHard)
	b.Logf("co-segment of %d pairs: mean variance across %d runs %.3g with placement probabilities, %.3g with 0/1 (ratio %.2f)", len(pairs), runs, vRB, vHard, vHard/vRB)
	b.Logf("membership: mean variance %.3g with, %.3g without (ratio %.2f)", mRB, mHard, mHard/mRB)
	b.ReportMetric(vHard/vRB, "cosegment-var-ratio")
	b.ReportMetric(mHard/mRB, "membership-var-ratio")
}

// meanAcrossVariance returns the mean over coordinates of the variance
// across runs (rows).
func meanAcrossVariance(x [][]float64) float64 {
	var total float64
	for j := range x[0] {
		col := make([]float64, len(x))
		for r := range x {
			col[r] = x[r][j]
		}
		m := 0.0
		for _, v := range col {
			m += v
		}
		m /= float64(len(col))
		v := 0.0
		for _, c := range col {
			v += (c - m) * (c - m)
		}
		total += v / float64(len(col)-1)
	}
	return total / float64(len(x[0]))
}

// BenchmarkBatchToAgreement measures, on four overlapping categories of
// 250 to 400 products, the CPU the batch sampler needs to reach the
// agreement levels against a pooled long reference (three 20,000-sweep
// chains), as batchToAgreement measures it, in four forms: plain, with
// split-merge (0.5 proposals per sweep), with recorded placement
// probabilities, and with both. One core per chain.
func BenchmarkBatchToAgreement(b *testing.B) {
	cats := harnessCategories(8, 2027)
	for _, c := range cats {
		if c.layout != synth.Overlapping {
			continue
		}
		b.Run(c.name, func(b *testing.B) {
			data := dataOf(c.seq.Refit(0))
			pool, spread := harnessReference(b, data, referenceSweeps, 1)
			ref := factsOf(pool, data)
			b.Logf("reference spread %.4f", spread)
			var cpu [4]time.Duration
			for v, form := range []struct {
				name string
				sm   float64
				rb   bool
			}{{"plain", 0, false}, {"split-merge", 0.5, false}, {"rao-blackwell", 0, true}, {"both", 0.5, true}} {
				d, sweeps := batchToAgreement(b, data, ref, spread, form.sm, form.rb, 16000)
				cpu[v] = d
				b.Logf("%-14s %5d sweeps, %v", form.name, sweeps, d)
			}
			if cpu[0] > 0 && cpu[3] > 0 {
				b.ReportMetric(cpu[0].Seconds()/cpu[3].Seconds(), "plain/both")
			}
		})
	}
}
