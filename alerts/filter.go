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
// segment id, one step per refit, with a flag that remembers whether the
// product has switched since its reported segment was last set. Its
// state after a refit is, over the live segments c of the refit and the
// flag s in {0, 1},
//
//	st[s][c] = P(product in segment c at this refit, flag s | its data at every refit so far)
//
// (2K numbers per product, kept in Memory.Filter by segment id). Flag 0
// means no switch since the label was set: the product is where it was
// then. P(moved) = sum_c st[1][c] is the probability that the product
// has changed segment since; it is what the move rule tests and the
// moved event carries. The marginal st[0][c] + st[1][c] is the
// probability that the product is in c now; it can move away from the
// label without a switch when the label was uncertain when it was set.
//
// Transition: the product stays in its segment b with probability
// 1 - eps, flag unchanged, and switches to another live segment c with
// probability eps size[c] / (N - size[b]), setting the flag
// (Config.SwitchRate is eps; size[c] is the number of products in point
// segment c at the refit, N their total): a switch lands in a segment in
// proportion to its size, as a new product would (the Chinese
// restaurant process), so the small, often one-product, segments of a
// point partition do not draw prior mass away from the real ones.
//
// Emission: e[c] = the posterior predictive density of the refit's datum
// as a member of segment c (sequential.SegmentLogPredictive: under the
// particle's segment that holds most of c's members, mixed over the
// particles), raised to the power gamma (Config.Temper): refits that
// re-estimate a product on mostly the same weeks of sales repeat much of
// the last one's evidence, and counting each in full would make the
// filter confident too soon.
//
// Initial state: a product seen for the first time is in segment c with
// prior probability proportional to the segment's size (the Chinese
// restaurant process's prediction for an existing segment), flag 0,
// times e[c].
//
// Forward filtering (Rabiner 1989, the "forward" recursion), over the
// pairs (c, s):
//
//	st_1[0][c] ∝ size[c] e_1[c]^gamma,  st_1[1][c] = 0
//	st_t[s][c] ∝ (sum_{b,r} st_{t-1}[r][b] T[(b,r)][(c,s)]) e_t[c]^gamma
//
// with T[(c,r)][(c,r)] = 1 - eps and T[(b,r)][(c,1)] = eps size[c] /
// (N - size[b]) for b != c. When the label changes (a moved event) the flag is cleared:
// st[0] += st[1], st[1] = 0.

// fstate is a filter state: st[c] (flag 0) and st[K+c] (flag 1).
type fstate []float64

func (f fstate) k() int { return len(f) / 2 }

// marginal returns P(segment c) = st[0][c] + st[1][c].
func (f fstate) marginal(c int) float64 { return f[c] + f[f.k()+c] }

// moved returns P(flag 1).
func (f fstate) moved() float64 {
	s := 0.0
	for _, v := range f[f.k():] {
		s += v
	}
	return min(max(s, 0), 1)
}

// clearFlag folds flag 1 into flag 0: the label was just set.
func (f fstate) clearFlag() {
	k := f.k()
	for c := 0; c < k; c++ {
		f[c] += f[k+c]
		f[k+c] = 0
	}
}

// filterInit returns the state of a product seen for the first time:
// prior proportional to sizes, flag 0, then the emission.
func filterInit(sizes []int, logEm []float64, gamma float64) fstate {
	st := make(fstate, 2*len(sizes))
	for c, s := range sizes {
		st[c] = float64(s)
	}
	return filterUpdate(st, logEm, gamma)
}

// filterPredict applies the sticky transition to a state that sums to 1,
// with the point segments' sizes of the refit it moves to.
func filterPredict(prev fstate, eps float64, sizes []int) fstate {
	k := prev.k()
	out := make(fstate, 2*k)
	total := 0
	for _, s := range sizes {
		total += s
	}
	// away[b] = m_b / (N - size_b): the marginal mass of b per product
	// outside b; the flow into c is eps size_c sum_{b != c} away[b].
	var sumAway float64
	away := make([]float64, k)
	for b := 0; b < k; b++ {
		if rest := total - sizes[b]; rest > 0 {
			away[b] = prev.marginal(b) / float64(rest)
			sumAway += away[b]
		}
	}
	for c := 0; c < k; c++ {
		if total-sizes[c] == 0 {
			// One segment holds every product: nowhere to switch to.
			out[c], out[k+c] = prev[c], prev[k+c]
			continue
		}
		out[c] = prev[c] * (1 - eps)
		out[k+c] = prev[k+c]*(1-eps) + eps*float64(sizes[c])*(sumAway-away[c])
	}
	return out
}

