package alerts

import (
	"fmt"
	"maps"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"rivalmix/sequential"
	"rivalmix/sequential/synth"
)

// simRefit is what the simulation records about one refit.
type simRefit struct {
	in       Refit          // the input to Evaluate
	out      Outcome        // filled by evaluateRuns
	index    map[string]int // position of each product id in in.Products
	truth    []int          // true segment of each product
	switched []bool         // whether the product switches segment in the run
	// For products with n < L: the predicted P(next > t) and whether the
	// latent next value Latent[n] exceeded t.
	pred    []float64
	exceeds []bool
}

// simulate runs the service's update path on a synthetic sequence:
// refit 0 adds every product, later refits replace every product's datum;
// each refit then ends with SettleRefit (the refit-sized rejuvenation the
// service runs at a refit boundary) and summarises the particles at the
// default alert threshold, with the package defaults of sequential except
// for the number of particles. Products are fed in id order, which is also the
// particle system's slot order. evaluateRuns then applies the alert rules.
func simulate(t *testing.T, cfg synth.Config, refits int, share float64, particles int, seed uint64) (*synth.Sequence, []simRefit) {
	t.Helper()
	return simulateDrift(t, cfg, refits, share, 0, particles, seed)
}

// simulateDrift is simulate with refits that re-estimate each product's
// values with log-scale noise drift (synth.Sequence.Drift) instead of
// redrawing them when drift > 0. Each refit also carries the filter's
// emissions (sequential.SegmentLogPredictive over the same draws).
func simulateDrift(t *testing.T, cfg synth.Config, refits int, share, drift float64, particles int, seed uint64) (*synth.Sequence, []simRefit) {
	t.Helper()
	return simulateHazard(t, cfg, refits, share, drift, 0, particles, seed)
}

// simulateHazard is simulateDrift where, besides the planted switches,
// every product switches segment with probability hazard at every refit
// after the first (synth.Sequence.Hazard).
func simulateHazard(t *testing.T, cfg synth.Config, refits int, share, drift, hazard float64, particles int, seed uint64) (*synth.Sequence, []simRefit) {
	t.Helper()
	src := rand.New(rand.NewPCG(seed, 101))
	seq := synth.NewSequence(cfg, refits, share, src)
	seq.Drift = drift
	seq.Hazard = hazard
	pc := sequential.DefaultParticleConfig()
	pc.Particles = particles
	ps, err := sequential.NewParticles(pc, seed, 202)
	if err != nil {
		t.Fatal(err)
	}
	threshold := DefaultConfig().Threshold
	opt := sequential.DefaultSummaryOptions()
	opt.Threshold = threshold
	var out []simRefit
	for r := 0; r < refits; r++ {
		prods := seq.Refit(r)
		var surpriseSum float64 // negative log predictive densities
		for i := range prods {
			var lp float64
			if r == 0 {
				lp, err = ps.Add(prods[i].ID, prods[i].Datum())
			} else {
				lp, err = ps.Replace(prods[i].ID, prods[i].Datum())
			}
			if err != nil {
				t.Fatal(err)
			}
			surpriseSum -= lp
		}
		ps.SettleRefit()
		data := ps.Data()
		draws := ps.Draws()
		sum, err := sequential.Summarize(draws, data, opt)
		if err != nil {
			t.Fatal(err)
		}
		em, err := sequential.SegmentLogPredictive(draws, data, sum.Partition, len(sum.Segments), opt.Prior)
		if err != nil {
			t.Fatal(err)
		}
		ids := ps.Products()
		in := Refit{Category: cfg.Category, Refit: fmt.Sprintf("sim-%d", r), Products: ids,
			Data: data, Summary: sum, ESS: ps.ESS(), Particles: ps.NumParticles(), Diversity: ps.Diversity(),
			MeanSurprise: surpriseSum / float64(len(prods)), Emission: em}
		byID := make(map[string]int, len(prods))
		for i := range prods {
			byID[prods[i].ID] = i
		}
		sr := simRefit{in: in, index: make(map[string]int, len(ids)),
			truth: make([]int, len(ids)), switched: make([]bool, len(ids))}
		for i, id := range ids {
			p := &prods[byID[id]]
			sr.index[id] = i
			sr.truth[i] = p.Segment
			sr.switched[i] = seq.Switched[byID[id]]
			if n := len(p.Reported); n < p.L() {
				sr.pred = append(sr.pred, sum.Next[i].PExceed)
				sr.exceeds = append(sr.exceeds, p.Latent[n] > threshold)
			}
		}
		out = append(out, sr)
	}
	return seq, out
}

// evaluateRuns returns a copy of runs with the outcomes of Evaluate under
// cfg, refit after refit from an empty memory.
func evaluateRuns(t *testing.T, cfg Config, runs []simRefit) []simRefit {
	t.Helper()
	out := make([]simRefit, len(runs))
	mem := Memory{}
	for r, sr := range runs {
		sr.out = mustEvaluate(t, cfg, mem, sr.in)
		mem = sr.out.Memory
		out[r] = sr
	}
	return out
}

