package stream

import (
	"bytes"
	"cmp"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"math"
	"slices"
	"strconv"
	"sync"

	"rivalmix/state"
)

// Float is a float64 that encodes as JSON null when it is NaN or
// infinite (a value that is not defined, such as the third-strongest
// median of a segment whose members report two competitors), and decodes
// null back to NaN.
type Float float64

// MarshalJSON writes the number, or null when it is NaN or infinite.
func (f Float) MarshalJSON() ([]byte, error) {
	v := float64(f)
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(v) // the same spelling as a plain float64
}

// UnmarshalJSON reads a number, or null as NaN.
func (f *Float) UnmarshalJSON(b []byte) error {
	if bytes.Equal(b, []byte("null")) {
		*f = Float(math.NaN())
		return nil
	}
	var v float64
	if err := json.Unmarshal(b, &v); err != nil {
		return fmt.Errorf("stream: Float: %w", err)
	}
	*f = Float(v)
	return nil
}

// CategoryView is one category in the read API's category list.
type CategoryView struct {
	// Name is the category, as in its input subject.
	Name string `json:"name"`
	// Products is the number of products in the model.
	Products int `json:"products"`
	// Segments is the number of segments in the point segmentation.
	Segments int `json:"segments"`
	// LastRefit is the last completed refit.
	LastRefit string `json:"last_refit"`
	// ESS is the particles' effective sample size at that refit (a count
	// of particles, >= 1 when there are products).
	ESS Float `json:"ess"`
	// Changes is the number of data changes the refit brought.
	Changes int `json:"changes"`
	// MeanSurprise is the mean negative log predictive density (nats) of
	// the data the refit added or replaced; null when it changed none.
	MeanSurprise Float `json:"mean_surprise"`
	// Events is the number of events the refit emitted.
	Events int `json:"events"`
}

// SegmentView is one point segment of a category with its stable id.
type SegmentView struct {
	// ID is the segment's stable id (S1, S2, ...); see [Views.Update].
	ID string `json:"id"`
	// Size is the number of member products.
	Size int `json:"size"`
	// Medians are the posterior medians (over draws) of the strongest, second and
	// third strongest relative cross-elasticity of a member (null where
	// no member has that many candidates).
	Medians [3]Float `json:"medians"`
	// MeanReported is the typical number of reported competitors of a
	// member.
	MeanReported Float `json:"mean_reported"`
	// Members are the member product ids, ascending.
	Members []string `json:"members"`
}

// NextView is the predictive law of a product's strongest unreported
// competitor's relative cross-elasticity.
type NextView struct {
	// Defined is false when every candidate was reported; the other
	// numbers but Threshold are then null or 0.
	Defined bool `json:"defined"`
	// Threshold is t (relative cross-elasticity) of PExceed.
	Threshold Float `json:"threshold"`
	// PExceed is P(next value > Threshold), in [0, 1].
	PExceed Float `json:"p_exceed"`
	// Median, Lo and Hi are quantiles of the next value (0.5 and the
	// configured interval, 10% and 90% by default).
	Median Float `json:"median"`
	Lo     Float `json:"lo"`
	Hi     Float `json:"hi"`
}

// DatumView is a product's last applied input.
type DatumView struct {
	// Refit is the refit that reported it.
	Refit string `json:"refit"`
	// Competitors is L, the candidates the refit considered.
	Competitors int `json:"competitors"`
	// Relative are the positive relative cross-elasticities, descending.
	Relative []float64 `json:"relative"`
	// IDs are the competitor ids aligned with Relative, when given.
	IDs []string `json:"ids,omitempty"`
	// Dropped are the non-positive entries left out of the model.
	Dropped []state.DroppedEntry `json:"dropped,omitempty"`
	// Own is the product's own-price elasticity (< 0) when the input gave
	// raw cross elasticities; absent otherwise.
	Own float64 `json:"own,omitempty"`
	// Seq is the input stream sequence that applied it.
	Seq uint64 `json:"seq"`
}

// ProductView is one product of a category.
type ProductView struct {
	// Category and Product name the product.
	Category string `json:"category"`
	Product  string `json:"product"`
	// Segment is the product's reported segment id, which changes only
	// with a moved event (hysteresis).
	Segment string `json:"segment"`
	// PointSegment is the id of the point segment it is in now.
	PointSegment string `json:"point_segment"`
	// Membership maps segment id to the product's mean posterior
	// similarity to that segment's members, in [0, 1].
	Membership map[string]Float `json:"membership"`
	// Next is the predictive law of its strongest unreported competitor.
	Next NextView `json:"next"`
	// Last is its last applied datum; absent when unknown.
	Last *DatumView `json:"last,omitempty"`
}

