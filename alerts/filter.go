package alerts

import (
	"fmt"
	"maps"
	"math"
	"slices"
)

// MoveRule names the rule that decides when a product's reported segment
// changes (Config.Rule).
type MoveRule string

const (
	// RuleBand moves a product when its membership crosses the
	// MoveIn/MoveOut band towards the same segment at Confirm refits in a
	// row.
	RuleBand MoveRule = "band"
	// RuleFilter moves a product when the switch filter's probability that
	// it has left its reported segment reaches MoveProb.
	RuleFilter MoveRule = "filter"
)

// ParseMoveRule returns the rule named s ("band" or "filter").
func ParseMoveRule(s string) (MoveRule, error) {
	switch r := MoveRule(s); r {
	case RuleBand, RuleFilter:
		return r, nil
	}
	return "", fmt.Errorf("%w: move_rule %q, want band or filter", ErrConfig, s)
}

// The switch filter is a hidden Markov model over a product's stable
// segment id, one step per refit. Its state after a refit is the vector
// post[c] = P(product in segment c at this refit | its data at every
// refit so far), over the live segments of the refit (K numbers per
// product, kept in Memory.Filter by segment id).
//
// Transition: the product stays in its segment with probability 1 - eps
// and moves to each of the other K - 1 live segments with probability
// eps / (K - 1) (Config.SwitchRate is eps).
//
// Emission: e[c] = the posterior predictive density of the refit's datum
// as a member of segment c (sequential.SegmentLogPredictive, mixed over
// the particles), raised to the power gamma (Config.Temper): successive
// refits of a product share most of their sales data, so their data are
// not independent draws and each refit's evidence is discounted.
//
// Initial state: a product seen for the first time is in segment c with
// prior probability proportional to the segment's size (the Chinese
// restaurant process's prediction for an existing segment), times e[c].
//
// Forward filtering (Rabiner 1989, the "forward" recursion):
//
//	post_1[c] ∝ size[c] e_1[c]^gamma
//	post_t[c] ∝ (sum_b post_{t-1}[b] T[b][c]) e_t[c]^gamma

// filterInit returns the state of a product seen for the first time:
// prior proportional to sizes, then the emission.
func filterInit(sizes []int, logEm []float64, gamma float64) []float64 {
	prior := make([]float64, len(sizes))
	for c, s := range sizes {
		prior[c] = float64(s)
	}
	return filterUpdate(prior, logEm, gamma)
}

// filterPredict applies the sticky transition to a state that sums to 1.
func filterPredict(prev []float64, eps float64) []float64 {
	k := len(prev)
	out := make([]float64, k)
	if k == 1 {
		out[0] = 1
		return out
	}
	move := eps / float64(k-1)
	for c, p := range prev {
		// stay: p (1 - eps); arrive from the others: (1 - p) eps / (K-1).
		out[c] = p*(1-eps) + (1-p)*move
	}
	return out
}

// filterUpdate multiplies the predicted state by the tempered emission
// and normalises. A state whose every term is 0 (the emissions rule out
// every segment it allows) falls back to the tempered emission alone.
func filterUpdate(pred []float64, logEm []float64, gamma float64) []float64 {
	k := len(pred)
	out := make([]float64, k)
	top := math.Inf(-1)
	for c := range pred {
		if pred[c] > 0 {
			top = math.Max(top, gamma*logEm[c])
		}
	}
	sum := 0.0
	for c := range pred {
		if pred[c] > 0 && !math.IsInf(top, -1) {
			out[c] = pred[c] * math.Exp(gamma*logEm[c]-top)
			sum += out[c]
		}
	}
	if !(sum > 0) {
		flat := make([]float64, k)
		for c := range flat {
			flat[c] = 1
		}
		if slices.Equal(pred, flat) {
			// Nothing to fall back to: every emission is -Inf.
			for c := range out {
				out[c] = 1 / float64(k)
			}
			return out
		}
		return filterUpdate(flat, logEm, gamma)
	}
	for c := range out {
		out[c] /= sum
	}
	return out
}

// filterCarry maps a product's state at the previous refit, by segment
// id, onto the new refit's point segments (by index) before the
// transition: mass on an id that lives on stays on it; mass on a
// previous segment reported split goes to its parts in proportion to
// their shares; mass on a retired id goes to its successor (the new
// segment that took most of its members); mass on a retired id with no
// successor is dropped. The result is normalised; ok is false when no
// mass is left (the caller starts the product afresh).
func filterCarry(prev map[string]float64, lab *labelling) (state []float64, ok bool) {
	k := len(lab.ids)
	out := make([]float64, k)
	splits := make(map[string]*Split, len(lab.splits))
	for j := range lab.splits {
		splits[lab.splits[j].Segment] = &lab.splits[j]
	}
	succ := make(map[string]int, len(lab.retired))
	for _, r := range lab.retired {
		succ[r.id] = r.successor
	}
	for _, id := range slices.SortedFunc(maps.Keys(prev), compareSegmentIDs) {
		m := prev[id]
		if sp, split := splits[id]; split {
			total := 0.0
			for _, s := range sp.Shares {
				total += s
			}
			for j, into := range sp.Into {
				out[lab.live[into]] += m * sp.Shares[j] / total
			}
			continue
		}
		if c, live := lab.live[id]; live {
			out[c] += m
			continue
		}
		if s, retired := succ[id]; retired && s >= 0 {
			out[s] += m
		}
	}
	sum := 0.0
	for _, v := range out {
		sum += v
	}
	if !(sum > 0) {
		return nil, false
	}
	for c := range out {
		out[c] /= sum
	}
	return out, true
}

// filterStep is one refit of the filter for one product: prev is its
// state at the last refit (nil for a product seen for the first time, or
// one evaluated before the filter kept state; then reported, when live,
// takes the prior mass 1 - eps as if the product had been filtered into
// it), sizes the point segments' sizes and logEm the log predictive
// densities of its datum per point segment.
func filterStep(cfg Config, prev map[string]float64, reported string, lab *labelling, sizes []int, logEm []float64) []float64 {
	if prev != nil {
		if st, ok := filterCarry(prev, lab); ok {
			return filterUpdate(filterPredict(st, cfg.SwitchRate), logEm, cfg.Temper)
		}
	} else if c, live := lab.live[reported]; live && len(sizes) > 1 {
		st := make([]float64, len(sizes))
		for b := range st {
			st[b] = cfg.SwitchRate / float64(len(sizes)-1)
		}
		st[c] = 1 - cfg.SwitchRate
		return filterUpdate(st, logEm, cfg.Temper)
	}
	return filterInit(sizes, logEm, cfg.Temper)
}

// argmax returns the index of the largest value (the first on ties),
// skipping index skip (-1 skips none); -1 when nothing is left.
func argmax(x []float64, skip int) int {
	best := -1
	for c, v := range x {
		if c != skip && (best < 0 || v > x[best]) {
			best = c
		}
	}
	return best
}