// majorityIDs maps each true segment to the point segment id that holds
// most of its products.
func majorityIDs(sr simRefit, nseg int) []string {
	count := make([]map[string]int, nseg)
	for s := range count {
		count[s] = map[string]int{}
	}
	for i, s := range sr.truth {
		count[s][sr.out.Point[i]]++
	}
	out := make([]string, nseg)
	for s := range count {
		best := 0
		for _, id := range slices.Sorted(maps.Keys(count[s])) {
			if count[s][id] > best {
				out[s], best = id, count[s][id]
			}
		}
	}
	return out
}

// moveScore is the scoring of one simulated run's moves.
type moveScore struct {
	right, wrong int       // moves at the switch refit or the next: to the switcher's new segment, or not
	late         int       // switchers' moves to their new segment after the window
	recall       float64   // share of switchers with a right move
	precision    float64   // right / (right + wrong)
	falseRate    []float64 // per refit outside those two: moves / products (NaN at the two)
	idChanges    []string  // true segments whose majority id changed, as messages
	table        string
}

// scoreMoves scores the moves of evaluated runs against the truth: a move
// at refit SwitchAt or SwitchAt+1 is right when the product switched and
// its new reported id is the id that holds most of its new true segment;
// any other move at those refits, and every move at other refits, is
// false, except a switcher's move to its new segment after them, which is
// a late detection: neither counted for recall nor false.
func scoreMoves(runs []simRefit, switchAt, nseg int) moveScore {
	var sc moveScore
	switched := 0
	for _, s := range runs[0].switched {
		if s {
			switched++
		}
	}
	base := majorityIDs(runs[0], nseg)
	detected := map[string]bool{}
	var table strings.Builder
	fmt.Fprintf(&table, "refit  segments  moves  false  late  pending  provisional  births  retired  alerts  clears    ESS  diversity  ARI-prev  majority ids\n")
	for r, sr := range runs {
		maj := majorityIDs(sr, nseg)
		for s := range maj {
			if maj[s] != base[s] {
				sc.idChanges = append(sc.idChanges, fmt.Sprintf("refit %d: true segment %d is mostly in %s, was %s at refit 0", r, s, maj[s], base[s]))
			}
		}
		window := r == switchAt || r == switchAt+1
		falseMoves, late := 0, 0
		for _, e := range byKind(sr.out.Events, KindMoved) {
			m := e.Data.(Moved)
			i := sr.index[m.Product]
			toNew := sr.switched[i] && r >= switchAt && m.To == maj[sr.truth[i]]
			switch {
			case window && toNew:
				sc.right++
				detected[m.Product] = true
			case window:
				sc.wrong++
				falseMoves++
			case toNew:
				late++
				sc.late++
			default:
				falseMoves++
			}
		}
		rate := math.NaN()
		if !window {
			rate = float64(falseMoves) / float64(len(sr.in.Products))
		}
		sc.falseRate = append(sc.falseRate, rate)
		s := sr.out.Summary
		ari := "-"
		if s.ARI.Defined() {
			ari = fmt.Sprintf("%.3f", float64(s.ARI))
		}
		fmt.Fprintf(&table, "%5d  %8d  %5d  %5d  %4d  %7d  %11d  %6d  %7d  %6d  %6d  %5.1f  %9d  %8s  %v\n",
			r, s.Segments, s.Moves, falseMoves, late, s.Pending, s.Provisional, s.Births, s.Retirements, s.Alerts, s.Clears, s.ESS, s.Diversity, ari, maj)
	}
	sc.precision = float64(sc.right) / math.Max(float64(sc.right+sc.wrong), 1)
	sc.recall = float64(len(detected)) / float64(switched)
	fmt.Fprintf(&table, "moves at refits %d-%d: %d right, %d wrong: precision %.3f; recall %.3f (%d of %d switched); %d late detections",
		switchAt, switchAt+1, sc.right, sc.wrong, sc.precision, sc.recall, len(detected), switched, sc.late)
	sc.table = table.String()
	return sc
}

