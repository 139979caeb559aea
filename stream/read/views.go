package read

import (
	"cmp"
	"errors"
	"fmt"
	"maps"
	"slices"
	"sync"

	"rivalmix/stream/category"
)

// Views is the in-memory read model behind the HTTP and request/reply
// read surfaces: per category, its [category.View] as of its last
// completed refit. The service calls Update after each refit; readers get
// copies. Safe for concurrent use. It starts empty, so after a restart a
// category appears once the service has restored it.
type Views struct {
	mu   sync.RWMutex
	cats map[string]category.View
	gen  map[string]uint64 // Update count per category, for the page cache
	// coLimit is the dashboard's co-segment heatmap limit (0: default).
	coLimit int
}

// NewViews returns an empty read model.
func NewViews() *Views { return &Views{cats: map[string]category.View{}, gen: map[string]uint64{}} }

// SetCoSegmentLimit sets the largest category whose co-segment heatmap
// the dashboard draws (0: figures.DefaultCoSegmentLimit).
func (vs *Views) SetCoSegmentLimit(n int) {
	vs.mu.Lock()
	defer vs.mu.Unlock()
	vs.coLimit = n
}

// view returns a category's view, its update count and the co-segment
// limit. The view is shared: callers must not modify it.
func (vs *Views) view(cat string) (category.View, uint64, int, bool) {
	vs.mu.RLock()
	defer vs.mu.RUnlock()
	v, ok := vs.cats[cat]
	return v, vs.gen[cat], vs.coLimit, ok
}

// Update replaces the view of v.Info.Name with v, which must not be
// modified afterwards.
func (vs *Views) Update(v category.View) {
	vs.mu.Lock()
	defer vs.mu.Unlock()
	vs.cats[v.Info.Name] = v
	vs.gen[v.Info.Name]++
}

// Categories returns every category with a completed refit, by name.
func (vs *Views) Categories() []category.CategoryView {
	vs.mu.RLock()
	defer vs.mu.RUnlock()
	out := make([]category.CategoryView, 0, len(vs.cats))
	for _, v := range vs.cats {
		out = append(out, v.Info)
	}
	slices.SortFunc(out, func(a, b category.CategoryView) int { return cmp.Compare(a.Name, b.Name) })
	return out
}

// Segments returns a category's segments, largest first; false when the
// category has no completed refit. The result is the caller's.
func (vs *Views) Segments(cat string) ([]category.SegmentView, bool) {
	vs.mu.RLock()
	defer vs.mu.RUnlock()
	v, ok := vs.cats[cat]
	if !ok {
		return nil, false
	}
	return cloneSegments(v.Segments), true
}

// cloneSegments copies segs and their member lists; never nil.
func cloneSegments(segs []category.SegmentView) []category.SegmentView {
	out := make([]category.SegmentView, len(segs))
	for i, s := range segs {
		s.Members = slices.Clone(s.Members)
		out[i] = s
	}
	return out
}

// Product returns one product of a category; false when the category or
// the product is unknown. The result is the caller's.
func (vs *Views) Product(cat, product string) (category.ProductView, bool) {
	vs.mu.RLock()
	defer vs.mu.RUnlock()
	v, ok := vs.cats[cat]
	if !ok {
		return category.ProductView{}, false
	}
	pv, ok := v.Products[product]
	if !ok {
		return category.ProductView{}, false
	}
	pv.Membership = maps.Clone(pv.Membership)
	if pv.Last != nil {
		last := *pv.Last
		last.Relative, last.IDs, last.Dropped = slices.Clone(last.Relative), slices.Clone(last.IDs), slices.Clone(last.Dropped)
		pv.Last = &last
	}
	return pv, true
}

// Category returns one category's entry of Categories; false when it has
// no completed refit.
func (vs *Views) Category(cat string) (category.CategoryView, bool) {
	vs.mu.RLock()
	defer vs.mu.RUnlock()
	v, ok := vs.cats[cat]
	return v.Info, ok
}

