package category

import (
	"encoding/json"
	"fmt"
	"maps"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"

	"rivalmix/alerts"
	"rivalmix/sequential/synth"
	"rivalmix/state"
)

// filterRun feeds refits from..to-1 of a simulated sequence to w and
// returns each refit's events as JSON lines; records collects the product
// records of every Flush (after each refit).
func filterRun(t *testing.T, w *Worker, seq [][]synth.Product, from, to int, records map[string]state.ProductRecord) ([]string, Changes) {
	t.Helper()
	var out []string
	var last Changes
	for r := from; r < to; r++ {
		refit := fmt.Sprintf("W%d", r)
		for i := range seq[r] {
			if _, err := w.Apply(decodeOrFail(t, seq[r][i].MessageJSON(refit)), uint64(r*1000+i)); err != nil {
				t.Fatal(err)
			}
		}
		rep, err := w.CompleteRefit(refit)
		if err != nil {
			t.Fatal(err)
		}
		for _, ev := range rep.Events {
			b, err := json.Marshal(ev.Data)
			if err != nil {
				t.Fatal(err)
			}
			out = append(out, ev.ID+" "+string(b))
		}
		if last, err = w.Flush(); err != nil {
			t.Fatal(err)
		}
		for _, rec := range last.Records {
			records[rec.Product] = rec
		}
	}
	return out, last
}

// TestWorkerFilterStateSurvivesRestore runs the switch filter (move rule
// filter) through the worker over six refits with 10% of the products
// switching at the fourth: a second run gives the same events byte for
// byte, and a worker restored from the committed state after the third
// refit (snapshot, alert memory with the filter's state, records)
// continues with exactly the events of the uninterrupted run.
func TestWorkerFilterStateSurvivesRestore(t *testing.T) {
	t.Parallel()
	cfg := synth.Scenario()
	cfg.Products = 60
	src := rand.New(rand.NewPCG(4, 5))
	seq := synth.NewSequence(cfg, 6, 0.1, src)
	var refits [][]synth.Product
	for r := 0; r < 6; r++ {
		ps := seq.Refit(r)
		cp := make([]synth.Product, len(ps))
		copy(cp, ps)
		refits = append(refits, cp)
	}
	wc := DefaultWorkerConfig()
	wc.Particles.Particles = 32
	wc.Particles.BuildChains, wc.Particles.BuildBurn = 4, 20
	wc.Alerts.Rule = alerts.RuleFilter
	newW := func() *Worker {
		w, err := NewWorker("cereal", wc)
		if err != nil {
			t.Fatal(err)
		}
		return w
	}
	whole, _ := filterRun(t, newW(), refits, 0, 6, map[string]state.ProductRecord{})
	again, _ := filterRun(t, newW(), refits, 0, 6, map[string]state.ProductRecord{})
	if !slices.Equal(whole, again) {
		t.Fatal("two runs of the same refits gave different events")
	}
	moves := 0
	for _, l := range whole {
		var m alerts.Moved
		if json.Unmarshal([]byte(l[33:]), &m) == nil && m.Probability != nil {
			moves++
		}
	}
	if moves == 0 {
		t.Fatal("the filter moved no product: the run does not exercise its state")
	}

	records := map[string]state.ProductRecord{}
	first, ch := filterRun(t, newW(), refits, 0, 3, records)
	var wm workerMemory
	if err := json.Unmarshal(ch.AlertMemory, &wm); err != nil || len(wm.Alerts.Filter) != cfg.Products {
		t.Fatalf("committed alert memory holds the filter state of %d products (err %v), want %d", len(wm.Alerts.Filter), err, cfg.Products)
	}
	recs := make([]state.ProductRecord, 0, len(records))
	for _, id := range slices.Sorted(maps.Keys(records)) {
		recs = append(recs, records[id])
	}
	w2, err := RestoreWorker("cereal", wc, ch.Snapshot, ch.AlertMemory, recs)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(w2.mem.Filter, wm.Alerts.Filter) {
		t.Fatal("restored worker's filter state differs from the committed one")
	}
	rest, _ := filterRun(t, w2, refits, 3, 6, records)
	if got := append(first, rest...); !slices.Equal(got, whole) {
		t.Errorf("restored run differs from the uninterrupted one (%d vs %d events)", len(got), len(whole))
	}
}
