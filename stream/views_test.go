package stream

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
	"sync"
	"testing"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/state"
)

// testReport is a hand-made refit of category "cereal" with five
// products in three point segments; two products still report the id of
// another segment (hysteresis), so the third point segment has no id of
// its own. The last product ("<i>E</i>", a legal product id) reported
// every candidate, so its next value is undefined.
func testReport() RefitReport {
	nan := math.NaN()
	products := []string{"A", "B", "C", "D", "<i>E</i>"}
	return RefitReport{
		Category: "cereal", Refit: "2026-W48", ESS: 180.5, MeanSurprise: 0.75, Changes: 5,
		Products: products,
		Labels:   []string{"S1", "S1", "S2", "S2", "S1"},
		Events:   []alerts.Event{{Kind: alerts.KindMoved}, {Kind: alerts.KindSummary}},
		Summary: sequential.Summary{
			Partition: []int{0, 0, 0, 1, 2},
			Membership: [][]float64{
				{0.9, 0.1, 0.0},
				{0.8, 0.2, 0.0},
				{0.7, 0.3, 0.0},
				{0.1, 1.0, 0.0},
				{0.2, 0.0, 1.0},
			},
			Segments: []sequential.SegmentSummary{
				{Members: []int{0, 1, 2}, Median: [3]float64{0.9, 0.5, 0.3}, MeanReported: 2.5},
				{Members: []int{3}, Median: [3]float64{0.5, nan, nan}, MeanReported: 1},
				{Members: []int{4}, Median: [3]float64{0.8, 0.4, nan}, MeanReported: 2},
			},
			Next: []sequential.NextSummary{
				{Defined: true, Threshold: 0.25, PExceed: 0.6, Median: 0.3, Lo: 0.1, Hi: 0.45},
				{Defined: true, Threshold: 0.25, PExceed: 0.1, Median: 0.1, Lo: 0.05, Hi: 0.2},
				{Defined: true, Threshold: 0.25, PExceed: 0.2, Median: 0.15, Lo: 0.05, Hi: 0.3},
				{Defined: true, Threshold: 0.25, PExceed: 0.3, Median: 0.2, Lo: 0.1, Hi: 0.3},
				{Defined: false, Threshold: 0.25, PExceed: 0, Median: nan, Lo: nan, Hi: nan},
			},
		},
	}
}

// testRecords knows every product of testReport but the last.
func testRecords(product string) (state.ProductRecord, bool) {
	if product == "<i>E</i>" {
		return state.ProductRecord{}, false
	}
	return state.ProductRecord{Product: product, Refit: "2026-W48", Competitors: 10,
		Relative: []float64{0.94, 0.52, 0.31}, IDs: []string{"X", "Y", "Z"},
		Dropped: []state.DroppedEntry{{ID: "W", Value: -0.1}}, AppliedSeq: 7}, true
}

func testViews() *Views {
	v := NewViews()
	v.Update(testReport(), testRecords)
	return v
}

func mustJSON(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatalf("json.Marshal: %v", err)
	}
	return string(b)
}

func TestViewsCategories(t *testing.T) {
	t.Parallel()
	v := testViews()
	v.Update(RefitReport{Category: "bakery", Refit: "2026-W47"}, nil) // an empty category
	got := mustJSON(t, v.Categories())
	want := `[{"name":"bakery","products":0,"segments":0,"last_refit":"2026-W47","ess":0,"changes":0,"mean_surprise":null,"events":0},` +
		`{"name":"cereal","products":5,"segments":3,"last_refit":"2026-W48","ess":180.5,"changes":5,"mean_surprise":0.75,"events":2}]`
	if got != want {
		t.Errorf("Categories JSON\n got %s\nwant %s", got, want)
	}
	segs, ok := v.Segments("bakery")
	if !ok || segs == nil || len(segs) != 0 {
		t.Errorf("Segments(bakery) = %v, %v; want an empty list", segs, ok)
	}
}

