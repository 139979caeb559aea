package alerts

import (
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"rivalmix/sequential/synth"
)

var backtestFlag = flag.Bool("backtest", false, "run the long side-by-side backtest of the move rules (minutes)")

// btCase is one simulated setting of the backtest.
type btCase struct {
	name      string
	overlap   bool    // four overlapping segments (else the demo's three separated ones)
	drift     float64 // > 0: refits re-estimate the values (synth.Sequence.Drift)
	products  int
	particles int
	// step, when > 0, spaces the overlapping segments' scales by this
	// factor instead of 1.35 (synth.OverlapConfig).
	step float64
}

func (c btCase) config(seed uint64) synth.Config {
	if !c.overlap {
		cfg := synth.Scenario()
		cfg.Products = c.products
		return cfg
	}
	if c.step > 0 {
		return synth.OverlapConfig(c.products, 4, c.step, rand.New(rand.NewPCG(seed, 303)))
	}
	cfg := synth.LayoutConfig(c.products, 4, synth.Overlapping, rand.New(rand.NewPCG(seed, 303)))
	return cfg
}

// btScore accumulates the scoring of one rule over runs.
type btScore struct {
	right, wrong         int     // moves in the window: to the switcher's new segment, or not
	switched, detected   int     // switchers visible in id space, and those with a right move in the window
	switchedAll          int     // every switcher
	falseMoves, products int     // moves outside the window that are not a late right one, and products, over the non-window refits after the first
	maxFalse             float64 // largest false-move share of one refit
	delaySum             float64 // refits from the switch to the first right move, over switchers detected at any refit
	delayN               int
	// (prediction, outcome) pairs: P(switched since the label was set)
	// and the planted truth (see add).
	pred []float64
	obs  []bool
}

func (b *btScore) precision() float64 {
	return float64(b.right) / math.Max(float64(b.right+b.wrong), 1)
}
func (b *btScore) recall() float64 { return float64(b.detected) / math.Max(float64(b.switched), 1) }
func (b *btScore) falseRate() float64 {
	return float64(b.falseMoves) / math.Max(float64(b.products), 1)
}
func (b *btScore) delay() float64 { return b.delaySum / math.Max(float64(b.delayN), 1) }
func (b *btScore) brier() float64 {
	s := 0.0
	for j, p := range b.pred {
		o := 0.0
		if b.obs[j] {
			o = 1
		}
		s += (p - o) * (p - o)
	}
	return s / math.Max(float64(len(b.pred)), 1)
}

