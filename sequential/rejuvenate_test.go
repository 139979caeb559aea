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
	// A single change inside an open refit: no renewal either.
	ps.markTouched(1)
	ps.SettleInRefit()
	if got := ps.LastStep().Seq; got != before {
		t.Fatalf("SettleInRefit after a single change ran a waste-free step (seq %d -> %d)", before, got)
	}
	// The next settle ends a single change between refits: the watch renews.
	ps.markTouched(0)
	ps.Settle()
	if got := ps.LastStep().Seq; got != before+1 {
		t.Fatalf("Settle after a single change left a used-up population (seq %d -> %d)", before, got)
	}
	if got := ps.movedShare(); math.Abs(got-1) > 1e-12 { // equal weights, nothing absorbed
		t.Errorf("moved share after the renewal = %v, want 1", got)
	}
}

// TestDiversityWatchAfterResampling checks the diversity watch alone
// (RenewBelow 0 disables the other trigger): a single change whose settle
// follows a resampling that left few distinct partitions runs a
// waste-free step, and a settle with no resampling since the last one
// does not count states at all, since only resampling makes copies.
func TestDiversityWatchAfterResampling(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		name     string
		floor    float64
		collapse bool
		renew    bool
	}{
		{"resampled below the floor", 0.9, true, true},
		{"resampled, watch off", 0, true, false},
		{"no resampling", 0.9, false, false},
	} {
		ps := exactParticles(t, exactPrior(), exactData(), 64, 5, 0)
		ps.cfg.RenewBelow = 0
		ps.cfg.DiversityFloor = tc.floor
		if tc.collapse {
			for p := range ps.logw {
				ps.logw[p] = 0
			}
			ps.logw[9] = 60 // one particle holds the weight: Settle resamples
		}
		if d := ps.DistinctStates(); !(float64(d) < 0.9*64) && !tc.collapse {
			t.Fatalf("%s: %d distinct states of 5 products in 64 particles; the case needs fewer than the floor", tc.name, d)
		}
		before := ps.LastStep().Seq
		ps.markTouched(0)
		ps.Settle()
		if got := ps.LastStep().Seq - before; got != map[bool]uint64{true: 1, false: 0}[tc.renew] {
			t.Errorf("%s: %d waste-free steps, want renewal %v", tc.name, got, tc.renew)
		}
	}
}

// TestDistinctStatesCountsPartitions compares DistinctStates with a count
// of canonical label strings (each draw's labels renamed by first
// appearance) over the exported draws, on a population right after a
// build (many states) and after a resampling onto one particle (one
// partition, whatever the kernels).
func TestDistinctStatesCountsPartitions(t *testing.T) {
	t.Parallel()
	ps := exactParticles(t, exactPrior(), exactData(), 64, 11, 0)
	brute := func() int {
		seen := map[string]bool{}
		for _, d := range ps.Draws() {
			names := map[uint16]int{}
			key := ""
			for _, l := range d.Labels {
				if _, ok := names[l]; !ok {
					names[l] = len(names)
				}
				key += string(rune('a' + names[l]))
			}
			seen[key] = true
		}
		return len(seen)
	}
	if got, want := ps.DistinctStates(), brute(); got != want || want < 2 {
		t.Fatalf("after the build: DistinctStates %d, canonical labels %d (want equal and at least 2)", got, want)
	}
	for p := range ps.logw {
		ps.logw[p] = 0
	}
	ps.logw[3] = 80
	ps.resample()
	if got := ps.DistinctStates(); got != 1 || brute() != 1 {
		t.Fatalf("after resampling onto one particle: DistinctStates %d, canonical labels %d, want 1", got, brute())
	}
}