func TestViewsSegments(t *testing.T) {
	t.Parallel()
	v := testViews()
	segs, ok := v.Segments("cereal")
	if !ok {
		t.Fatal("Segments(cereal) not found")
	}
	got := mustJSON(t, segs)
	want := `[{"id":"S1","size":3,"medians":[0.9,0.5,0.3],"mean_reported":2.5,"members":["A","B","C"]},` +
		`{"id":"S2","size":1,"medians":[0.5,null,null],"mean_reported":1,"members":["D"]},` +
		`{"id":"point-3","size":1,"medians":[0.8,0.4,null],"mean_reported":2,"members":["\u003ci\u003eE\u003c/i\u003e"]}]`
	if got != want {
		t.Errorf("Segments JSON\n got %s\nwant %s", got, want)
	}
	// The result is a copy.
	segs[0].Members[0] = "changed"
	again, _ := v.Segments("cereal")
	if again[0].Members[0] != "A" {
		t.Error("changing a returned segment changed the view")
	}
	if _, ok := v.Segments("nope"); ok {
		t.Error("Segments(nope) found")
	}
	if _, err := v.ReadSegments("nope"); !errors.Is(err, ErrNotFound) {
		t.Errorf("ReadSegments(nope) = %v, want ErrNotFound", err)
	}
}

func TestViewsProduct(t *testing.T) {
	t.Parallel()
	v := testViews()
	p, ok := v.Product("cereal", "C")
	if !ok {
		t.Fatal("Product(cereal, C) not found")
	}
	got := mustJSON(t, p)
	want := `{"category":"cereal","product":"C","segment":"S2","point_segment":"S1",` +
		`"membership":{"S1":0.7,"S2":0.3,"point-3":0},` +
		`"next":{"defined":true,"threshold":0.25,"p_exceed":0.2,"median":0.15,"lo":0.05,"hi":0.3},` +
		`"last":{"refit":"2026-W48","competitors":10,"relative":[0.94,0.52,0.31],"ids":["X","Y","Z"],` +
		`"dropped":[{"id":"W","value":-0.1}],"seq":7}}`
	if got != want {
		t.Errorf("Product JSON\n got %s\nwant %s", got, want)
	}
	p.Membership["S1"] = 0
	p.Last.Relative[0] = 0
	again, _ := v.Product("cereal", "C")
	if again.Membership["S1"] != 0.7 || again.Last.Relative[0] != 0.94 {
		t.Error("changing a returned product changed the view")
	}

	e, ok := v.Product("cereal", "<i>E</i>")
	if !ok {
		t.Fatal("Product(cereal, E) not found")
	}
	got = mustJSON(t, e.Next)
	if want := `{"defined":false,"threshold":0.25,"p_exceed":0,"median":null,"lo":null,"hi":null}`; got != want {
		t.Errorf("undefined next value JSON %s, want %s", got, want)
	}
	if e.Last != nil || strings.Contains(mustJSON(t, e), `"last"`) {
		t.Error("a product without a record has a last datum")
	}
	for _, q := range [][2]string{{"cereal", "Z"}, {"nope", "A"}} {
		if _, ok := v.Product(q[0], q[1]); ok {
			t.Errorf("Product(%s, %s) found", q[0], q[1])
		}
		if _, err := v.ReadProduct(q[0], q[1]); !errors.Is(err, ErrNotFound) || !strings.Contains(err.Error(), q[0]) {
			t.Errorf("ReadProduct(%s, %s) = %v, want ErrNotFound naming the category", q[0], q[1], err)
		}
	}
}

func TestFloatJSON(t *testing.T) {
	t.Parallel()
	for _, tt := range []struct {
		f    float64
		want string
	}{{1.5, "1.5"}, {0, "0"}, {-2e-9, "-2e-9"}, {math.NaN(), "null"}, {math.Inf(1), "null"}, {math.Inf(-1), "null"}} {
		if got := mustJSON(t, Float(tt.f)); got != tt.want {
			t.Errorf("Float(%v) = %s, want %s", tt.f, got, tt.want)
		}
	}
	var f [2]Float
	if err := json.Unmarshal([]byte(`[null, 0.25]`), &f); err != nil {
		t.Fatal(err)
	}
	if !math.IsNaN(float64(f[0])) || f[1] != 0.25 {
		t.Errorf("decoded %v", f)
	}
	if err := json.Unmarshal([]byte(`"x"`), &f[0]); err == nil {
		t.Error("a string decoded as Float")
	}
}

