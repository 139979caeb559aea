package alerts

import (
	"fmt"
	"testing"
)

// flapper builds a refit of two five-product segments plus product "x",
// which sits in point segment seg with membership row mem.
func flapper(t *testing.T, refit string, seg int, mem []float64) Refit {
	t.Helper()
	return handRefit(t, refit, 2, concat(members("a", 5, 0), members("b", 5, 1), []hand{{id: "x", seg: seg, mem: mem}}))
}

// mover feeds flapper refits to Evaluate and collects x's moves.
type mover struct {
	t     *testing.T
	cfg   Config
	mem   Memory
	w     int
	moves []Moved
}

// step evaluates one refit with x in segment seg and returns x's label.
func (m *mover) step(seg int, row []float64) string {
	m.t.Helper()
	refit := fmt.Sprintf("W%d", m.w)
	m.w++
	out := mustEvaluate(m.t, m.cfg, m.mem, flapper(m.t, refit, seg, row))
	moved := byKind(out.Events, KindMoved)
	for _, e := range moved {
		m.moves = append(m.moves, e.Data.(Moved))
	}
	if out.Summary.Moves != len(moved) {
		m.t.Errorf("%s: summary counts %d moves, events %d", refit, out.Summary.Moves, len(moved))
	}
	m.mem = out.Memory
	return out.Labels[len(out.Labels)-1]
}

// TestHysteresisNoFlap: x's posterior alternates between the segments
// with memberships 0.55 and 0.45, so its point segment flips every refit,
// yet its reported segment never changes. When it then crosses 0.6 / 0.4
// (for Confirm refits) it moves once, and later wobbles do not move it
// back. Run with Confirm = 1 (the bare band) and the default 2.
func TestHysteresisNoFlap(t *testing.T) {
	t.Parallel()
	for _, confirm := range []int{1, 2} {
		cfg := DefaultConfig()
		cfg.Confirm = confirm
		m := &mover{t: t, cfg: cfg}
		m.step(0, []float64{0.55, 0.45})
		for w := 1; w <= 10; w++ {
			seg, row := w%2, []float64{0.55, 0.45}
			if seg == 1 {
				row = []float64{0.45, 0.55}
			}
			if got := m.step(seg, row); got != "S1" {
				t.Fatalf("confirm %d, W%d: x reported in %s, want S1 (membership %v)", confirm, w, got, row)
			}
		}
		if len(m.moves) != 0 {
			t.Fatalf("confirm %d: flapping product moved: %+v", confirm, m.moves)
		}

		// In >= MoveIn but still too attached to the old segment, or out
		// <= MoveOut but not attached enough to the new one: no move
		// however long it lasts.
		for i := 0; i < 3; i++ {
			m.step(1, []float64{0.45, 0.7})
			m.step(1, []float64{0.3, 0.58})
		}
		if len(m.moves) != 0 {
			t.Fatalf("confirm %d: moved with one threshold unmet: %+v", confirm, m.moves)
		}
		// Both crossed for Confirm refits: one move, at the last of them.
		for i := 0; i < confirm; i++ {
			m.step(1, []float64{0.35, 0.65})
		}
		if len(m.moves) != 1 {
			t.Fatalf("confirm %d: %d moves after crossing 0.6/0.4, want 1", confirm, len(m.moves))
		}
		want := Moved{Category: "breakfast-cereal", Refit: fmt.Sprintf("W%d", m.w-1), Product: "x",
			From: "S1", To: "S2", FromMembership: 0.35, ToMembership: 0.65}
		if m.moves[0] != want {
			t.Errorf("confirm %d: move %+v, want %+v", confirm, m.moves[0], want)
		}
		// Staying put, then wobbling back to 0.55 in S1: no further move.
		m.step(1, []float64{0.2, 0.8})
		m.step(0, []float64{0.55, 0.45})
		m.step(1, []float64{0.45, 0.55})
		if len(m.moves) != 1 {
			t.Errorf("confirm %d: %d moves in all, want exactly 1: %+v", confirm, len(m.moves), m.moves)
		}
		// The thresholds are inclusive: 0.6 and 0.4 exactly move it back.
		for i := 0; i < confirm; i++ {
			m.step(0, []float64{0.6, 0.4})
		}
		if len(m.moves) != 2 || m.moves[1].To != "S1" {
			t.Errorf("confirm %d: moves %+v, want a move back to S1 at 0.6/0.4", confirm, m.moves)
		}
	}
}