// Views is the in-memory read model behind the HTTP and request/reply
// read surfaces: per category, the state as of its last completed refit.
// The service calls Update after each refit; readers get copies. Safe for
// concurrent use. It starts empty, so after a restart a category appears
// at its next completed refit.
type Views struct {
	mu   sync.RWMutex
	cats map[string]*categoryViews
}

// categoryViews is one category's views; never modified once stored.
type categoryViews struct {
	info     CategoryView
	segments []SegmentView
	products map[string]ProductView
}

// NewViews returns an empty read model.
func NewViews() *Views { return &Views{cats: map[string]*categoryViews{}} }

// Update replaces rep.Category's views with those of the completed refit
// rep. records returns a product's last applied record (Worker.Record); it
// is called from Update's goroutine only, before any lock is taken, so the
// worker's goroutine can pass its own method. A report of an empty
// category leaves it with no segments or products.
//
// Segment ids: a point segment takes its stable id from
// rep.Alerts.SegmentIDs, which alerts.Evaluate assigns. A report without
// them (one not made by Worker.CompleteRefit) is named from rep.Labels,
// each product's reported id, which may lag its point segment
// (hysteresis): each point segment gets the reported id most of its
// members carry, each id going to one segment only (the pair with the
// most carriers first; ties to the larger segment, then the smaller id);
// a point segment left without an id, all of whose members still report
// ids taken by other segments, is shown as "point-<n>", n its rank by
// size from 1.
func (v *Views) Update(rep RefitReport, records func(product string) (state.ProductRecord, bool)) {
	cv := buildCategoryViews(rep, records)
	v.mu.Lock()
	defer v.mu.Unlock()
	v.cats[rep.Category] = cv
}

func buildCategoryViews(rep RefitReport, records func(string) (state.ProductRecord, bool)) *categoryViews {
	sum := &rep.Summary
	ids := pointSegmentIDs(rep)
	cv := &categoryViews{
		info: CategoryView{Name: rep.Category, Products: len(rep.Products), Segments: len(sum.Segments),
			LastRefit: rep.Refit, ESS: Float(rep.ESS), Changes: rep.Changes, Events: len(rep.Events),
			MeanSurprise: Float(math.NaN())},
		segments: make([]SegmentView, len(sum.Segments)),
		products: make(map[string]ProductView, len(rep.Products)),
	}
	if rep.Changes > 0 {
		cv.info.MeanSurprise = Float(rep.MeanSurprise)
	}
	for c, s := range sum.Segments {
		sv := SegmentView{ID: ids[c], Size: len(s.Members), MeanReported: Float(s.MeanReported),
			Members: make([]string, 0, len(s.Members))}
		for j, m := range s.Median {
			sv.Medians[j] = Float(m)
		}
		for _, i := range s.Members {
			if i >= 0 && i < len(rep.Products) {
				sv.Members = append(sv.Members, rep.Products[i])
			}
		}
		slices.Sort(sv.Members)
		cv.segments[c] = sv
	}
	for i, p := range rep.Products {
		pv := ProductView{Category: rep.Category, Product: p, Membership: map[string]Float{}}
		if i < len(rep.Labels) {
			pv.Segment = rep.Labels[i]
		}
		if i < len(sum.Partition) && sum.Partition[i] >= 0 && sum.Partition[i] < len(ids) {
			pv.PointSegment = ids[sum.Partition[i]]
		}
		if i < len(sum.Membership) {
			for c, q := range sum.Membership[i] {
				if c < len(ids) {
					pv.Membership[ids[c]] = Float(q)
				}
			}
		}
		if i < len(sum.Next) {
			n := sum.Next[i]
			pv.Next = NextView{Defined: n.Defined, Threshold: Float(n.Threshold), PExceed: Float(n.PExceed),
				Median: Float(n.Median), Lo: Float(n.Lo), Hi: Float(n.Hi)}
		}
		if records != nil {
			if r, ok := records(p); ok {
				pv.Last = &DatumView{Refit: r.Refit, Competitors: r.Competitors, Relative: slices.Clone(r.Relative),
					IDs: slices.Clone(r.IDs), Dropped: slices.Clone(r.Dropped), Own: r.Own, Seq: r.AppliedSeq}
				if pv.Last.Relative == nil {
					pv.Last.Relative = []float64{}
				}
			}
		}
		cv.products[p] = pv
	}
	return cv
}

