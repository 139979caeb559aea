package alerts

import (
	"fmt"
	"slices"
	"testing"
)

// TestMissedCompetitorSequence follows one product's P(next > 0.25)
// through a run of refits with the default q = 0.5 and margin 0.1.
func TestMissedCompetitorSequence(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	steps := []struct {
		p    float64
		all  bool // every candidate reported
		want Kind // "" for no event
		why  string
	}{
		{0.30, false, "", "below q"},
		{0.55, false, KindMissed, "first crossing"},
		{0.55, false, "", "same probability: no repeat"},
		{0.60, false, "", "rose 0.05 < margin"},
		{0.66, false, KindMissed, "rose 0.11 >= margin since the last alert"},
		{0.45, false, "", "below q but not below q - margin"},
		{0.35, false, KindCleared, "below q - margin"},
		{0.35, false, "", "still clear: no repeat"},
		{0.45, false, "", "back up but below q"},
		{0.50, false, KindMissed, "verdict changed"},
		{0, true, KindCleared, "every candidate reported: no next value"},
		{0, true, "", "no next value and no alert"},
	}
	mem := Memory{}
	for w, s := range steps {
		refit := fmt.Sprintf("W%d", w)
		r := handRefit(t, refit, 2, concat(members("a", 3, 0), members("b", 3, 1), []hand{{id: "x", seg: 1, p: s.p, all: s.all}}))
		out := mustEvaluate(t, cfg, mem, r)
		var got []Event
		for _, e := range out.Events {
			if e.Subject == "x" && (e.Kind == KindMissed || e.Kind == KindCleared) {
				got = append(got, e)
			}
		}
		var kinds []Kind
		for _, e := range got {
			kinds = append(kinds, e.Kind)
		}
		var want []Kind
		if s.want != "" {
			want = []Kind{s.want}
		}
		if !slices.Equal(kinds, want) {
			t.Fatalf("%s (p = %v, %s): events %v, want %v", refit, s.p, s.why, kinds, want)
		}
		if n := len(byKind(out.Events, KindMissed)) + len(byKind(out.Events, KindCleared)); n != len(got) {
			t.Errorf("%s: %d alert events for other products (all have p = 0)", refit, n-len(got))
		}
		if out.Summary.Alerts != len(byKind(out.Events, KindMissed)) || out.Summary.Clears != len(byKind(out.Events, KindCleared)) {
			t.Errorf("%s: summary counts %d alerts, %d clears", refit, out.Summary.Alerts, out.Summary.Clears)
		}
		for _, e := range got {
			switch d := e.Data.(type) {
			case Missed:
				checkMissed(t, refit, d, s.p, w)
			case Cleared:
				if d.Probability != s.p || d.NoNextValue != s.all || d.Segment != "S2" {
					t.Errorf("%s: cleared %+v, want probability %v, no next value %v, segment S2", refit, d, s.p, s.all)
				}
			}
		}
		mem = out.Memory
	}
}

func checkMissed(t *testing.T, refit string, d Missed, p float64, w int) {
	t.Helper()
	if d.Probability != p || d.Threshold != 0.25 || d.Product != "x" || d.Segment != "S2" || d.Refit != refit {
		t.Errorf("%s: missed %+v, want probability %v at threshold 0.25 for x in S2", refit, d, p)
	}
	if d.Median != 0.24 || d.Lo != 0.12 || d.Hi != 0.36 {
		t.Errorf("%s: next value median %v in [%v, %v], want 0.24 in [0.12, 0.36]", refit, d.Median, d.Lo, d.Hi)
	}
	if !slices.Equal(d.Reported, []float64{0.9, 0.4}) || d.Competitors != 10 {
		t.Errorf("%s: reported %v of %d, want [0.9 0.4] of 10", refit, d.Reported, d.Competitors)
	}
	// handRefit gives segment c MeanReported 3 + c; x is in segment 1.
	if d.TypicalReported != 4 {
		t.Errorf("%s: typical reported %v, want 4", refit, d.TypicalReported)
	}
	// The repeat at W4 names the alert it supersedes.
	switch {
	case w == 4 && (d.Previous == nil || *d.Previous != 0.55):
		t.Errorf("%s: previous %v, want 0.55", refit, d.Previous)
	case w != 4 && d.Previous != nil:
		t.Errorf("%s: previous %v on a first alert, want absent", refit, *d.Previous)
	}
}

// TestMissedForgetsWithdrawn: a withdrawn product's alert memory goes
// with it, so if it comes back it is alerted afresh.
func TestMissedForgetsWithdrawn(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	with := func(refit string, p float64) Refit {
		return handRefit(t, refit, 1, concat(members("a", 3, 0), []hand{{id: "x", seg: 0, p: p}}))
	}
	w1 := mustEvaluate(t, cfg, Memory{}, with("W1", 0.7))
	if _, ok := w1.Memory.Alert["x"]; !ok {
		t.Fatal("no alert memory after an alert")
	}
	w2 := mustEvaluate(t, cfg, w1.Memory, handRefit(t, "W2", 1, members("a", 3, 0)))
	if _, ok := w2.Memory.Alert["x"]; ok {
		t.Error("alert memory kept for a withdrawn product")
	}
	w3 := mustEvaluate(t, cfg, w2.Memory, with("W3", 0.7))
	if n := len(byKind(w3.Events, KindMissed)); n != 1 {
		t.Errorf("%d alerts for the returning product, want 1", n)
	}
}
