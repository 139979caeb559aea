package read

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strings"
	"sync"
	"testing"

	"rivalmix/alerts"
	"rivalmix/stream/category"
)

// testView is what category.NewView makes of a small refit of "cereal":
// three segments; product "<i>E</i>" (a legal product id) has no next
// value and no stored record.
func testView() category.View {
	nan := alerts.Float(math.NaN())
	v := category.View{
		Info: category.CategoryView{Name: "cereal", Products: 5, Segments: 3, LastRefit: "2026-W48",
			ESS: 180.5, Changes: 5, MeanSurprise: 0.75, Events: 2},
		Segments: []category.SegmentView{
			{ID: "S1", Size: 3, Medians: [3]alerts.Float{0.9, 0.5, 0.3}, MeanReported: 2.5, Members: []string{"A", "B", "C"}},
			{ID: "S2", Size: 1, Medians: [3]alerts.Float{0.5, nan, nan}, MeanReported: 1, Members: []string{"D"}},
			{ID: "S5", Size: 1, Medians: [3]alerts.Float{0.8, 0.4, nan}, MeanReported: 2, Members: []string{"<i>E</i>"}},
		},
		Products: map[string]category.ProductView{},
	}
	for _, p := range []string{"A", "B", "C", "D"} {
		v.Products[p] = category.ProductView{Category: "cereal", Product: p, Segment: "S1", PointSegment: "S1",
			Membership: map[string]alerts.Float{"S1": 0.7, "S2": 0.3, "S5": 0},
			Next:       category.NextView{Defined: true, Threshold: 0.25, PExceed: 0.2, Median: 0.15, Lo: 0.05, Hi: 0.3},
			Last:       &category.DatumView{Refit: "2026-W48", Competitors: 10, Relative: []float64{0.94, 0.52}, Seq: 7}}
	}
	v.Products["<i>E</i>"] = category.ProductView{Category: "cereal", Product: "<i>E</i>", Segment: "S1", PointSegment: "S5",
		Membership: map[string]alerts.Float{"S5": 1},
		Next:       category.NextView{Threshold: 0.25, Median: nan, Lo: nan, Hi: nan}}
	return v
}

func testViews() *Views {
	vs := NewViews()
	vs.Update(testView())
	return vs
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
	vs := testViews()
	vs.Update(category.View{Info: category.CategoryView{Name: "bakery", LastRefit: "2026-W47"}})
	got := mustJSON(t, vs.ReadCategories())
	want := `{"categories":[{"name":"bakery","products":0,"segments":0,"last_refit":"2026-W47","ess":0,"changes":0,"mean_surprise":0,"events":0},` +
		`{"name":"cereal","products":5,"segments":3,"last_refit":"2026-W48","ess":180.5,"changes":5,"mean_surprise":0.75,"events":2}]}`
	if got != want {
		t.Errorf("categories JSON\n got %s\nwant %s", got, want)
	}
	segs, ok := vs.Segments("bakery")
	if !ok || segs == nil || len(segs) != 0 {
		t.Errorf("Segments(bakery) = %v, %v; want an empty list", segs, ok)
	}
}

func TestViewsSegments(t *testing.T) {
	t.Parallel()
	vs := testViews()
	resp, err := vs.ReadSegments("cereal")
	if err != nil {
		t.Fatal(err)
	}
	if resp.Refit != "2026-W48" || len(resp.Segments) != 3 || resp.Segments[2].ID != "S5" {
		t.Errorf("ReadSegments(cereal) = %+v", resp)
	}
	// The result is a copy.
	resp.Segments[0].Members[0] = "changed"
	again, _ := vs.Segments("cereal")
	if again[0].Members[0] != "A" {
		t.Error("changing a returned segment changed the view")
	}
	if _, ok := vs.Segments("nope"); ok {
		t.Error("Segments(nope) found")
	}
	if _, err := vs.ReadSegments("nope"); !errors.Is(err, ErrNotFound) {
		t.Errorf("ReadSegments(nope) = %v, want ErrNotFound", err)
	}
}

func TestViewsProduct(t *testing.T) {
	t.Parallel()
	vs := testViews()
	p, err := vs.ReadProduct("cereal", "C")
	if err != nil {
		t.Fatal(err)
	}
	p.Membership["S1"] = 0
	p.Last.Relative[0] = 0
	again, _ := vs.Product("cereal", "C")
	if again.Membership["S1"] != 0.7 || again.Last.Relative[0] != 0.94 {
		t.Error("changing a returned product changed the view")
	}
	for _, q := range [][2]string{{"cereal", "Z"}, {"nope", "A"}} {
		if _, ok := vs.Product(q[0], q[1]); ok {
			t.Errorf("Product(%s, %s) found", q[0], q[1])
		}
		if _, err := vs.ReadProduct(q[0], q[1]); !errors.Is(err, ErrNotFound) || !strings.Contains(err.Error(), q[0]) {
			t.Errorf("ReadProduct(%s, %s) = %v, want ErrNotFound naming the category", q[0], q[1], err)
		}
	}
}

func TestViewsConcurrent(t *testing.T) {
	t.Parallel()
	vs := testViews()
	var wg sync.WaitGroup
	for r := range 4 {
		wg.Go(func() {
			for i := range 200 {
				if r == 0 {
					v := testView()
					v.Info.LastRefit = fmt.Sprintf("2026-W%02d", i%52+1)
					vs.Update(v)
					continue
				}
				_ = vs.Categories()
				if segs, ok := vs.Segments("cereal"); !ok || len(segs) != 3 {
					t.Errorf("Segments during updates: %d, %v", len(segs), ok)
					return
				}
				if _, err := vs.ReadProduct("cereal", "A"); err != nil {
					t.Errorf("ReadProduct during updates: %v", err)
					return
				}
			}
		})
	}
	wg.Wait()
}