// pointSegmentIDs names each point segment of rep's summary; see Update.
func pointSegmentIDs(rep RefitReport) []string {
	segs := rep.Summary.Segments
	if ids := rep.Alerts.SegmentIDs; len(ids) == len(segs) && !slices.Contains(ids, "") {
		return slices.Clone(ids)
	}
	type carry struct {
		c     int
		id    string
		count int
	}
	var pairs []carry
	for c, s := range segs {
		counts := map[string]int{}
		for _, i := range s.Members {
			if i >= 0 && i < len(rep.Labels) && rep.Labels[i] != "" {
				counts[rep.Labels[i]]++
			}
		}
		for id, n := range counts {
			pairs = append(pairs, carry{c, id, n})
		}
	}
	slices.SortFunc(pairs, func(a, b carry) int {
		return cmp.Or(
			cmp.Compare(b.count, a.count),
			cmp.Compare(len(segs[b.c].Members), len(segs[a.c].Members)),
			cmp.Compare(a.id, b.id),
			cmp.Compare(a.c, b.c))
	})
	ids := make([]string, len(segs))
	taken := map[string]bool{}
	for _, p := range pairs {
		if ids[p.c] == "" && !taken[p.id] {
			ids[p.c], taken[p.id] = p.id, true
		}
	}
	for c := range ids {
		if ids[c] == "" {
			ids[c] = "point-" + strconv.Itoa(c+1)
		}
	}
	return ids
}

// Categories returns every category with a completed refit, by name.
func (v *Views) Categories() []CategoryView {
	v.mu.RLock()
	defer v.mu.RUnlock()
	out := make([]CategoryView, 0, len(v.cats))
	for _, cv := range v.cats {
		out = append(out, cv.info)
	}
	slices.SortFunc(out, func(a, b CategoryView) int { return cmp.Compare(a.Name, b.Name) })
	return out
}

// Segments returns a category's segments, largest first; false when the
// category has no completed refit. The result is the caller's.
func (v *Views) Segments(category string) ([]SegmentView, bool) {
	v.mu.RLock()
	defer v.mu.RUnlock()
	cv, ok := v.cats[category]
	if !ok {
		return nil, false
	}
	return cloneSegments(cv.segments), true
}

// cloneSegments copies segs and their member lists; never nil.
func cloneSegments(segs []SegmentView) []SegmentView {
	out := make([]SegmentView, len(segs))
	for i, s := range segs {
		s.Members = slices.Clone(s.Members)
		out[i] = s
	}
	return out
}

// Product returns one product of a category; false when the category or
// the product is unknown. The result is the caller's.
func (v *Views) Product(category, product string) (ProductView, bool) {
	v.mu.RLock()
	defer v.mu.RUnlock()
	cv, ok := v.cats[category]
	if !ok {
		return ProductView{}, false
	}
	pv, ok := cv.products[product]
	if !ok {
		return ProductView{}, false
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
func (v *Views) Category(category string) (CategoryView, bool) {
	v.mu.RLock()
	defer v.mu.RUnlock()
	cv, ok := v.cats[category]
	if !ok {
		return CategoryView{}, false
	}
	return cv.info, true
}

// ErrNotFound is matched by errors.Is for a read of a category with no
// completed refit, or of a product the category does not hold.
var ErrNotFound = errors.New("not found")

// CategoriesResponse is the body of GET /v1/categories and of the
// rivalmix.read.categories reply.
type CategoriesResponse struct {
	// Categories are those with a completed refit, by name.
	Categories []CategoryView `json:"categories"`
}

// SegmentsResponse is the body of GET /v1/categories/{category}/segments
// and of the rivalmix.read.segments reply.
type SegmentsResponse struct {
	// Category is the category asked for.
	Category string `json:"category"`
	// Refit is the refit the segments are from.
	Refit string `json:"refit"`
	// Segments are its point segments, largest first.
	Segments []SegmentView `json:"segments"`
}

// ErrorResponse is the body of every error answer of the HTTP read API.
type ErrorResponse struct {
	// Error says what was not found or not allowed.
	Error string `json:"error"`
}

// ReadCategories answers the categories query.
func (v *Views) ReadCategories() CategoriesResponse {
	return CategoriesResponse{Categories: v.Categories()}
}

// ReadSegments answers the segments query; the error wraps ErrNotFound
// when the category has no completed refit.
func (v *Views) ReadSegments(category string) (SegmentsResponse, error) {
	v.mu.RLock()
	defer v.mu.RUnlock()
	cv, ok := v.cats[category]
	if !ok {
		return SegmentsResponse{}, fmt.Errorf("category %q: %w (no completed refit)", category, ErrNotFound)
	}
	return SegmentsResponse{Category: category, Refit: cv.info.LastRefit, Segments: cloneSegments(cv.segments)}, nil
}

// ReadProduct answers the product query; the error wraps ErrNotFound
// when the category or the product is unknown.
func (v *Views) ReadProduct(category, product string) (ProductView, error) {
	if _, ok := v.Category(category); !ok {
		return ProductView{}, fmt.Errorf("category %q: %w (no completed refit)", category, ErrNotFound)
	}
	pv, ok := v.Product(category, product)
	if !ok {
		return ProductView{}, fmt.Errorf("product %q in category %q: %w", product, category, ErrNotFound)
	}
	return pv, nil
}