// ErrNotFound is matched by errors.Is for a read of a category with no
// completed refit, or of a product the category does not hold.
var ErrNotFound = errors.New("not found")

// CategoriesResponse is the body of GET /v1/categories and of the
// rivalmix.read.categories reply.
type CategoriesResponse struct {
	// Categories are those with a completed refit, by name.
	Categories []category.CategoryView `json:"categories"`
}

// SegmentsResponse is the body of GET /v1/categories/{category}/segments
// and of the rivalmix.read.segments reply.
type SegmentsResponse struct {
	// Category is the category asked for.
	Category string `json:"category"`
	// Refit is the refit the segments are from.
	Refit string `json:"refit"`
	// Segments are its point segments, largest first.
	Segments []category.SegmentView `json:"segments"`
}

// ErrorResponse is the body of every error answer of the HTTP read API.
type ErrorResponse struct {
	// Error says what was not found or not allowed.
	Error string `json:"error"`
}

// ReadCategories answers the categories query.
func (vs *Views) ReadCategories() CategoriesResponse {
	return CategoriesResponse{Categories: vs.Categories()}
}

// ReadSegments answers the segments query; the error wraps ErrNotFound
// when the category has no completed refit.
func (vs *Views) ReadSegments(cat string) (SegmentsResponse, error) {
	vs.mu.RLock()
	defer vs.mu.RUnlock()
	v, ok := vs.cats[cat]
	if !ok {
		return SegmentsResponse{}, fmt.Errorf("category %q: %w (no completed refit)", cat, ErrNotFound)
	}
	return SegmentsResponse{Category: cat, Refit: v.Info.LastRefit, Segments: cloneSegments(v.Segments)}, nil
}

// ReadProduct answers the product query; the error wraps ErrNotFound
// when the category or the product is unknown.
func (vs *Views) ReadProduct(cat, product string) (category.ProductView, error) {
	if _, ok := vs.Category(cat); !ok {
		return category.ProductView{}, fmt.Errorf("category %q: %w (no completed refit)", cat, ErrNotFound)
	}
	pv, ok := vs.Product(cat, product)
	if !ok {
		return category.ProductView{}, fmt.Errorf("product %q in category %q: %w", product, cat, ErrNotFound)
	}
	return pv, nil
}

// MovesResponse is the body of GET /v1/categories/{category}/moves: the
// moved events of the refits the category's history keeps, latest refit
// first and by product id within a refit (at most MaxMoves).
type MovesResponse struct {
	Category string              `json:"category"`
	Refit    string              `json:"refit"`
	Moves    []category.MoveView `json:"moves"`
}

// MaxMoves bounds the moves the read API and the dashboard list.
const MaxMoves = 200

// AlertsResponse is the body of GET /v1/categories/{category}/alerts:
// the active missed-competitor alerts, by product id.
type AlertsResponse struct {
	Category string               `json:"category"`
	Refit    string               `json:"refit"`
	Alerts   []category.AlertView `json:"alerts"`
}

// ReadMoves answers the moves query; the error wraps ErrNotFound when the
// category has no completed refit.
func (vs *Views) ReadMoves(cat string) (MovesResponse, error) {
	v, _, _, ok := vs.view(cat)
	if !ok {
		return MovesResponse{}, fmt.Errorf("category %q: %w (no completed refit)", cat, ErrNotFound)
	}
	moves := v.Moves(MaxMoves)
	if moves == nil {
		moves = []category.MoveView{}
	}
	return MovesResponse{Category: cat, Refit: v.Info.LastRefit, Moves: moves}, nil
}

// ReadAlerts answers the alerts query; the error wraps ErrNotFound when
// the category has no completed refit.
func (vs *Views) ReadAlerts(cat string) (AlertsResponse, error) {
	v, _, _, ok := vs.view(cat)
	if !ok {
		return AlertsResponse{}, fmt.Errorf("category %q: %w (no completed refit)", cat, ErrNotFound)
	}
	return AlertsResponse{Category: cat, Refit: v.Info.LastRefit, Alerts: append([]category.AlertView{}, v.Alerts...)}, nil
}
