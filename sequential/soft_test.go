package sequential

import (
	"math"
	"math/rand/v2"
	"testing"
)

// softRunDraws runs the batch sampler with recorded placement
// probabilities on a random category of n products (three kernels close
// together, so that products move between segments from sweep to sweep)
// and returns its draws and data.
func softRunDraws(t *testing.T, n, sweeps int, seed uint64) ([]Draw, []*Datum) {
	t.Helper()
	src := rand.New(rand.NewPCG(seed, 3))
	specs := []Theta{{0.1, 0.4, -1.5}, {0.0, 0.5, -1.2}, {0.2, 0.45, -0.9}}
	data := make([]*Datum, n)
	for i := range data {
		ew := specs[i%3].EW()
		vals := make([]float64, 10)
		for j := range vals {
			vals[j] = ew.Rand(src)
		}
		sortDesc(vals)
		d := MustDatum(vals[:src.IntN(6)], 10)
		data[i] = &d
	}
	cfg := GibbsConfig{Prior: DefaultPrior(), Aux: 3, Sweeps: sweeps, Burn: sweeps / 5, Thin: 1, SplitMerge: 0.5, RaoBlackwell: true}
	g, err := NewGibbs(data, cfg, src)
	if err != nil {
		t.Fatal(err)
	}
	return g.Run(src, nil), data
}

// bruteSoft returns pi[i][j], the probability with which product i's
// update in draw dr put i in product j's segment as it stood then (j's
// label after the scan when j < i, before it when j > i), by looking each
// one up: the definition, with none of the summaries' bookkeeping.
func bruteSoft(dr Draw) [][]float64 {
	n := len(dr.Labels)
	before := append([]uint16(nil), dr.Labels...)
	for _, m := range dr.Soft.Movers {
		before[m.Product] = m.From
	}
	pi := make([][]float64, n)
	for i := range pi {
		pi[i] = make([]float64, n)
		for j := range pi[i] {
			if j == i {
				continue
			}
			l := dr.Labels[j]
			if j > i {
				l = before[j]
			}
			seg, p := dr.Soft.entries(i)
			for e, x := range seg {
				if x == l {
					pi[i][j] = float64(p[e])
				}
			}
		}
	}
	return pi
}

// TestSoftSummariesMatchBruteForce checks the summaries' handling of
// placement probabilities against bruteSoft on a run where the scans move
// products: SimilarityMatrix and Similarity against the symmetrised
// mean, ExpectedBinder of random candidate partitions against the
// definition sum over pairs of c_ij (1 - pi_ij) + (1 - c_ij) pi_ij, and
// Summarize's Membership against the mean of pi[i][j] over the other
// members of each point segment. The summaries track labels at each
// update through mover corrections; the brute force looks them up.
func TestSoftSummariesMatchBruteForce(t *testing.T) {
	t.Parallel()
	draws, data := softRunDraws(t, 40, 150, 7)
	n := len(data)
	movers := 0
	for _, dr := range draws {
		movers += len(dr.Soft.Movers)
	}
	if movers < len(draws) {
		t.Fatalf("only %d movers in %d draws: the test needs scans that move products", movers, len(draws))
	}
	pis := make([][][]float64, len(draws))
	for d, dr := range draws {
		pis[d] = bruteSoft(dr)
	}
	avg := func(f func(pi [][]float64) float64) float64 {
		s := 0.0
		for _, pi := range pis {
			s += f(pi)
		}
		return s / float64(len(pis))
	}
	sim := SimilarityMatrix(draws)
	var pairs [][2]int
	for i := 0; i < n; i++ {
		for j := i + 1; j < n; j++ {
			want := avg(func(pi [][]float64) float64 { return 0.5 * (pi[i][j] + pi[j][i]) })
			if math.Abs(sim[i][j]-want) > 1e-12 || sim[j][i] != sim[i][j] {
				t.Fatalf("SimilarityMatrix[%d][%d] = %v, brute force %v", i, j, sim[i][j], want)
			}
			pairs = append(pairs, [2]int{i, j})
		}
	}
	for k, v := range Similarity(draws, pairs) {
		if math.Abs(v-sim[pairs[k][0]][pairs[k][1]]) > 1e-12 {
			t.Fatalf("Similarity%v = %v, SimilarityMatrix %v", pairs[k], v, sim[pairs[k][0]][pairs[k][1]])
		}
	}
	src := rand.New(rand.NewPCG(1, 1))
	for trial := 0; trial < 5; trial++ {
		cand := make([]int, n)
		for i := range cand {
			cand[i] = src.IntN(2 + trial)
		}
		want := 0.0
		for i := 0; i < n; i++ {
			for j := i + 1; j < n; j++ {
				if cand[i] == cand[j] {
					want += 1 - sim[i][j]
				} else {
					want += sim[i][j]
				}
			}
		}
		if got := ExpectedBinder(draws, cand); math.Abs(got-want) > 1e-9*want {
			t.Errorf("ExpectedBinder of candidate %d: %v, from the pairs %v", trial, got, want)
		}
	}
	sum, err := Summarize(draws, data, DefaultSummaryOptions())
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < n; i++ {
		for c, seg := range sum.Segments {
			others := 0
			want := 0.0
			for _, j := range seg.Members {
				if j != i {
					others++
					want += avg(func(pi [][]float64) float64 { return pi[i][j] })
				}
			}
			if others == 0 {
				continue
			}
			want /= float64(others)
			if math.Abs(sum.Membership[i][c]-want) > 1e-9 {
				t.Fatalf("Membership[%d][%d] = %v, brute force %v", i, c, sum.Membership[i][c], want)
			}
		}
	}
	if want := ExpectedBinder(draws, sum.Partition); math.Abs(sum.Binder-want) > 1e-9*want {
		t.Errorf("Summary.Binder %v, ExpectedBinder %v", sum.Binder, want)
	}
}

