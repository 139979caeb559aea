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
		{-1.0, -1.6, -2.9},
		{-2.2, -1.1, -0.7},
		{-3.0, -1.9, -0.4},
	}
	tinyEps, tinyGamma = 0.08, 0.6
)

// enumerate returns P(z_T = c | e_1..e_T) for T = len(em) by summing the
// joint probability of every path of labels (z_1, ..., z_T) in K^T:
//
//	P(z, e) ∝ size[z_1] e_1[z_1]^gamma prod_{t>1} T(z_{t-1}, z_t) e_t[z_t]^gamma
//
// with T(b, c) = 1 - eps when b = c and eps / (K - 1) otherwise. Written
// independently of filter.go: no shared helper.
func enumerate(sizes []int, em [][]float64, eps, gamma float64) []float64 {
	k, steps := len(sizes), len(em)
	marg := make([]float64, k)
	path := make([]int, steps)
	var rec func(t int)
	rec = func(t int) {
		if t == steps {
			w := float64(sizes[path[0]]) * math.Pow(math.Exp(em[0][path[0]]), gamma)
			for s := 1; s < steps; s++ {
				tr := eps / float64(k-1)
				if path[s] == path[s-1] {
					tr = 1 - eps
				}
				w *= tr * math.Pow(math.Exp(em[s][path[s]]), gamma)
			}
			marg[path[steps-1]] += w
			return
		}
		for c := 0; c < k; c++ {
			path[t] = c
			rec(t + 1)
		}
	}
	rec(0)
	sum := 0.0
	for _, v := range marg {
		sum += v
	}
	for c := range marg {
		marg[c] /= sum
	}
	return marg
}

// forward runs the package's recursion over em.
func forward(sizes []int, em [][]float64, eps, gamma float64) []float64 {
	st := filterInit(sizes, em[0], gamma)
	for _, e := range em[1:] {
		st = filterUpdate(filterPredict(st, eps), e, gamma)
	}
	return st
}

func maxDiff(a, b []float64) float64 {
	d := 0.0
	for i := range a {
		d = math.Max(d, math.Abs(a[i]-b[i]))
	}
	return d
}

// TestFilterForwardMatchesEnumeration: the forward recursion's state after
// 1, 2 and 3 refits equals the brute-force marginal over all 3^T label
// paths, to 1e-12.
func TestFilterForwardMatchesEnumeration(t *testing.T) {
	t.Parallel()
	for steps := 1; steps <= 3; steps++ {
		got := forward(tinySizes, tinyEm[:steps], tinyEps, tinyGamma)
		want := enumerate(tinySizes, tinyEm[:steps], tinyEps, tinyGamma)
		if d := maxDiff(got, want); d > 1e-12 {
			t.Errorf("after %d refits: forward %v, enumeration %v (max diff %.3g)", steps, got, want, d)
		}
	}
}

// TestFilterEnumerationSensitive: the tiny case tells every term of the
// recursion apart: dropping the transition (eps = 0 in the recursion),
// the tempering (gamma = 1), the size prior (uniform sizes), or one
// refit's emission each moves the final state by more than 0.01 from the
// enumeration, so TestFilterForwardMatchesEnumeration would fail.
func TestFilterEnumerationSensitive(t *testing.T) {
	t.Parallel()
	want := enumerate(tinySizes, tinyEm, tinyEps, tinyGamma)
	noEm := [][]float64{tinyEm[0], {0, 0, 0}, tinyEm[2]}
	for name, got := range map[string][]float64{
		"no transition":    forward(tinySizes, tinyEm, 0, tinyGamma),
		"no tempering":     forward(tinySizes, tinyEm, tinyEps, 1),
		"no size prior":    forward([]int{1, 1, 1}, tinyEm, tinyEps, tinyGamma),
		"middle emission":  forward(tinySizes, noEm, tinyEps, tinyGamma),
		"first refit only": forward(tinySizes, tinyEm[2:], tinyEps, tinyGamma),
	} {
		if d := maxDiff(got, want); d < 0.01 {
			t.Errorf("%s: state %v is within %.3g of the enumeration %v: the check cannot see this term", name, got, d, want)
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
// each refit equals the enumeration, and the move event, when it comes,
// carries P(left S1) = 1 - P(S1) of that state.
func TestFilterEvaluateMatchesEnumeration(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	cfg.Rule, cfg.SwitchRate, cfg.Temper, cfg.MoveProb, cfg.Confirm = RuleFilter, tinyEps, tinyGamma, 0.6, 1
	mem := Memory{}
	moved := false
	for step := range tinyEm {
		out := mustEvaluate(t, cfg, mem, tinyRefit(t, step))
		mem = out.Memory
		want := enumerate(tinySizes, tinyEm[:step+1], tinyEps, tinyGamma)
		got := []float64{mem.Filter["x"]["S1"], mem.Filter["x"]["S2"], mem.Filter["x"]["S3"]}
		if d := maxDiff(got, want); d > 1e-12 {
			t.Errorf("refit %d: memory %v, enumeration %v", step, got, want)
		}
		for _, e := range byKind(out.Events, KindMoved) {
			m := e.Data.(Moved)
			if m.Product != "x" {
				t.Errorf("refit %d: unexpected move %+v", step, m)
				continue
			}
			moved = true
			if m.Probability == nil || math.Abs(*m.Probability-(1-want[0])) > 1e-12 {
				t.Errorf("refit %d: move carries %v, want P(left S1) = %v", step, m.Probability, 1-want[0])
			}
			if m.To != "S3" {
				t.Errorf("refit %d: moved to %s, want S3 (most probable: %v)", step, m.To, want)
			}
		}
	}
	if !moved {
		t.Errorf("x never moved although P(S1) fell to %v", mem.Filter["x"]["S1"])
	}
}
