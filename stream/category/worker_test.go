package category

import (
	"fmt"
	"math/rand/v2"
	"testing"

	"rivalmix/alerts"
	"rivalmix/sequential/synth"
	"rivalmix/stream/input"
)

func decodeOrFail(t *testing.T, b []byte) input.Message {
	t.Helper()
	m, err := input.Decode(b, input.DefaultDecodeOptions())
	if err != nil {
		t.Fatalf("decode %s: %v", b, err)
	}
	return m
}

// TestWorkerAlternatingDatumDoesNotFlap runs the real update path (worker:
// particles, summaries, alerts) over eight refits in which one product's
// datum alternates between two nearby vectors that sit between the
// "niche" and "flagship" segments of the demo scenario (its largest
// membership swings between about 0.55 and 1), and requires that it is not
// reported as moving at every refit: the hysteresis band and the two-refit
// confirmation must hold it. The same run with the band removed (0.5/0.49,
// no confirmation) must flap, which shows the data do provoke moves.
func TestWorkerAlternatingDatumDoesNotFlap(t *testing.T) {
	t.Parallel()
	if n := alternatingMoves(t, false); n > 2 {
		t.Errorf("alternating product moved %d times over 8 refits; the hysteresis should hold it", n)
	}
	if n := alternatingMoves(t, true); n < 3 {
		t.Errorf("without the band the alternating product moved only %d times: the check has no power", n)
	}
}

func alternatingMoves(t *testing.T, noBand bool) int {
	cfg := synth.Scenario()
	cfg.Products = 60
	src := rand.New(rand.NewPCG(8, 9))
	seq := synth.NewSequence(cfg, 8, 0, src)
	wc := DefaultWorkerConfig()
	wc.Particles.Particles = 32
	wc.Particles.BuildChains, wc.Particles.BuildBurn = 4, 20
	if noBand {
		wc.Alerts.MoveIn, wc.Alerts.MoveOut, wc.Alerts.Confirm = 0.5, 0.49, 1
	}
	w, err := NewWorker("cereal", wc)
	if err != nil {
		t.Fatal(err)
	}
	flapper := []string{
		`{"product":"P-7777","refit":"%s","competitors":10,"relative":[0.25,0.12]}`,
		`{"product":"P-7777","refit":"%s","competitors":10,"relative":[0.22,0.15]}`,
	}
	moves := 0
	for r := 0; r < 8; r++ {
		refit := fmt.Sprintf("W%d", r)
		ps := seq.Refit(r)
		for i := range ps {
			if _, err := w.Apply(decodeOrFail(t, ps[i].MessageJSON(refit)), uint64(r*100+i)); err != nil {
				t.Fatal(err)
			}
		}
		if _, err := w.Apply(decodeOrFail(t, []byte(fmt.Sprintf(flapper[r%2], refit))), uint64(r*100+99)); err != nil {
			t.Fatal(err)
		}
		rep, err := w.CompleteRefit(refit)
		if err != nil {
			t.Fatal(err)
		}
		for _, ev := range rep.Events {
			if ev.Kind == alerts.KindMoved && ev.Subject == "P-7777" {
				moves++
			}
		}
	}
	t.Logf("band removed %v: alternating product moved %d times over 8 refits", noBand, moves)
	return moves
}

// TestWorkerRenewsOnlyAtRefitEnd checks that while a refit is open
// (messages name a refit other than the last completed one) the
// micro-batch settles never run a waste-free step, however small each
// batch is against the category, and that the refit's end runs one. The
// same redrawn data sent as corrections of the completed refit (the
// diversity watch on) do provoke renewals, which shows the check has
// power.
func TestWorkerRenewsOnlyAtRefitEnd(t *testing.T) {
	t.Parallel()
	cfg := synth.Scenario()
	cfg.Products = 60
	renewals := func(refit string) (inside, atEnd uint64) {
		seq := synth.NewSequence(cfg, 2, 0, rand.New(rand.NewPCG(21, 22)))
		wc := DefaultWorkerConfig()
		wc.Particles.Particles = 32
		wc.Particles.BuildChains, wc.Particles.BuildBurn = 4, 15
		wc.BatchSize = 4 // settles of 4 changes: small against 60 products
		// A watch that renews once the changes have left half the ESS, so
		// that a redraw of every product calls for renewals.
		wc.Particles.RenewBelow = 0.5
		w, err := NewWorker("cereal", wc)
		if err != nil {
			t.Fatal(err)
		}
		for i, p := range seq.Refit(0) {
			if _, err := w.Apply(decodeOrFail(t, p.MessageJSON("W0")), uint64(i+1)); err != nil {
				t.Fatal(err)
			}
		}
		if _, err := w.CompleteRefit("W0"); err != nil {
			t.Fatal(err)
		}
		before := w.Particles().LastStep().Seq
		for i, p := range seq.Refit(1) {
			if _, err := w.Apply(decodeOrFail(t, p.MessageJSON(refit)), uint64(100+i)); err != nil {
				t.Fatal(err)
			}
		}
		inside = w.Particles().LastStep().Seq - before
		if _, err := w.CompleteRefit(refit); err != nil {
			t.Fatal(err)
		}
		return inside, w.Particles().LastStep().Seq - before - inside
	}
	inside, atEnd := renewals("W1")
	if inside != 0 || atEnd != 1 {
		t.Errorf("open refit: %d waste-free steps inside, %d at its end; want 0 and 1", inside, atEnd)
	}
	if corr, _ := renewals("W0"); corr == 0 {
		t.Error("the same data as corrections of the completed refit renewed nothing: the check has no power")
	}
}