// add scores one evaluated run. pMoved(r, i, reported) is the rule's
// probability that product i has switched segment since its label
// (reported) was set, at refit r before the rule's decision.
//
// Scoring is in the space of segment ids, where a move can be seen: each
// true segment is named by the id that holds most of its products at the
// refit (majorityIDs). A switcher counts for recall only when its old and
// new true segments have different ids at the switch (where overlapping
// true segments share one point segment, no rule can see the switch);
// switchedAll counts every switcher. For calibration, each established
// product at each refit after the first pairs the rule's probability with
// the planted truth: it has switched since its label was set when it is
// a switcher, the refit is at or after the switch and the label was set
// before it. Switchers that no rule can see are left out.
func (b *btScore) add(runs []simRefit, switchAt, nseg int, pMoved func(r, i int, reported string) float64) {
	before, after := majorityIDs(runs[switchAt-1], nseg), majorityIDs(runs[switchAt], nseg)
	visible := map[string]bool{}
	prevTruth := map[string]int{}
	for i, p := range runs[switchAt-1].in.Products {
		prevTruth[p] = runs[switchAt-1].truth[i]
	}
	for i, p := range runs[switchAt].in.Products {
		if runs[switchAt].switched[i] {
			b.switchedAll++
			if before[prevTruth[p]] != after[runs[switchAt].truth[i]] {
				visible[p] = true
				b.switched++
			}
		}
	}
	labelOf := map[string]string{}
	setAt := map[string]int{} // refit at which the label was last set
	established := map[string]bool{}
	firstRight := map[string]int{}
	detected := map[string]bool{}
	for r, sr := range runs {
		maj := majorityIDs(sr, nseg)
		window := r == switchAt || r == switchAt+1
		falseHere := 0
		movedNow := map[string]bool{}
		for _, e := range byKind(sr.out.Events, KindMoved) {
			m := e.Data.(Moved)
			movedNow[m.Product] = true
			i := sr.index[m.Product]
			toNew := sr.switched[i] && r >= switchAt && m.To == maj[sr.truth[i]]
			if toNew {
				if _, ok := firstRight[m.Product]; !ok {
					firstRight[m.Product] = r
				}
			}
			switch {
			case window && toNew:
				b.right++
				if visible[m.Product] {
					detected[m.Product] = true
				}
			case window:
				b.wrong++
			case toNew:
			default:
				falseHere++
			}
		}
		if r > 0 && !window {
			b.falseMoves += falseHere
			b.products += len(sr.in.Products)
			b.maxFalse = math.Max(b.maxFalse, float64(falseHere)/float64(len(sr.in.Products)))
		}
		for i, p := range sr.in.Products {
			if r > 0 && established[p] && !sr.out.Provisional[i] && (!sr.switched[i] || visible[p]) {
				b.pred = append(b.pred, pMoved(r, i, labelOf[p]))
				b.obs = append(b.obs, sr.switched[i] && r >= switchAt && setAt[p] < switchAt)
			}
			if sr.out.Provisional[i] || movedNow[p] || !established[p] {
				setAt[p] = r
			}
			established[p] = !sr.out.Provisional[i]
			labelOf[p] = sr.out.Labels[i]
		}
	}
	b.detected += len(detected)
	for _, r := range firstRight {
		b.delaySum += float64(r - switchAt)
		b.delayN++
	}
}

// calibration bins the pairs by tenths of the prediction and returns a
// table and the bins that fail: in a bin with at least 20 pairs, the
// observed share must be within 0.1 of the mean prediction, or within 2
// binomial standard errors of it (sqrt(p (1 - p) / n) at the mean
// prediction p; the normal approximation to the binomial).
func calibration(pred []float64, obs []bool) (string, []string) {
	const bins = 10
	var count [bins]int
	var ps, hs [bins]float64
	for j, p := range pred {
		b := min(int(p*bins), bins-1)
		count[b]++
		ps[b] += p
		if obs[j] {
			hs[b]++
		}
	}
	var tb strings.Builder
	var bad []string
	fmt.Fprintf(&tb, "    bin         count  mean-pred  observed      z\n")
	for b := 0; b < bins; b++ {
		if count[b] == 0 {
			continue
		}
		n := float64(count[b])
		mp, ob := ps[b]/n, hs[b]/n
		se := math.Sqrt(mp * (1 - mp) / n)
		z := (ob - mp) / math.Max(se, 1e-12)
		fmt.Fprintf(&tb, "    [%.1f,%.1f)  %6d  %9.4f  %8.4f  %5.1f\n", float64(b)/bins, float64(b+1)/bins, count[b], mp, ob, z)
		if count[b] >= 20 && math.Abs(ob-mp) > 0.1 && math.Abs(ob-mp) > 2*se {
			bad = append(bad, fmt.Sprintf("bin [%.1f,%.1f): %d pairs, mean prediction %.3f, observed %.3f", float64(b)/bins, float64(b+1)/bins, count[b], mp, ob))
		}
	}
	return tb.String(), bad
}

