package read

import (
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"rivalmix/stream/category"
)

// TestDashboardPagesAndLists serves the category and product pages and
// the moves and alerts lists of a view with a history but no posterior:
// tables and timelines are there, figures of the posterior are not, and
// unknown categories or products are 404.
func TestDashboardPagesAndLists(t *testing.T) {
	t.Parallel()
	v := testView()
	v.History = []category.RefitPoint{
		{Refit: "2026-W47", Products: 5, ESS: 200, Distinct: 40, MeanSurprise: 0.5, Sizes: map[string]int{"S1": 4, "S2": 1},
			Moves: []category.MoveView{{Refit: "2026-W47", Product: "C", From: "S2", To: "S1", FromMembership: 0.2, ToMembership: 0.8}}},
		{Refit: "2026-W48", Products: 5, ESS: 180.5, Distinct: 35, MeanSurprise: 0.75, Sizes: map[string]int{"S1": 3, "S2": 1, "S5": 1},
			Moves: []category.MoveView{{Refit: "2026-W48", Product: "P-10", From: "S1", To: "S2"}, {Refit: "2026-W48", Product: "P-9", From: "S1", To: "S5"}}},
	}
	v.Alerts = []category.AlertView{{Refit: "2026-W48", Product: "A", Segment: "S1", Threshold: 0.25, Probability: 0.9, Median: 0.3, Lo: 0.2, Hi: 0.4}}
	vs := NewViews()
	vs.Update(v)
	h := NewHTTPHandler(vs, nil, nil, testLogger(t))
	get := func(path string) (int, string) {
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, path, nil))
		return rec.Code, rec.Body.String()
	}
	code, body := get("/v1/categories/cereal/moves")
	var mv MovesResponse
	if code != 200 || json.Unmarshal([]byte(body), &mv) != nil || len(mv.Moves) != 3 || mv.Moves[0].Product != "P-10" || mv.Moves[2].Product != "C" {
		t.Errorf("moves: %d %s", code, body)
	}
	code, body = get("/v1/categories/cereal/alerts")
	var al AlertsResponse
	if code != 200 || json.Unmarshal([]byte(body), &al) != nil || len(al.Alerts) != 1 || al.Alerts[0].Probability != 0.9 {
		t.Errorf("alerts: %d %s", code, body)
	}
	code, body = get("/categories/cereal")
	for _, s := range []string{"not pricing advice", `id="moves"`, `id="alerts"`, `id="sizes"`, `id="ess"`, "Over 2 refits",
		`href="/categories/cereal/products/C"`, "0.900"} {
		if code != 200 || !strings.Contains(body, s) {
			t.Errorf("category page lacks %s (%d)", s, code)
		}
	}
	if strings.Contains(body, `href="/categories/cereal/products/P-10"`) {
		t.Error("a product no longer in the category is linked")
	}
	if strings.Contains(body, `id="decay"`) {
		t.Error("category page draws decay bands without a posterior")
	}
	code, body = get("/categories/cereal/products/%3Ci%3EE%3C%2Fi%3E")
	if code != 200 || !strings.Contains(body, "&lt;i&gt;E&lt;/i&gt;") || strings.Contains(body, "<i>E</i>") || !strings.Contains(body, "not pricing advice") {
		t.Errorf("product page: %d %s", code, body)
	}
	for _, path := range []string{"/categories/nope", "/categories/cereal/products/Z", "/v1/categories/nope/moves", "/v1/categories/nope/alerts"} {
		if code, _ := get(path); code != 404 {
			t.Errorf("GET %s: %d, want 404", path, code)
		}
	}
}
