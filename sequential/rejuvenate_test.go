package sequential

import (
	"math"
	"testing"
)

// TestSettleRenewsOnlyBetweenRefits checks where Settle renews a used-up
// population: never after a large micro-batch (a refit in progress, whose
// end runs a waste-free step anyway), but after a small one (single
// changes between refits), where nothing else would.
func TestSettleRenewsOnlyBetweenRefits(t *testing.T) {
	t.Parallel()
	ps := exactParticles(t, exactPrior(), exactData(), 64, 3, 0)
	// One particle carries all the weight: Settle resamples, and the
	// share the resampling absorbs (1/P) leaves the population used up.
	collapse := func() {
		for p := range ps.logw {
			ps.logw[p] = 0
		}
		ps.logw[5] = 60
	}
	collapse()
	for s := range ps.slots {
		ps.markTouched(s) // every product changed: a large batch
	}
	before := ps.LastStep().Seq
	if !ps.Settle() {
		t.Fatal("Settle after a large batch at ESS 1 did not resample")
	}
	if got := ps.LastStep().Seq; got != before {
		t.Fatalf("Settle after a large batch ran a waste-free step (seq %d -> %d)", before, got)
	}
	if got := ps.movedShare(); !(got < ps.cfg.RenewBelow) {
		t.Fatalf("moved share after the collapse = %v, want below RenewBelow %v", got, ps.cfg.RenewBelow)
	}
	// The next settle ends a single change: the watch renews.
	ps.markTouched(0)
	ps.Settle()
	if got := ps.LastStep().Seq; got != before+1 {
		t.Fatalf("Settle after a single change left a used-up population (seq %d -> %d)", before, got)
	}
	if got := ps.movedShare(); math.Abs(got-1) > 1e-12 { // equal weights, nothing absorbed
		t.Errorf("moved share after the renewal = %v, want 1", got)
	}
}