// backtestCase simulates seeds of one case, evaluates the band rule and
// the filter under each of filterCfgs on the same refits and returns
// their scores.
func backtestCase(t *testing.T, c btCase, seeds []uint64, filterCfgs []Config) (band btScore, filt []btScore) {
	filt = make([]btScore, len(filterCfgs))
	for _, seed := range seeds {
		cfg := c.config(seed)
		seq, runs := simulateDrift(t, cfg, btRefits, btShare, c.drift, c.particles, seed)
		nseg := len(cfg.Segments)
		bandRuns := evaluateRuns(t, DefaultConfig(), runs)
		// The band rule's implied probability: 1 - membership of the
		// reported segment (1 when it retired).
		band.add(bandRuns, seq.SwitchAt, nseg, func(r, i int, rep string) float64 {
			sr := bandRuns[r]
			for c, id := range sr.out.SegmentIDs {
				if id == rep {
					return 1 - sr.in.Summary.Membership[i][c]
				}
			}
			return 1
		})
		for j, fc := range filterCfgs {
			filtRuns := evaluateRuns(t, fc, runs)
			// The filter's P(switched since the label was set) before its
			// decision: carried by the moved event when there is one, else
			// the flag-1 mass of the state it kept.
			filt[j].add(filtRuns, seq.SwitchAt, nseg, func(r, i int, rep string) float64 {
				return filterMoved(filtRuns[r], i)
			})
		}
	}
	return band, filt
}

// The simulated sequences: 8 refits, 10% of the products switching at
// refit index 4.
const (
	btRefits = 8
	btShare  = 0.1
)

func btRow(rule string, s *btScore) string {
	return fmt.Sprintf("  %-22s  precision %.3f (%d/%d)  recall %.3f (%d/%d visible of %d)  false/refit %.4f (max %.4f)  delay %.2f  Brier %.4f",
		rule, s.precision(), s.right, s.right+s.wrong, s.recall(), s.detected, s.switched, s.switchedAll, s.falseRate(), s.maxFalse, s.delay(), s.brier())
}

// TestBacktestMoveRules runs both move rules side by side on the same
// simulated refits: the demo's three separated segments and four
// overlapping ones (synth.LayoutConfig), each with refits that redraw
// every product (independent) and refits that re-estimate its values
// (drift 0.1, the project's re-estimate noise), 8 refits with 10% of the
// products switching at refit index 4. Scored as in TestSimulatedMoves:
// precision and recall of moves at the switch refit or the next, false
// moves per product at the other refits after the first, the mean delay
// to a switcher's first right move, the Brier score of each rule's
// probability that a product has switched since its label was set (the
// band rule's implied one: 1 - membership) and the filter's calibration.
// The filter runs with the default settings and with SwitchRate set by
// its default rule from the simulated switch rate (0.1 / 7).
//
// The full run (5 seeds per case, a few minutes) needs -backtest:
//
//	go test -run TestBacktestMoveRules -backtest -v ./alerts/
//
// and asserts the targets on separated segments (precision >= 0.95,
// recall >= 0.9, false moves <= 0.5% per refit) for the filter with the
// rule's SwitchRate (calibration: TestFilterCalibrationHazard);
// on overlapping segments (also spaced at scale step 2.0, where the
// oracle of TestOracleSwitchDetection reaches the targets) it
// logs the scores (see README: the filter does
// not beat the band rule there, and the band rule stays the default).
// Without the flag (CI) one seed of separated segments with independent
// refits runs at 200 products and 48 particles (-short: 120 and 32) and
// asserts the same targets and that the filter's Brier score is below
// the band rule's.
func TestBacktestMoveRules(t *testing.T) {
	t.Parallel()
	cases := []btCase{
		{name: "separated/independent", products: 250, particles: 128},
		{name: "separated/re-estimated", drift: 0.1, products: 250, particles: 128},
		{name: "overlapping/independent", overlap: true, products: 310, particles: 128},
		{name: "overlapping/re-estimated", overlap: true, drift: 0.1, products: 310, particles: 128},
		// Overlapping segments spaced so that the oracle with the true
		// kernels reaches the targets (TestOracleSwitchDetection:
		// recall 0.877, precision 0.907 at step 2.0).
		{name: "overlapping, step 2.0/independent", overlap: true, step: 2, products: 310, particles: 128},
	}
	seeds := []uint64{11, 12, 13, 14, 15}
	if !*backtestFlag {
		cases = []btCase{{name: "separated/independent (CI size)", products: 200, particles: 48}}
		if testing.Short() {
			cases[0].products, cases[0].particles = 120, 32
		}
		seeds = seeds[:1]
	}
	def := filterDefaults()
	rule := filterDefaults()
	rule.SwitchRate = btShare / (btRefits - 1)
	for _, c := range cases {
		band, filt := backtestCase(t, c, seeds, []Config{def, rule})
		tb, bad := calibration(filt[1].pred, filt[1].obs)
		btb, _ := calibration(band.pred, band.obs)
		t.Logf("%s, %d seeds, %d products, %d particles:\n%s\n%s\n%s\n  filter (switch rate %.4f) calibration of P(switched since the label was set), %d pairs:\n%s  band rule's implied 1 - membership, for comparison:\n%s",
			c.name, len(seeds), c.products, c.particles, btRow("band", &band), btRow("filter (defaults)", &filt[0]),
			btRow(fmt.Sprintf("filter (eps %.4f)", rule.SwitchRate), &filt[1]), rule.SwitchRate, len(filt[1].pred), tb, btb)
		if c.overlap {
			continue
		}
		f := &filt[1]
		// Calibration is checked in TestFilterCalibrationHazard, where the
		// filter's constant switch rate holds. Here every switch is planted
		// at one refit, where the rate is 10%, not 1.4%: at that refit the
		// filter's P(switched) is too low for the switchers it has not yet
		// moved, which the table shows.
		for _, msg := range bad {
			t.Logf("%s: filter calibration under planted switches: %s", c.name, msg)
		}
		if f.precision() < 0.95 || f.recall() < 0.9 || f.falseRate() > 0.005 {
			t.Errorf("%s: filter precision %.3f, recall %.3f, false moves %.4f per product and refit; want >= 0.95, >= 0.9, <= 0.005",
				c.name, f.precision(), f.recall(), f.falseRate())
		}
		if !*backtestFlag && f.brier() >= band.brier() {
			t.Errorf("%s: filter Brier score %.4f, band rule's %.4f: want the filter's lower", c.name, f.brier(), band.brier())
		}
	}
}

