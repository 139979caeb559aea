package alerts

import (
	"testing"
)

// watchRefit is a refit of five products in one segment with the given
// P(next > t) and E[(next - t)+].
func watchRefit(t *testing.T, refit string, p, excess []float64) Refit {
	t.Helper()
	prods := members("p", len(p), 0)
	for i := range prods {
		prods[i].p = p[i]
	}
	r := handRefit(t, refit, 1, prods)
	for i := range excess {
		r.Summary.Next[i].Excess = excess[i]
	}
	return r
}

func missedBy(out Outcome) map[string]Missed {
	m := map[string]Missed{}
	for _, e := range byKind(out.Events, KindMissed) {
		b := e.Data.(Missed)
		m[b.Product] = b
	}
	return m
}

// TestWatchlistRankStatus: alerts are ranked by expected excess, not by
// probability; the watchlist says new, still and cleared; the threshold
// rule decides who is alerted exactly as without ranking.
func TestWatchlistRankStatus(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	// pa: high probability, small excess; pb: lower probability, large
	// excess; pc: below AlertProb whatever its excess.
	out := mustEvaluate(t, cfg, Memory{}, watchRefit(t, "W1", []float64{0.9, 0.6, 0.3, 0.55, 0.1}, []float64{0.01, 0.2, 0.5, 0.05, 0}))
	got := missedBy(out)
	if len(got) != 3 || got["pa"].Rank != 3 || got["pb"].Rank != 1 || got["pd"].Rank != 2 {
		t.Fatalf("missed events %+v, want pb rank 1, pd rank 2, pa rank 3 (by excess) and no alert for pc (p 0.3)", got)
	}
	for _, b := range got {
		if b.Status != StatusNew {
			t.Errorf("%s: status %q, want new", b.Product, b.Status)
		}
	}
	want := []WatchItem{{Product: "pb", Rank: 1, Status: StatusNew}, {Product: "pd", Rank: 2, Status: StatusNew}, {Product: "pa", Rank: 3, Status: StatusNew}}
	checkWatch(t, "W1", out.Watchlist, want)

	// W2: pa rises (a repeat, still), pb stays (still, no event), pd falls
	// below AlertProb - RealertMargin (cleared).
	out2 := mustEvaluate(t, cfg, out.Memory, watchRefit(t, "W2", []float64{1.0, 0.6, 0.3, 0.3, 0.1}, []float64{0.02, 0.2, 0.5, 0.01, 0}))
	got = missedBy(out2)
	if len(got) != 1 || got["pa"].Status != StatusStill || got["pa"].Rank != 2 {
		t.Fatalf("W2 missed %+v, want only pa, status still, rank 2", got)
	}
	checkWatch(t, "W2", out2.Watchlist, []WatchItem{{Product: "pb", Rank: 1, Status: StatusStill}, {Product: "pa", Rank: 2, Status: StatusStill}, {Product: "pd", Status: StatusCleared}})
}

func checkWatch(t *testing.T, refit string, got, want []WatchItem) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: watchlist %+v, want %+v", refit, got, want)
	}
	for j := range want {
		if got[j].Product != want[j].Product || got[j].Rank != want[j].Rank || got[j].Status != want[j].Status {
			t.Errorf("%s: watchlist[%d] = %+v, want %+v", refit, j, got[j], want[j])
		}
	}
}

// TestAlertBudget: with a budget of 2 only the two alerts of largest
// excess are raised; when a third product overtakes one in force, that
// one is cleared as over budget; a share of 0.2 of five products caps at
// one. Without a budget the same refits alert every product meeting the
// threshold rule.
func TestAlertBudget(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	cfg.AlertBudget = 2
	p := []float64{0.9, 0.8, 0.7, 0.2, 0.1}
	out := mustEvaluate(t, cfg, Memory{}, watchRefit(t, "W1", p, []float64{0.3, 0.2, 0.1, 0, 0}))
	got := missedBy(out)
	if len(got) != 2 || got["pa"].Rank != 1 || got["pb"].Rank != 2 {
		t.Fatalf("budget 2: missed %+v, want pa and pb", got)
	}
	out2 := mustEvaluate(t, cfg, out.Memory, watchRefit(t, "W2", p, []float64{0.3, 0.2, 0.4, 0, 0}))
	got = missedBy(out2)
	if len(got) != 1 || got["pc"].Rank != 1 {
		t.Fatalf("budget 2, W2: missed %+v, want pc at rank 1", got)
	}
	cl := byKind(out2.Events, KindCleared)
	if len(cl) != 1 || cl[0].Data.(Cleared).Product != "pb" || !cl[0].Data.(Cleared).OverBudget {
		t.Fatalf("budget 2, W2: cleared %+v, want pb over budget", cl)
	}
	if out2.Summary.ActiveAlerts != 2 {
		t.Errorf("budget 2, W2: %d alerts in force, want 2", out2.Summary.ActiveAlerts)
	}

	share := DefaultConfig()
	share.AlertShare = 0.2
	if got := missedBy(mustEvaluate(t, share, Memory{}, watchRefit(t, "W1", p, []float64{0.3, 0.2, 0.1, 0, 0}))); len(got) != 1 || got["pa"].Rank != 1 {
		t.Errorf("share 0.2 of 5: missed %+v, want pa only", got)
	}
	if got := missedBy(mustEvaluate(t, DefaultConfig(), Memory{}, watchRefit(t, "W1", p, []float64{0.3, 0.2, 0.1, 0, 0}))); len(got) != 3 {
		t.Errorf("no budget: %d alerts, want 3 (every product with p >= 0.5)", len(got))
	}
}
