package category

import (
	"encoding/json"
	"math"
	"strings"
	"testing"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/state"
)

// testReport is a hand-made refit of category "cereal" with five
// products in three point segments, named S1, S2 and S5 by alerts; two
// products still report the id of another segment (hysteresis). The last
// product ("<i>E</i>", a legal product id) reported every candidate, so
// its next value is undefined.
func testReport() RefitReport {
	nan := math.NaN()
	products := []string{"A", "B", "C", "D", "<i>E</i>"}
	return RefitReport{
		Category: "cereal", Refit: "2026-W48", ESS: 180.5, MeanSurprise: 0.75, Changes: 5,
		Products: products,
		Labels:   []string{"S1", "S1", "S2", "S2", "S1"},
		Events:   []alerts.Event{{Kind: alerts.KindMoved}, {Kind: alerts.KindSummary}},
		Alerts:   alerts.Outcome{SegmentIDs: []string{"S1", "S2", "S5"}},
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

func mustJSON(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatalf("json.Marshal: %v", err)
	}
	return string(b)
}

func TestNewView(t *testing.T) {
	t.Parallel()
	v, err := NewView(testReport(), testRecords)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		got  any
		want string
	}{
		{"info", v.Info, `{"name":"cereal","products":5,"segments":3,"last_refit":"2026-W48","ess":180.5,"changes":5,"mean_surprise":0.75,"events":2}`},
		{"segments", v.Segments, `[{"id":"S1","size":3,"medians":[0.9,0.5,0.3],"mean_reported":2.5,"members":["A","B","C"]},` +
			`{"id":"S2","size":1,"medians":[0.5,null,null],"mean_reported":1,"members":["D"]},` +
			`{"id":"S5","size":1,"medians":[0.8,0.4,null],"mean_reported":2,"members":["\u003ci\u003eE\u003c/i\u003e"]}]`},
		{"product", v.Products["C"], `{"category":"cereal","product":"C","segment":"S2","point_segment":"S1",` +
			`"membership":{"S1":0.7,"S2":0.3,"S5":0},` +
			`"next":{"defined":true,"threshold":0.25,"p_exceed":0.2,"median":0.15,"lo":0.05,"hi":0.3},` +
			`"last":{"refit":"2026-W48","competitors":10,"relative":[0.94,0.52,0.31],"ids":["X","Y","Z"],` +
			`"dropped":[{"id":"W","value":-0.1}],"seq":7}}`},
		{"undefined next value", v.Products["<i>E</i>"].Next, `{"defined":false,"threshold":0.25,"p_exceed":0,"median":null,"lo":null,"hi":null}`},
	} {
		if got := mustJSON(t, tc.got); got != tc.want {
			t.Errorf("%s JSON\n got %s\nwant %s", tc.name, got, tc.want)
		}
	}
	e := v.Products["<i>E</i>"]
	if e.Segment != "S1" || e.PointSegment != "S5" || e.Last != nil || strings.Contains(mustJSON(t, e), `"last"`) {
		t.Errorf("product E: segment %s, point %s, last %v", e.Segment, e.PointSegment, e.Last)
	}

	empty, err := NewView(RefitReport{Category: "bakery", Refit: "2026-W47"}, nil)
	if err != nil {
		t.Fatal(err)
	}
	if got, want := mustJSON(t, empty.Info), `{"name":"bakery","products":0,"segments":0,"last_refit":"2026-W47","ess":0,"changes":0,"mean_surprise":null,"events":0}`; got != want {
		t.Errorf("empty category\n got %s\nwant %s", got, want)
	}
}

// TestNewViewNeedsAlertIDs: segments are named by alerts only; a report
// whose ids do not fit its point segments is refused rather than named
// another way.
func TestNewViewNeedsAlertIDs(t *testing.T) {
	t.Parallel()
	for _, ids := range [][]string{nil, {"S1", "S2"}, {"S1", "", "S3"}} {
		rep := testReport()
		rep.Alerts.SegmentIDs = ids
		if _, err := NewView(rep, testRecords); err == nil || !strings.Contains(err.Error(), "segment ids") {
			t.Errorf("ids %q: err = %v, want a refusal", ids, err)
		}
	}
}

// TestNewViewMembersInReadingOrder: members are listed as a person reads
// ids (P-2 before P-10), not in byte order.
func TestNewViewMembersInReadingOrder(t *testing.T) {
	t.Parallel()
	rep := testReport()
	rep.Products = []string{"P-10", "P-2", "P-1", "D", "<i>E</i>"}
	v, err := NewView(rep, testRecords)
	if err != nil {
		t.Fatal(err)
	}
	got := strings.Join(v.Segments[0].Members, " ")
	if got != "P-1 P-2 P-10" {
		t.Errorf("members of the largest segment: %s, want P-1 P-2 P-10", got)
	}
}