// filterMoved returns the filter's P(switched since the label was set)
// for product i of an evaluated refit, before the move decision.
func filterMoved(sr simRefit, i int) float64 {
	p := sr.in.Products[i]
	for _, e := range byKind(sr.out.Events, KindMoved) {
		if m := e.Data.(Moved); m.Product == p {
			return *m.Probability
		}
	}
	s := 0.0
	for _, v := range sr.out.Memory.Filter[p] {
		s += v[1]
	}
	return min(max(s, 0), 1)
}

// filterDefaults is DefaultConfig with the filter rule.
func filterDefaults() Config {
	cfg := DefaultConfig()
	cfg.Rule = RuleFilter
	return cfg
}

// hazardPairs returns, for a run evaluated under the filter rule, the
// (P(switched since the label was set), planted truth) pairs of every
// product established at the refit and the one before: the truth is
// whether its true segment differs from the one it had when its label
// was last set (at the refit its provisional label stood, or a move).
func hazardPairs(runs []simRefit) (pred []float64, obs []bool) {
	anchor := map[string]int{}
	established := map[string]bool{}
	for r, sr := range runs {
		moved := map[string]bool{}
		for _, e := range byKind(sr.out.Events, KindMoved) {
			moved[e.Data.(Moved).Product] = true
		}
		for i, p := range sr.in.Products {
			if r > 0 && established[p] && !sr.out.Provisional[i] {
				pred = append(pred, filterMoved(sr, i))
				obs = append(obs, sr.truth[i] != anchor[p])
			}
			if sr.out.Provisional[i] || moved[p] || !established[p] {
				anchor[p] = sr.truth[i]
			}
			established[p] = !sr.out.Provisional[i]
		}
	}
	return pred, obs
}

