package alerts

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/floats"

	"rivalmix/sequential"
	"rivalmix/sequential/synth"
)

// oracleScore counts the decisions of the oracle detector.
type oracleScore struct {
	switchers, detected, right, wrong int
}

// oracleSwitches scores the best detector any move rule can hope to be on
// the backtest's simulated refits: it knows the true segments' kernels
// and report probabilities, that switches happen only at refit SwitchAt
// with probability share, and that a switcher moves to one of the other
// segments uniformly (synth.Sequence). For each product it computes the
// exact posterior over its paths (segment before, segment after) from
// the refits seen so far, and at the switch refit and the next it
// reports a move when P(switched) >= moveProb, to the most probable new
// segment. With independent refits (drift 0) this is the Bayes posterior
// of the simulation itself; with re-estimated refits the refits of one
// product are not independent given its segment and the oracle treats
// them as if they were (so it is an approximation there).
func oracleSwitches(cfg synth.Config, refits int, share, drift float64, seed uint64, moveProb float64) oracleScore {
	src := rand.New(rand.NewPCG(seed, 101)) // the simulation's generator (simulateHazard)
	seq := synth.NewSequence(cfg, refits, share, src)
	seq.Drift = drift
	K := len(cfg.Segments)
	logPrior := make([]float64, K)
	thetas := make([]sequential.Theta, K)
	for s, sp := range cfg.Segments {
		logPrior[s] = math.Log(sp.Share)
		thetas[s] = sequential.Theta{LogA: math.Log(sp.A), LogK: math.Log(sp.K), LogS: math.Log(sp.S)}
	}
	n := cfg.Products
	// before[i][s]: log p(product i in s, data before the switch);
	// after[i][s]: log-likelihood of the data from the switch on under s.
	before := make([][]float64, n)
	after := make([][]float64, n)
	trueOld := make([]int, n)
	var sc oracleScore
	detected := make([]bool, n)
	for r := 0; r < refits; r++ {
		prods := seq.Refit(r)
		for i := range prods {
			if before[i] == nil {
				before[i] = append([]float64(nil), logPrior...)
				after[i] = make([]float64, K)
			}
			d := prods[i].Datum()
			for s := range K {
				ll := d.LogLik(thetas[s], cfg.Segments[s].P)
				if r < seq.SwitchAt {
					before[i][s] += ll
				} else {
					after[i][s] += ll
				}
			}
			if r == seq.SwitchAt-1 {
				trueOld[i] = prods[i].Segment
			}
			if r != seq.SwitchAt && r != seq.SwitchAt+1 {
				continue
			}
			if r == seq.SwitchAt && seq.Switched[i] {
				sc.switchers++
			}
			// Paths: stay in s (1 - share), or s -> t, t != s (share / (K-1)).
			logStay, logMove := math.Log(1-share), math.Log(share/float64(K-1))
			stay, moved := math.Inf(-1), math.Inf(-1)
			newMass := make([]float64, K)
			for t := range newMass {
				newMass[t] = math.Inf(-1)
			}
			for s := range K {
				stay = logAdd(stay, before[i][s]+logStay+after[i][s])
				for t := range K {
					if t != s {
						v := before[i][s] + logMove + after[i][t]
						moved = logAdd(moved, v)
						newMass[t] = logAdd(newMass[t], v)
					}
				}
			}
			pMoved := math.Exp(moved - logAdd(stay, moved))
			if pMoved < moveProb || detected[i] {
				continue
			}
			best := 0
			for t := range K {
				if newMass[t] > newMass[best] {
					best = t
				}
			}
			detected[i] = true
			if seq.Switched[i] && best == prods[i].Segment && best != trueOld[i] {
				sc.right++
				sc.detected++
			} else {
				sc.wrong++
			}
		}
	}
	return sc
}

// logAdd returns log(exp(a) + exp(b)) (gonum's floats.LogSumExp).
func logAdd(a, b float64) float64 { return floats.LogSumExp([]float64{a, b}) }

// TestOracleSwitchDetection runs the oracle detector (oracleSwitches) on
// the backtest's cases and seeds (TestBacktestMoveRules): its recall and
// precision bound what any move rule can reach on the same refits at the
// same move probability. On separated segments the oracle must detect
// nearly every switcher (recall and precision >= 0.95), which checks the
// likelihood and the path sums. On overlapping segments it logs the bound
// at several move probabilities, and over the scale step between
// neighbouring segments (synth.OverlapConfig; 1.35 is the backtest's
// layout), where recall must grow from the closest to the widest step.
func TestOracleSwitchDetection(t *testing.T) {
	t.Parallel()
	def := DefaultConfig().MoveProb
	for _, c := range []btCase{
		{name: "separated/independent", products: 250},
		{name: "separated/re-estimated", drift: 0.1, products: 250},
	} {
		recall, precision := oracleCase(t, c.name, func(seed uint64) synth.Config { return c.config(seed) }, c.drift, def)
		if recall < 0.95 || precision < 0.95 {
			t.Errorf("%s: the oracle detects %.3f of the switchers at precision %.3f; with the true kernels it should see nearly all", c.name, recall, precision)
		}
	}
	for _, drift := range []float64{0, 0.1} {
		name := "overlapping/independent"
		if drift > 0 {
			name = "overlapping/re-estimated"
		}
		for _, mp := range []float64{0.3, 0.5, 0.9} {
			oracleCase(t, name, func(seed uint64) synth.Config { return btCase{overlap: true, products: 310}.config(seed) }, drift, mp)
		}
		var recalls []float64
		for _, step := range []float64{1.35, 1.5, 1.7, 2.0} {
			cfg := func(seed uint64) synth.Config {
				return synth.OverlapConfig(310, 4, step, rand.New(rand.NewPCG(seed, 303)))
			}
			r, _ := oracleCase(t, fmt.Sprintf("%s, scale step %.2f", name, step), cfg, drift, def)
			recalls = append(recalls, r)
		}
		if !(recalls[len(recalls)-1] > recalls[0]+0.2) {
			t.Errorf("%s: oracle recall %v over scale steps 1.35..2.0 does not grow with the distance between segments", name, recalls)
		}
	}
}

// oracleCase sums the oracle over the backtest's five seeds and logs it.
func oracleCase(t *testing.T, name string, cfg func(seed uint64) synth.Config, drift, moveProb float64) (recall, precision float64) {
	var tot oracleScore
	for _, seed := range []uint64{11, 12, 13, 14, 15} {
		sc := oracleSwitches(cfg(seed), btRefits, btShare, drift, seed, moveProb)
		tot.switchers += sc.switchers
		tot.detected += sc.detected
		tot.right += sc.right
		tot.wrong += sc.wrong
	}
	recall = float64(tot.detected) / float64(tot.switchers)
	precision = float64(tot.right) / math.Max(float64(tot.right+tot.wrong), 1)
	t.Logf("%s, 5 seeds: oracle recall %.3f (%d/%d), precision %.3f (%d/%d) at move probability %.2f",
		name, recall, tot.detected, tot.switchers, precision, tot.right, tot.right+tot.wrong, moveProb)
	return recall, precision
}
