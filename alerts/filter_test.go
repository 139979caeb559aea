package alerts

import (
	"fmt"
	"math"
	"testing"
)

// The tiny case: 3 segments (sizes 5, 3, 2, as a handRefit of 4 + 3 + 2
// other products plus x in the first) and x's log emissions at 3 refits,
// chosen so that x drifts from segment 0 towards segment 2.
var (
	tinySizes = []int{5, 3, 2}
	tinyEm    = [][]float64{
		{-0.3, -2.6, -5.0},
		{-5.5, -3.4, -0.2},
		{-6.5, -3.9, -0.1},
	}
	tinyEps, tinyGamma = 0.08, 0.6
)

// enumerate returns P(z_T = c | e_1..e_T) for T = len(em), and the
// probability that the label path has changed at least once, by summing
// the joint probability of every path of labels (z_1, ..., z_T) in K^T:
//
//	P(z, e) ∝ size[z_1] e_1[z_1]^gamma prod_{t>1} T(z_{t-1}, z_t) e_t[z_t]^gamma
//
// with T(b, c) = 1 - eps when b = c and eps size[c] / (N - size[b])
// otherwise (N the sum of the sizes). Written independently of
// filter.go: no shared helper.
func enumerate(sizes []int, em [][]float64, eps, gamma float64) (marg []float64, switched float64) {
	k, steps := len(sizes), len(em)
	marg = make([]float64, k)
	path := make([]int, steps)
	total := 0.0
	var rec func(t int)
	rec = func(t int) {
		if t == steps {
			w := float64(sizes[path[0]]) * math.Pow(math.Exp(em[0][path[0]]), gamma)
			changed := false
			for s := 1; s < steps; s++ {
				n := 0
				for _, z := range sizes {
					n += z
				}
				tr := eps * float64(sizes[path[s]]) / float64(n-sizes[path[s-1]])
				if path[s] == path[s-1] {
					tr = 1 - eps
				} else {
					changed = true
				}
				w *= tr * math.Pow(math.Exp(em[s][path[s]]), gamma)
			}
			marg[path[steps-1]] += w
			total += w
			if changed {
				switched += w
			}
			return
		}
		for c := 0; c < k; c++ {
			path[t] = c
			rec(t + 1)
		}
	}
	rec(0)
	for c := range marg {
		marg[c] /= total
	}
	return marg, switched / total
}

// forward runs the package's recursion over em and returns the marginal
// and P(switched) of the final state.
func forward(sizes []int, em [][]float64, eps, gamma float64) ([]float64, float64) {
	st := filterInit(sizes, em[0], gamma)
	for _, e := range em[1:] {
		st = filterUpdate(filterPredict(st, eps, sizes), e, gamma)
	}
	marg := make([]float64, st.k())
	for c := range marg {
		marg[c] = st.marginal(c)
	}
	return marg, st.moved()
}

func maxDiff(a, b []float64) float64 {
	d := 0.0
	for i := range a {
		d = math.Max(d, math.Abs(a[i]-b[i]))
	}
	return d
}

// TestFilterForwardMatchesEnumeration: the forward recursion's state after
// 1, 2 and 3 refits equals the brute-force sums over all 3^T label paths,
// to 1e-12: the marginal of the last label, and the probability that
// the path changed label at least once (the switch flag).
func TestFilterForwardMatchesEnumeration(t *testing.T) {
	t.Parallel()
	for steps := 1; steps <= 3; steps++ {
		got, gotSw := forward(tinySizes, tinyEm[:steps], tinyEps, tinyGamma)
		want, wantSw := enumerate(tinySizes, tinyEm[:steps], tinyEps, tinyGamma)
		if d := maxDiff(got, want); d > 1e-12 {
			t.Errorf("after %d refits: forward %v, enumeration %v (max diff %.3g)", steps, got, want, d)
		}
		if math.Abs(gotSw-wantSw) > 1e-12 {
			t.Errorf("after %d refits: forward P(switched) %v, enumeration %v", steps, gotSw, wantSw)
		}
	}
}

