package alerts

import (
	"maps"
	"slices"
	"testing"
)

// concat joins groups of hand products.
func concat(groups ...[]hand) []hand { return slices.Concat(groups...) }

// subjects returns the subjects of the events of one kind.
func subjects(events []Event, kind Kind) []string {
	var out []string
	for _, e := range byKind(events, kind) {
		out = append(out, e.Subject)
	}
	return out
}

func TestIDsFirstRefitBornInSizeOrder(t *testing.T) {
	t.Parallel()
	r := handRefit(t, "W1", 3, concat(members("a", 4, 0), members("b", 3, 1), members("c", 2, 2)))
	out := mustEvaluate(t, DefaultConfig(), Memory{}, r)
	if got, want := out.SegmentIDs, []string{"S1", "S2", "S3"}; !slices.Equal(got, want) {
		t.Errorf("segment ids %v, want %v", got, want)
	}
	if got, want := subjects(out.Events, KindBorn), []string{"S1", "S2", "S3"}; !slices.Equal(got, want) {
		t.Errorf("born %v, want %v", got, want)
	}
	if out.Memory.Issued != 3 {
		t.Errorf("issued %d, want 3", out.Memory.Issued)
	}
	if n := len(byKind(out.Events, KindMoved)); n != 0 {
		t.Errorf("%d moves on the first refit, want 0 (new products take their segment directly)", n)
	}
	if !slices.Equal(out.Labels, out.Point) {
		t.Errorf("labels %v differ from point ids %v on the first refit", out.Labels, out.Point)
	}
	if out.Summary.ARI.Defined() {
		t.Errorf("ARI %v on the first refit, want absent", out.Summary.ARI)
	}
}

func TestIDsUnchangedAndRelabelled(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	first := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 3, concat(members("a", 4, 0), members("b", 3, 1), members("c", 2, 2))))

	same := mustEvaluate(t, cfg, first.Memory, handRefit(t, "W2", 3, concat(members("a", 4, 0), members("b", 3, 1), members("c", 2, 2))))
	// The summary numbers segments by size; here the indices are permuted
	// as if sizes had changed order.
	perm := mustEvaluate(t, cfg, same.Memory, handRefit(t, "W3", 3, concat(members("a", 4, 2), members("b", 3, 0), members("c", 2, 1))))
	for _, out := range []Outcome{same, perm} {
		if !maps.Equal(out.Memory.Point, first.Memory.Point) {
			t.Errorf("refit %s: point ids %v, want %v", out.Memory.Refit, out.Memory.Point, first.Memory.Point)
		}
		if len(out.Events) != 1 || out.Events[0].Kind != KindSummary {
			t.Errorf("refit %s: events %v, want only the summary", out.Memory.Refit, out.Events)
		}
		if out.Summary.ARI != 1 {
			t.Errorf("refit %s: ARI %v, want 1", out.Memory.Refit, out.Summary.ARI)
		}
		if out.Memory.Issued != 3 {
			t.Errorf("refit %s: issued %d, want 3", out.Memory.Refit, out.Memory.Issued)
		}
	}
	if got, want := perm.SegmentIDs, []string{"S2", "S3", "S1"}; !slices.Equal(got, want) {
		t.Errorf("permuted segment ids %v, want %v", got, want)
	}
}

// TestIDsBornRetiredNeverReused walks a category through a birth, a
// merge that retires a segment, and a later birth that must get a fresh id.
func TestIDsBornRetiredNeverReused(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	w1 := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 2, concat(members("a", 4, 0), members("b", 2, 1))))

	// New products g.. form a third segment: born S3.
	w2 := mustEvaluate(t, cfg, w1.Memory, handRefit(t, "W2", 3, concat(members("a", 4, 0), members("b", 2, 1), members("g", 2, 2))))
	if got := subjects(w2.Events, KindBorn); !slices.Equal(got, []string{"S3"}) {
		t.Errorf("W2 born %v, want [S3]", got)
	}
	if got := w2.Point[len(w2.Point)-1]; got != "S3" {
		t.Errorf("W2 new product in %s, want S3", got)
	}

	// Segment b joins a: S2 retires into S1, which is a merge of S1 and S2.
	w3 := mustEvaluate(t, cfg, w2.Memory, handRefit(t, "W3", 2, concat(members("a", 4, 0), members("b", 2, 0), members("g", 2, 1))))
	if got := subjects(w3.Events, KindRetired); !slices.Equal(got, []string{"S2"}) {
		t.Fatalf("W3 retired %v, want [S2]", got)
	}
	if ret := byKind(w3.Events, KindRetired)[0].Data.(Retired); ret.Successor != "S1" || ret.Size != 2 {
		t.Errorf("W3 retired %+v, want successor S1 and size 2", ret)
	}
	mg := byKind(w3.Events, KindMerged)
	if len(mg) != 1 {
		t.Fatalf("W3 merges %v, want one", mg)
	}
	if m := mg[0].Data.(Merged); m.Segment != "S1" || !slices.Equal(m.From, []string{"S1", "S2"}) || !slices.Equal(m.Shares, []float64{1, 1}) {
		t.Errorf("W3 merge %+v, want S1 from [S1 S2] with shares [1 1]", m)
	}
	// The b products were reported in S2, now retired: their membership
	// to it counts as 0 and their membership to S1 is 1, so they move.
	if got := subjects(w3.Events, KindMoved); !slices.Equal(got, []string{"ba", "bb"}) {
		t.Errorf("W3 moved %v, want [ba bb]", got)
	}
	for _, e := range byKind(w3.Events, KindMoved) {
		if m := e.Data.(Moved); m.From != "S2" || m.To != "S1" || !m.FromRetired || m.FromMembership != 0 {
			t.Errorf("W3 move %+v, want S2 (retired, membership 0) to S1", m)
		}
	}

	// b splits off again: a fresh id S4, never S2.
	w4 := mustEvaluate(t, cfg, w3.Memory, handRefit(t, "W4", 3, concat(members("a", 4, 0), members("b", 2, 1), members("g", 2, 2))))
	if got := subjects(w4.Events, KindBorn); !slices.Equal(got, []string{"S4"}) {
		t.Errorf("W4 born %v, want [S4]", got)
	}
	if w4.Memory.Issued != 4 {
		t.Errorf("W4 issued %d, want 4", w4.Memory.Issued)
	}
	// S1 sent 2 of 6 (1/3 >= 0.3) to S4 and kept 4: a split.
	sp := byKind(w4.Events, KindSplit)
	if len(sp) != 1 {
		t.Fatalf("W4 splits %v, want one", sp)
	}
	if s := sp[0].Data.(Split); s.Segment != "S1" || !slices.Equal(s.Into, []string{"S1", "S4"}) {
		t.Errorf("W4 split %+v, want S1 into [S1 S4]", s)
	}
}