// TestFilterCalibrationHazard checks the calibration of the filter's
// P(switched since the label was set) where its switch model holds:
// every product switches segment with probability 0.02 at every refit
// (synth.Sequence.Hazard), and the filter's SwitchRate is that 0.02. In
// every bin of tenths with at least 20 pairs the observed share must be
// within 0.1 of the mean prediction or within 2 binomial standard errors
// (calibration). Separated segments (the demo's three), independent
// refits; 12 refits of 200 products, 48 particles (-short: 8 refits of
// 120, 32 particles).
// With -backtest it also runs 5 seeds of 250 products, 128 particles,
// separated and overlapping, independent and re-estimated, and logs them;
// the separated ones must pass.
func TestFilterCalibrationHazard(t *testing.T) {
	t.Parallel()
	const hazard = 0.02
	fc := filterDefaults()
	fc.SwitchRate = hazard
	type hcase struct {
		name            string
		overlap         bool
		drift           float64
		products, parts int
		refits          int
		seeds           []uint64
	}
	cases := []hcase{{name: "separated/independent", products: 200, parts: 48, refits: 12, seeds: []uint64{21}}}
	if testing.Short() {
		cases[0].products, cases[0].parts, cases[0].refits = 120, 32, 8
	}
	if *backtestFlag {
		seeds := []uint64{21, 22, 23, 24, 25}
		cases = []hcase{
			{"separated/independent", false, 0, 250, 128, 12, seeds},
			{"separated/re-estimated", false, 0.1, 250, 128, 12, seeds},
			{"overlapping/independent", true, 0, 310, 128, 12, seeds},
			{"overlapping/re-estimated", true, 0.1, 310, 128, 12, seeds},
		}
	}
	for _, c := range cases {
		var pred []float64
		var obs []bool
		var bandPred []float64
		var bandObs []bool
		for _, seed := range c.seeds {
			bc := btCase{overlap: c.overlap, products: c.products}
			cfg := bc.config(seed)
			_, runs := simulateHazard(t, cfg, c.refits, 0, c.drift, hazard, c.parts, seed)
			p, o := hazardPairs(evaluateRuns(t, fc, runs))
			pred, obs = append(pred, p...), append(obs, o...)
			// The band rule's implied probability on the same refits.
			bandRuns := evaluateRuns(t, DefaultConfig(), runs)
			anchor, est := map[string]int{}, map[string]bool{}
			for r, sr := range bandRuns {
				moved := map[string]bool{}
				for _, e := range byKind(sr.out.Events, KindMoved) {
					moved[e.Data.(Moved).Product] = true
				}
				for i, pid := range sr.in.Products {
					if r > 0 && est[pid] && !sr.out.Provisional[i] {
						q := 1.0
						for cc, id := range sr.out.SegmentIDs {
							if id == bandRuns[r-1].out.Labels[bandRuns[r-1].index[pid]] {
								q = 1 - sr.in.Summary.Membership[i][cc]
							}
						}
						bandPred = append(bandPred, q)
						bandObs = append(bandObs, sr.truth[i] != anchor[pid])
					}
					if sr.out.Provisional[i] || moved[pid] || !est[pid] {
						anchor[pid] = sr.truth[i]
					}
					est[pid] = !sr.out.Provisional[i]
				}
			}
		}
		tb, bad := calibration(pred, obs)
		f := btScore{pred: pred, obs: obs}
		b := btScore{pred: bandPred, obs: bandObs}
		t.Logf("%s, hazard %.2f, %d seeds, %d products, %d particles, %d refits: filter Brier %.4f, band rule's implied 1 - membership Brier %.4f; filter calibration over %d pairs:\n%s",
			c.name, hazard, len(c.seeds), c.products, c.parts, c.refits, f.brier(), b.brier(), len(pred), tb)
		if c.overlap {
			continue
		}
		for _, msg := range bad {
			t.Errorf("%s: %s", c.name, msg)
		}
	}
}