// TestExactRaoBlackwell compares the co-segment probabilities of the
// batch sampler's recorded draws with the exact ones of the five-product
// enumeration, and with the 0/1 estimates from the same draws: both must
// be within 4 standard errors (draws/4 effective, as in
// TestExactPosteriorGibbs), and the Rao-Blackwellised ones should be the
// closer of the two summed over the ten pairs.
func TestExactRaoBlackwell(t *testing.T) {
	t.Parallel()
	sweeps := 40000
	if testing.Short() {
		sweeps = 8000
	}
	e := exactFive()
	want, _ := e.posterior().maps()
	src := rand.New(rand.NewPCG(23, 24))
	cfg := GibbsConfig{Prior: e.prior, Aux: 3, Sweeps: sweeps, Burn: 500, Thin: 1, RaoBlackwell: true}
	g, err := NewGibbs(e.data, cfg, src)
	if err != nil {
		t.Fatal(err)
	}
	draws := g.Run(src, nil)
	hard := make([]Draw, len(draws))
	for d := range draws {
		hard[d] = draws[d]
		hard[d].Soft = nil
	}
	simRB, simHard := SimilarityMatrix(draws), SimilarityMatrix(hard)
	neff := float64(len(draws)) / 4
	var errRB, errHard float64
	for i := 0; i < 5; i++ {
		for j := i + 1; j < 5; j++ {
			p := coSegment(want, i, j)
			se := math.Sqrt(p * (1 - p) / neff)
			errRB += math.Abs(simRB[i][j] - p)
			errHard += math.Abs(simHard[i][j] - p)
			if math.Abs(simRB[i][j]-p) > 4*se {
				t.Errorf("pair (%d,%d): Rao-Blackwellised %.4f, exact %.4f (4 SE %.4f)", i, j, simRB[i][j], p, 4*se)
			}
			if math.Abs(simHard[i][j]-p) > 4*se {
				t.Errorf("pair (%d,%d): 0/1 estimate %.4f, exact %.4f (4 SE %.4f)", i, j, simHard[i][j], p, 4*se)
			}
		}
	}
	t.Logf("%d draws: summed |error| over the 10 pairs: Rao-Blackwellised %.4f, 0/1 %.4f", len(draws), errRB, errHard)
	if errRB > errHard {
		t.Errorf("Rao-Blackwellised estimates further from the exact ones (%.4f) than 0/1 estimates (%.4f)", errRB, errHard)
	}
}