// TestIDsZeroOverlapIsNoMatch: when every product is new, the Hungarian
// algorithm still pairs old and new segments, but with zero overlap; those
// pairs must count as unmatched.
func TestIDsZeroOverlapIsNoMatch(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	w1 := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 2, concat(members("a", 2, 0), members("b", 2, 1))))
	w2 := mustEvaluate(t, cfg, w1.Memory, handRefit(t, "W2", 2, concat(members("x", 2, 0), members("y", 2, 1))))
	if got := subjects(w2.Events, KindBorn); !slices.Equal(got, []string{"S3", "S4"}) {
		t.Errorf("born %v, want [S3 S4]", got)
	}
	if got := subjects(w2.Events, KindRetired); !slices.Equal(got, []string{"S1", "S2"}) {
		t.Errorf("retired %v, want [S1 S2]", got)
	}
	for _, e := range byKind(w2.Events, KindRetired) {
		if s := e.Data.(Retired).Successor; s != "" {
			t.Errorf("retired %s has successor %q, want none", e.Subject, s)
		}
	}
	if w2.Summary.ARI.Defined() {
		t.Errorf("ARI %v with no common product, want absent", w2.Summary.ARI)
	}
	if _, ok := w2.Memory.Point["aa"]; ok {
		t.Error("withdrawn product aa still in memory")
	}
}

// TestSplitMergeShares checks the 0.3 share rule at and around its edge
// on a ten-product segment.
func TestSplitMergeShares(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	w1 := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 2, concat(members("a", 10, 0), members("b", 10, 1))))
	cases := []struct {
		name   string
		prods  []hand
		k      int
		splits int
		merges int
	}{
		// a: 8 stay, 2 leave for a new segment (0.2 < 0.3): nothing.
		{"a 8/2", concat(members("a", 8, 0), members("b", 10, 1), []hand{{id: "ai", seg: 2}, {id: "aj", seg: 2}}), 3, 0, 0},
		// a: 7 stay, 3 leave (0.3): split.
		{"a 7/3", concat(members("a", 7, 0), members("b", 10, 1), []hand{{id: "ah", seg: 2}, {id: "ai", seg: 2}, {id: "aj", seg: 2}}), 3, 1, 0},
		// a: 3 join all of b (0.3 and 1): merge into b's segment (and a split of a).
		{"a 3 into b", concat(members("a", 7, 0), members("b", 10, 1), []hand{{id: "ah", seg: 1}, {id: "ai", seg: 1}, {id: "aj", seg: 1}}), 2, 1, 1},
		// a: 2 join b (0.2): nothing.
		{"a 2 into b", concat(members("a", 8, 0), members("b", 10, 1), []hand{{id: "ai", seg: 1}, {id: "aj", seg: 1}}), 2, 0, 0},
	}
	for _, tc := range cases {
		out := mustEvaluate(t, cfg, w1.Memory, handRefit(t, "W2", tc.k, tc.prods))
		sp, mg := byKind(out.Events, KindSplit), byKind(out.Events, KindMerged)
		if len(sp) != tc.splits || len(mg) != tc.merges {
			t.Errorf("%s: %d splits, %d merges, want %d, %d", tc.name, len(sp), len(mg), tc.splits, tc.merges)
		}
		if out.Summary.Splits != len(sp) || out.Summary.Merges != len(mg) {
			t.Errorf("%s: summary counts %d splits, %d merges; events %d, %d", tc.name, out.Summary.Splits, out.Summary.Merges, len(sp), len(mg))
		}
		// The large remainders keep their ids in every case.
		if out.Memory.Point["aa"] != "S1" || out.Memory.Point["ba"] != "S2" {
			t.Errorf("%s: aa in %s, ba in %s, want S1, S2", tc.name, out.Memory.Point["aa"], out.Memory.Point["ba"])
		}
	}
}
