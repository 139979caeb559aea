package category

import (
	"fmt"
	"math/rand/v2"
	"testing"

	"rivalmix/alerts"
	"rivalmix/sequential/synth"
)

// TestWorkerHistory runs four refits of a simulated category and checks
// the history: one point per refit in order, segment sizes that add up
// to the products, the refit's moved and missed events, memberships per
// product; a restart from the flushed state keeps every point but the
// memberships, and the view's moves and alerts come from it.
func TestWorkerHistory(t *testing.T) {
	t.Parallel()
	cfg := synth.Scenario()
	cfg.Products = 40
	seq := synth.NewSequence(cfg, 4, 0.3, rand.New(rand.NewPCG(3, 4)))
	wc := DefaultWorkerConfig()
	wc.Particles.Particles = 24
	wc.Particles.BuildChains, wc.Particles.BuildBurn = 4, 15
	w, err := NewWorker("cereal", wc)
	if err != nil {
		t.Fatal(err)
	}
	var last RefitReport
	moves, missed := 0, 0
	for r := 0; r < 4; r++ {
		refit := fmt.Sprintf("2026-W%02d", 40+r)
		ps := seq.Refit(r)
		for i := range ps {
			if _, err := w.Apply(decodeOrFail(t, ps[i].MessageJSON(refit)), uint64(r*100+i+1)); err != nil {
				t.Fatal(err)
			}
		}
		if last, err = w.CompleteRefit(refit); err != nil {
			t.Fatal(err)
		}
		for _, e := range last.Events {
			switch e.Kind {
			case alerts.KindMoved:
				moves++
			case alerts.KindMissed:
				missed++
			}
		}
	}
	h := w.History()
	if len(h) != 4 || len(last.History) != 4 {
		t.Fatalf("history has %d points (report %d), want 4", len(h), len(last.History))
	}
	gotMoves, gotMissed := 0, 0
	for r, pt := range h {
		if want := fmt.Sprintf("2026-W%02d", 40+r); pt.Refit != want {
			t.Errorf("point %d is refit %s, want %s", r, pt.Refit, want)
		}
		total := 0
		for _, n := range pt.Sizes {
			total += n
		}
		if total != pt.Products || pt.Products == 0 {
			t.Errorf("refit %s: sizes %v add up to %d, products %d", pt.Refit, pt.Sizes, total, pt.Products)
		}
		if len(pt.Membership) != pt.Products {
			t.Errorf("refit %s: memberships of %d products, want %d", pt.Refit, len(pt.Membership), pt.Products)
		}
		if !pt.ESS.Defined() || pt.ESS < 1 || pt.Distinct < 1 {
			t.Errorf("refit %s: ESS %v, distinct %d", pt.Refit, pt.ESS, pt.Distinct)
		}
		gotMoves += len(pt.Moves)
		gotMissed += len(pt.Missed)
	}
	if gotMoves != moves || gotMissed != missed {
		t.Errorf("history holds %d moves and %d missed, the events %d and %d", gotMoves, gotMissed, moves, missed)
	}
	if missed == 0 {
		t.Error("no missed-competitor event in four refits: the alert columns are not exercised")
	}
	v, err := NewView(last, w.Record)
	if err != nil {
		t.Fatal(err)
	}
	if len(v.Moves(0)) != moves || v.Posterior == nil || len(v.Posterior.Draws) == 0 {
		t.Errorf("view: %d moves of %d, posterior %v", len(v.Moves(0)), moves, v.Posterior != nil)
	}
	active := 0
	for _, m := range last.Alerts.Memory.Alert {
		if m.Active {
			active++
		}
	}
	if len(v.Alerts) != active {
		t.Errorf("view lists %d alerts, memory has %d active", len(v.Alerts), active)
	}
	for i := 1; i < len(v.Alerts); i++ {
		if CompareIDs(v.Alerts[i-1].Product, v.Alerts[i].Product) >= 0 {
			t.Errorf("alerts not in id order: %s, %s", v.Alerts[i-1].Product, v.Alerts[i].Product)
		}
	}

	ch, err := w.Flush()
	if err != nil {
		t.Fatal(err)
	}
	back, err := RestoreWorker("cereal", wc, ch.Snapshot, ch.AlertMemory, ch.Records)
	if err != nil {
		t.Fatal(err)
	}
	bh := back.History()
	if len(bh) != 4 {
		t.Fatalf("restored history has %d points", len(bh))
	}
	for r := range bh {
		if bh[r].Refit != h[r].Refit || len(bh[r].Sizes) != len(h[r].Sizes) || len(bh[r].Moves) != len(h[r].Moves) ||
			bh[r].Moved != len(h[r].Moves) || bh[r].ESS != h[r].ESS || bh[r].Distinct != h[r].Distinct {
			t.Errorf("restored point %d differs: %+v vs %+v", r, bh[r], h[r])
		}
		if bh[r].Membership != nil || bh[r].Missed != nil {
			t.Errorf("restored point %d has memberships or missed alerts; they are not saved", r)
		}
	}
}

// TestSavedHistory: the saved form keeps every point's counts but the
// moves of the latest points only, and leaves the worker's history alone.
func TestSavedHistory(t *testing.T) {
	t.Parallel()
	var h []RefitPoint
	for i := 0; i < savedMoveRefits+4; i++ {
		h = appendHistory(h, RefitPoint{Refit: fmt.Sprint(i), Moved: 1, Moves: []MoveView{{Product: "P-1"}}})
	}
	s := savedHistory(h)
	for i, pt := range s {
		if want := i >= len(s)-savedMoveRefits; (pt.Moves != nil) != want || pt.Moved != 1 {
			t.Errorf("saved point %d: %d moves kept, moved %d", i, len(pt.Moves), pt.Moved)
		}
	}
	if h[0].Moves == nil {
		t.Error("saving dropped the worker's own moves")
	}
}

func TestAppendHistoryLimit(t *testing.T) {
	t.Parallel()
	var h []RefitPoint
	for i := 0; i < HistoryLimit+5; i++ {
		h = appendHistory(h, RefitPoint{Refit: fmt.Sprint(i)})
	}
	if len(h) != HistoryLimit || h[0].Refit != "5" || h[len(h)-1].Refit != fmt.Sprint(HistoryLimit+4) {
		t.Errorf("history of %d points from %s to %s", len(h), h[0].Refit, h[len(h)-1].Refit)
	}
	// Memberships stay on the latest points only, and dropping them
	// leaves a reader's earlier copy alone.
	var m []RefitPoint
	for i := 0; i < membershipRefits+3; i++ {
		m = appendHistory(m, RefitPoint{Refit: fmt.Sprint(i), Membership: map[string]map[string]float32{"P-1": {"S1": 1}}})
		if i == membershipRefits-1 {
			h = m
		}
	}
	kept := 0
	for i, pt := range m {
		if pt.Membership != nil {
			kept++
			if i < len(m)-membershipRefits {
				t.Errorf("point %d of %d keeps its memberships", i, len(m))
			}
		}
	}
	if kept != membershipRefits || h[0].Membership == nil {
		t.Errorf("%d points keep memberships, want %d; earlier copy's first point has them: %v", kept, membershipRefits, h[0].Membership != nil)
	}
}