// TestConfirmFiltersBlips: one refit whose fresh datum looks confidently
// like the other segment moves x there and back with Confirm = 1, and not
// at all with Confirm = 2; the crossing must hold in consecutive refits.
func TestConfirmFiltersBlips(t *testing.T) {
	t.Parallel()
	home, away := []float64{0.95, 0.02}, []float64{0.03, 0.97}
	for _, tc := range []struct {
		confirm int
		moves   int
	}{{1, 4}, {2, 0}} {
		cfg := DefaultConfig()
		cfg.Confirm = tc.confirm
		m := &mover{t: t, cfg: cfg}
		m.step(0, home)
		m.step(0, home) // x's label is established from here on
		m.step(1, away)
		m.step(0, home)
		m.step(1, away)
		m.step(0, home)
		if len(m.moves) != tc.moves {
			t.Errorf("confirm %d: %d moves for two one-refit blips, want %d", tc.confirm, len(m.moves), tc.moves)
		}
		if _, ok := m.mem.Pending["x"]; ok {
			t.Errorf("confirm %d: x still pending after returning home", tc.confirm)
		}
		// Two refits away in a row: one move with either setting.
		m.step(1, away)
		if label := m.step(1, away); label != "S2" {
			t.Errorf("confirm %d: x in %s after two refits away, want S2", tc.confirm, label)
		}
	}
}

// TestProvisionalLabels: with Confirm = 2 a new product whose first datum
// put it in the wrong segment is relabelled without a moved event, and
// its label is established once it has stood for two refits; with
// Confirm = 1 the same correction is a move.
func TestProvisionalLabels(t *testing.T) {
	t.Parallel()
	home, away := []float64{0.96, 0.01}, []float64{0.02, 0.97}
	for _, confirm := range []int{1, 2} {
		cfg := DefaultConfig()
		cfg.Confirm = confirm
		m := &mover{t: t, cfg: cfg}
		provisional := func() bool { _, ok := m.mem.Provisional["x"]; return ok }

		// x arrives looking like segment 1 (S2), then shows its home.
		if got := m.step(1, away); got != "S2" || provisional() != (confirm > 1) {
			t.Fatalf("confirm %d: new x labelled %s, provisional %v", confirm, got, provisional())
		}
		if got := m.step(0, home); got != "S1" {
			t.Fatalf("confirm %d: x labelled %s after its home datum, want S1", confirm, got)
		}
		wantMoves := 0
		if confirm == 1 {
			wantMoves = 1
		}
		if len(m.moves) != wantMoves {
			t.Errorf("confirm %d: %d moves for the correction of a new product, want %d", confirm, len(m.moves), wantMoves)
		}
		// The relabel restarted the count: still provisional for one
		// more refit with Confirm = 2, then established.
		if provisional() != (confirm > 1) {
			t.Errorf("confirm %d: provisional %v after the relabel", confirm, provisional())
		}
		out := mustEvaluate(t, cfg, m.mem, flapper(t, "W-late", 0, home))
		m.mem = out.Memory
		if provisional() || out.Provisional[len(out.Provisional)-1] || out.Summary.Provisional != 0 {
			t.Errorf("confirm %d: x still provisional after its label stood %d refits", confirm, confirm)
		}
		// From now on a blip is held back by the move rule.
		m.step(1, away)
		if got := m.step(0, home); got != "S1" || len(m.moves) != wantMoves+2*(2-confirm) {
			t.Errorf("confirm %d: after a blip x in %s with %d moves", confirm, got, len(m.moves))
		}
	}
}