// filterUpdate multiplies the predicted state by the tempered emission
// and normalises. A state whose every term is 0 (the emissions rule out
// every segment it allows) falls back to the tempered emission alone,
// flag 0.
func filterUpdate(pred fstate, logEm []float64, gamma float64) fstate {
	k := pred.k()
	out := make(fstate, 2*k)
	top := math.Inf(-1)
	for c := 0; c < k; c++ {
		if pred.marginal(c) > 0 {
			top = math.Max(top, gamma*logEm[c])
		}
	}
	sum := 0.0
	if !math.IsInf(top, -1) {
		for j := range pred {
			if pred[j] > 0 {
				out[j] = pred[j] * math.Exp(gamma*logEm[j%k]-top)
				sum += out[j]
			}
		}
	}
	if !(sum > 0) {
		flat := make(fstate, 2*k)
		for c := 0; c < k; c++ {
			flat[c] = 1
		}
		if slices.Equal(pred, flat) {
			// Nothing to fall back to: every emission is -Inf.
			for c := 0; c < k; c++ {
				out[c] = 1 / float64(k)
			}
			return out
		}
		return filterUpdate(flat, logEm, gamma)
	}
	for j := range out {
		out[j] /= sum
	}
	return out
}

// filterCarry maps a product's state at the previous refit, by segment
// id, onto the new refit's point segments (by index) before the
// transition, flags unchanged: mass on an id that lives on stays on it;
// mass on a previous segment reported split goes to its parts in
// proportion to their shares; mass on a retired id goes to its successor
// (the new segment that took most of its members); mass on a retired id
// with no successor is dropped. The result is normalised; ok is false
// when no mass is left (the caller starts the product afresh).
func filterCarry(prev map[string][2]float64, lab *labelling) (state fstate, ok bool) {
	k := len(lab.ids)
	out := make(fstate, 2*k)
	splits := make(map[string]*Split, len(lab.splits))
	for j := range lab.splits {
		splits[lab.splits[j].Segment] = &lab.splits[j]
	}
	succ := make(map[string]int, len(lab.retired))
	for _, r := range lab.retired {
		succ[r.id] = r.successor
	}
	put := func(c int, m [2]float64, share float64) {
		out[c] += m[0] * share
		out[k+c] += m[1] * share
	}
	for _, id := range slices.SortedFunc(maps.Keys(prev), compareSegmentIDs) {
		m := prev[id]
		if sp, split := splits[id]; split {
			total := 0.0
			for _, s := range sp.Shares {
				total += s
			}
			for j, into := range sp.Into {
				put(lab.live[into], m, sp.Shares[j]/total)
			}
			continue
		}
		if c, live := lab.live[id]; live {
			put(c, m, 1)
			continue
		}
		if s, retired := succ[id]; retired && s >= 0 {
			put(s, m, 1)
		}
	}
	sum := 0.0
	for _, v := range out {
		sum += v
	}
	if !(sum > 0) {
		return nil, false
	}
	for j := range out {
		out[j] /= sum
	}
	return out, true
}

// filterStep is one refit of the filter for one product: prev is its
// state at the last refit (nil for a product seen for the first time, or
// one evaluated before the filter kept state: then the reported segment,
// when live, holds all the mass with flag 0 before the transition, as if
// the product had been filtered into it), sizes the point segments'
// sizes and logEm the log predictive densities of its datum per point
// segment.
func filterStep(cfg Config, prev map[string][2]float64, reported string, lab *labelling, sizes []int, logEm []float64) fstate {
	if prev != nil {
		if st, ok := filterCarry(prev, lab); ok {
			return filterUpdate(filterPredict(st, cfg.SwitchRate, sizes), logEm, cfg.Temper)
		}
	} else if c, live := lab.live[reported]; live {
		st := make(fstate, 2*len(sizes))
		st[c] = 1
		return filterUpdate(filterPredict(st, cfg.SwitchRate, sizes), logEm, cfg.Temper)
	}
	return filterInit(sizes, logEm, cfg.Temper)
}

// argmaxMarginal returns the segment with the largest marginal
// probability (the first on ties), skipping segment skip (-1 skips
// none); -1 when nothing is left.
func argmaxMarginal(f fstate, skip int) int {
	best := -1
	for c := 0; c < f.k(); c++ {
		if c != skip && (best < 0 || f.marginal(c) > f.marginal(best)) {
			best = c
		}
	}
	return best
}