// TestFilterEnumerationSensitive: the tiny case tells every term of the
// recursion apart: dropping the transition (eps = 0 in the recursion),
// the tempering (gamma = 1), the sizes (uniform, in the prior and the
// transition), or one
// refit's emission each moves the final marginal or P(switched) by more
// than 0.01 from the enumeration, so TestFilterForwardMatchesEnumeration
// would fail.
func TestFilterEnumerationSensitive(t *testing.T) {
	t.Parallel()
	want, wantSw := enumerate(tinySizes, tinyEm, tinyEps, tinyGamma)
	noEm := [][]float64{tinyEm[0], {0, 0, 0}, tinyEm[2]}
	type res struct {
		marg []float64
		sw   float64
	}
	run := func(sizes []int, em [][]float64, eps, gamma float64) res {
		m, s := forward(sizes, em, eps, gamma)
		return res{m, s}
	}
	for name, got := range map[string]res{
		"no transition":   run(tinySizes, tinyEm, 0, tinyGamma),
		"no tempering":    run(tinySizes, tinyEm, tinyEps, 1),
		"no size prior":   run([]int{1, 1, 1}, tinyEm, tinyEps, tinyGamma),
		"middle emission": run(tinySizes, noEm, tinyEps, tinyGamma),
		"last refit only": run(tinySizes, tinyEm[2:], tinyEps, tinyGamma),
	} {
		if d := math.Max(maxDiff(got.marg, want), math.Abs(got.sw-wantSw)); d < 0.01 {
			t.Errorf("%s: state %v, %v is within %.3g of the enumeration %v, %v: the check cannot see this term", name, got.marg, got.sw, d, want, wantSw)
		}
	}
}

// tinyRefit is a handRefit of the tiny case with x's emissions at refit
// t: every other product's emission favours its own segment.
func tinyRefit(t *testing.T, step int) Refit {
	t.Helper()
	prods := concat(members("a", 4, 0), members("b", 3, 1), members("c", 2, 2), []hand{{id: "x", seg: 0}})

	r := handRefit(t, fmt.Sprintf("W%d", step), 3, prods)
	for _, h := range prods {
		row := []float64{-5, -5, -5}
		row[h.seg] = -1
		if h.id == "x" {
			row = tinyEm[step]
		}
		r.Emission = append(r.Emission, row)
	}
	return r
}

// TestFilterEvaluateMatchesEnumeration runs the tiny case through
// Evaluate with the filter rule: x's state kept in Memory.Filter after
// each refit has the enumeration's marginal, and until x moves its
// switch flag holds the enumeration's P(switched); the move event, when
// it comes, carries that probability, and the flag is cleared after it.
func TestFilterEvaluateMatchesEnumeration(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	cfg.Rule, cfg.SwitchRate, cfg.Temper, cfg.MoveProb, cfg.Confirm = RuleFilter, tinyEps, tinyGamma, 0.51, 1
	mem := Memory{}
	moved := false
	for step := range tinyEm {
		out := mustEvaluate(t, cfg, mem, tinyRefit(t, step))
		mem = out.Memory
		want, wantSw := enumerate(tinySizes, tinyEm[:step+1], tinyEps, tinyGamma)
		var got []float64
		sw := 0.0
		for _, id := range []string{"S1", "S2", "S3"} {
			v := mem.Filter["x"][id]
			got = append(got, v[0]+v[1])
			sw += v[1]
		}
		if d := maxDiff(got, want); d > 1e-12 {
			t.Errorf("refit %d: memory %v, enumeration %v", step, got, want)
		}
		events := byKind(out.Events, KindMoved)
		switch {
		case moved || len(events) > 0:
			if sw != 0 {
				t.Errorf("refit %d: switch flag %v after the move, want cleared", step, sw)
			}
		case math.Abs(sw-wantSw) > 1e-12:
			t.Errorf("refit %d: switch flag %v, enumeration P(switched) %v", step, sw, wantSw)
		}
		for _, e := range events {
			m := e.Data.(Moved)
			if m.Product != "x" {
				t.Errorf("refit %d: unexpected move %+v", step, m)
				continue
			}
			moved = true
			if m.Probability == nil || math.Abs(*m.Probability-wantSw) > 1e-12 {
				t.Errorf("refit %d: move carries %v, want P(switched) = %v", step, m.Probability, wantSw)
			}
			if m.To != "S3" {
				t.Errorf("refit %d: moved to %s, want S3 (most probable: %v)", step, m.To, want)
			}
		}
	}
	if !moved {
		t.Errorf("x never moved although its filter state is %v", mem.Filter["x"])
	}
}