// TestPointSegmentIDs checks the naming rule on its own: each id goes to
// one segment, the one most of whose members carry it.
func TestPointSegmentIDs(t *testing.T) {
	t.Parallel()
	seg := func(members ...int) sequential.SegmentSummary { return sequential.SegmentSummary{Members: members} }
	tests := []struct {
		name   string
		labels []string
		segs   []sequential.SegmentSummary
		want   []string
	}{
		{"agree", []string{"S2", "S2", "S1"}, []sequential.SegmentSummary{seg(0, 1), seg(2)}, []string{"S2", "S1"}},
		// A segment split off S1 while its members still report S1: the
		// larger part keeps S1.
		{"split lag", []string{"S1", "S1", "S1", "S1", "S1"}, []sequential.SegmentSummary{seg(0, 1, 2), seg(3, 4)},
			[]string{"S1", "point-2"}},
		// Equal carriers: the larger segment first.
		{"tie", []string{"S3", "S3", "S4", "S3"}, []sequential.SegmentSummary{seg(0, 2), seg(1), seg(3)},
			[]string{"S3", "point-2", "point-3"}},
		{"second choice", []string{"S1", "S1", "S2", "S1", "S2"}, []sequential.SegmentSummary{seg(0, 1, 2), seg(3, 4)},
			[]string{"S1", "S2"}},
		{"empty", nil, nil, []string{}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			t.Parallel()
			rep := RefitReport{Labels: tt.labels, Summary: sequential.Summary{Segments: tt.segs}}
			if got := pointSegmentIDs(rep); !slices.Equal(got, tt.want) {
				t.Errorf("pointSegmentIDs = %v, want %v", got, tt.want)
			}
		})
	}
}

func TestViewsConcurrent(t *testing.T) {
	t.Parallel()
	v := testViews()
	var wg sync.WaitGroup
	for r := range 4 {
		wg.Go(func() {
			for i := range 200 {
				if r == 0 {
					rep := testReport()
					rep.Refit = fmt.Sprintf("2026-W%02d", i%52+1)
					v.Update(rep, testRecords)
					continue
				}
				_ = v.Categories()
				if segs, ok := v.Segments("cereal"); !ok || len(segs) != 3 {
					t.Errorf("Segments during updates: %d, %v", len(segs), ok)
					return
				}
				if _, err := v.ReadProduct("cereal", "A"); err != nil {
					t.Errorf("ReadProduct during updates: %v", err)
					return
				}
			}
		})
	}
	wg.Wait()
}

// TestPointSegmentIDsFromAlerts: the ids alerts.Evaluate assigned win
// over the reported labels.
func TestPointSegmentIDsFromAlerts(t *testing.T) {
	t.Parallel()
	rep := testReport()
	rep.Alerts.SegmentIDs = []string{"S1", "S2", "S5"}
	v := NewViews()
	v.Update(rep, testRecords)
	segs, _ := v.Segments("cereal")
	if got := []string{segs[0].ID, segs[1].ID, segs[2].ID}; !slices.Equal(got, rep.Alerts.SegmentIDs) {
		t.Errorf("segment ids %v, want %v", got, rep.Alerts.SegmentIDs)
	}
	p, _ := v.Product("cereal", "<i>E</i>")
	if p.Segment != "S1" || p.PointSegment != "S5" || p.Membership["S5"] != 1 {
		t.Errorf("product E: segment %s, point %s, membership %v", p.Segment, p.PointSegment, p.Membership)
	}
	// Ids that do not fit the summary fall back to the labels.
	rep.Alerts.SegmentIDs = []string{"S1"}
	if got := pointSegmentIDs(rep); !slices.Equal(got, []string{"S1", "S2", "point-3"}) {
		t.Errorf("mismatched ids: pointSegmentIDs = %v", got)
	}
}