// TestSimulatedMoves is the acceptance check of issue 4 for moves and ids:
// 8 refits of 250 products in the three segments of the demo scenario,
// 10% of them switching segment for good at refit index 4 (the fifth
// refit), run through the real particle updater (P = 128). Targets, with
// the default Config: moves at refit index 4 or 5 (the fifth or sixth
// refit) have precision >= 0.9 and recall >= 0.8; at every other refit,
// false moves <= 1% of products; the majority id of every true segment
// never changes. The same run evaluated with Confirm = 1 (moves at the
// first crossing of the membership band) is logged for comparison.
//
// With -short the check runs on 200 products (20 switchers) and 48
// particles so that it fits under the race detector; the targets are the
// same.
func TestSimulatedMoves(t *testing.T) {
	t.Parallel()
	cfg := synth.Scenario()
	cfg.Products = 250
	particles := 128
	if testing.Short() {
		cfg.Products, particles = 200, 48
	}
	seq, runs := simulate(t, cfg, 8, 0.1, particles, 41)
	nseg := len(cfg.Segments)

	once := DefaultConfig()
	once.Confirm = 1
	sc1 := scoreMoves(evaluateRuns(t, once, runs), seq.SwitchAt, nseg)
	t.Logf("Confirm = 1 (for comparison):\n%s", sc1.table)

	sc := scoreMoves(evaluateRuns(t, DefaultConfig(), runs), seq.SwitchAt, nseg)
	t.Logf("%d products, %d particles, default config (Confirm = %d):\n%s", cfg.Products, particles, DefaultConfig().Confirm, sc.table)
	for _, msg := range sc.idChanges {
		t.Error(msg)
	}
	for r, rate := range sc.falseRate {
		if rate > 0.01 {
			t.Errorf("refit %d: false moves %.1f%% of products, want <= 1%%", r, 100*rate)
		}
	}
	if sc.precision < 0.9 {
		t.Errorf("precision %.3f, want >= 0.9", sc.precision)
	}
	if sc.recall < 0.8 {
		t.Errorf("recall %.3f, want >= 0.8", sc.recall)
	}
}

// TestSimulatedMissedCalibration checks that the missed-competitor
// probability P(next value > 0.25) is calibrated, on a simulated sequence
// (the demo scenario, 250 products, 10 refits, P = 128) where each
// product's full latent vector is known: every refit, each product with
// n < L contributes its predicted probability and whether Latent[n], its
// largest unreported value, exceeded 0.25. Predictions are binned by
// tenths; in each bin with enough products the observed frequency must be
// within 0.1 of the mean prediction. "Enough" is where 0.1 is at least
// two binomial standard errors at the bin's mean prediction p, n >=
// 400 p (1 - p), and at least 20; sparser bins are logged, and the
// predictions in [0.1, 0.9) are also checked pooled by the same rule.
// The Brier score is logged beside that of always predicting the base
// rate.
//
// With -short: 120 products, 48 particles, 4 refits.
func TestSimulatedMissedCalibration(t *testing.T) {
	t.Parallel()
	cfg := synth.Scenario()
	cfg.Products = 250
	particles, refits := 128, 10
	if testing.Short() {
		cfg.Products, particles, refits = 120, 48, 4
	}
	_, runs := simulate(t, cfg, refits, 0.1, particles, 77)
	const bins = 10
	var count [bins + 1]int // the last slot pools [0.1, 0.9)
	var predSum, hitSum [bins + 1]float64
	var brier, baseRate float64
	total := 0
	for _, sr := range runs {
		for j, p := range sr.pred {
			hit := 0.0
			if sr.exceeds[j] {
				hit = 1
			}
			b := min(int(p*bins), bins-1)
			slots := []int{b}
			if p >= 0.1 && p < 0.9 {
				slots = append(slots, bins)
			}
			for _, s := range slots {
				count[s]++
				predSum[s] += p
				hitSum[s] += hit
			}
			brier += (p - hit) * (p - hit)
			baseRate += hit
			total++
		}
	}
	brier /= float64(total)
	baseRate /= float64(total)
	var table strings.Builder
	fmt.Fprintf(&table, "bin         count  mean-pred  observed      z  checked\n")
	for b := 0; b <= bins; b++ {
		if count[b] == 0 {
			continue
		}
		n := float64(count[b])
		mp, obs := predSum[b]/n, hitSum[b]/n
		checked := n >= 20 && n >= 400*mp*(1-mp)
		name := fmt.Sprintf("[%.1f,%.1f)", float64(b)/bins, float64(b+1)/bins)
		if b == bins-1 {
			name = "[0.9,1.0]"
		}
		if b == bins {
			name = "[0.1,0.9)"
		}
		// z: the deviation in binomial standard errors at the mean prediction.
		z := (obs - mp) / math.Sqrt(mp*(1-mp)/n)
		fmt.Fprintf(&table, "%-10s  %5d  %9.3f  %8.3f  %5.1f  %v\n", name, count[b], mp, obs, z, checked)
		if checked && math.Abs(mp-obs) > 0.1 {
			t.Errorf("bin %s: mean prediction %.3f, observed %.3f over %d products, want within 0.1", name, mp, obs, count[b])
		}
	}
	t.Logf("%d products, %d particles, %d predictions over %d refits; Brier score %.4f (base rate %.3f, whose Brier score is %.4f)\n%s",
		cfg.Products, particles, total, refits, brier, baseRate, baseRate*(1-baseRate), table.String())
}
