package category

import (
	"fmt"
	"math"
	"slices"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/state"
)

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
	ESS alerts.Float `json:"ess"`
	// Changes is the number of data changes the refit brought.
	Changes int `json:"changes"`
	// MeanSurprise is the mean negative log predictive density (nats) of
	// the data the refit added or replaced; null when it changed none.
	MeanSurprise alerts.Float `json:"mean_surprise"`
	// Events is the number of events the refit emitted.
	Events int `json:"events"`
}

// SegmentView is one point segment of a category with its stable id.
type SegmentView struct {
	// ID is the segment's stable id (S1, S2, ...), as alerts assigns it.
	ID string `json:"id"`
	// Size is the number of member products.
	Size int `json:"size"`
	// Medians are the posterior medians (over draws) of the strongest,
	// second and third strongest relative cross-elasticity of a member
	// (null where no member has that many candidates).
	Medians [3]alerts.Float `json:"medians"`
	// MeanReported is the typical number of reported competitors of a
	// member.
	MeanReported alerts.Float `json:"mean_reported"`
	// Members are the member product ids in reading order (CompareIDs).
	Members []string `json:"members"`
}

// NextView is the predictive law of a product's strongest unreported
// competitor's relative cross-elasticity.
type NextView struct {
	// Defined is false when every candidate was reported; the other
	// numbers but Threshold are then null or 0.
	Defined bool `json:"defined"`
	// Threshold is t (relative cross-elasticity) of PExceed.
	Threshold alerts.Float `json:"threshold"`
	// PExceed is P(next value > Threshold), in [0, 1].
	PExceed alerts.Float `json:"p_exceed"`
	// Median, Lo and Hi are quantiles of the next value (0.5 and the
	// configured interval, 10% and 90% by default).
	Median alerts.Float `json:"median"`
	Lo     alerts.Float `json:"lo"`
	Hi     alerts.Float `json:"hi"`
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
	Membership map[string]alerts.Float `json:"membership"`
	// Next is the predictive law of its strongest unreported competitor.
	Next NextView `json:"next"`
	// Last is its last applied datum; absent when unknown.
	Last *DatumView `json:"last,omitempty"`
}

// View is what the read API shows of one category after a refit. Build it
// with NewView; it is never modified afterwards, so readers may share it.
type View struct {
	Info     CategoryView
	Segments []SegmentView
	Products map[string]ProductView
	// History is the category's completed refits, oldest first.
	History []RefitPoint
	// Alerts are the active missed-competitor alerts, by product id.
	Alerts []AlertView
	// Posterior is what the figures are computed from; nil when the
	// refit had no products.
	Posterior *Posterior
}

// Posterior holds a refit's weighted draws with the products' data and
// the point segmentation: the input of the dashboard's figures. Shared by
// readers and never modified.
type Posterior struct {
	Products   []string
	Data       []*sequential.Datum
	Draws      []sequential.Draw
	Summary    sequential.Summary
	SegmentIDs []string
	// Labels are the reported segment ids, aligned with Products.
	Labels []string
}

// Moves returns the moved events of the history, latest refit first and
// by product id within a refit, at most limit of them (all when limit
// <= 0).
func (v View) Moves(limit int) []MoveView {
	var out []MoveView
	for i := len(v.History) - 1; i >= 0; i-- {
		for _, m := range v.History[i].Moves {
			if limit > 0 && len(out) >= limit {
				return out
			}
			out = append(out, m)
		}
	}
	return out
}

// activeAlerts lists the products whose missed-competitor alert is
// active, with the numbers of their latest missed event in the history
// (or, when that has left the history, the memory's probability and the
// current next-value law).
func activeAlerts(rep RefitReport, products map[string]ProductView) []AlertView {
	var out []AlertView
	for p, m := range rep.Alerts.Memory.Alert {
		if !m.Active {
			continue
		}
		found := false
		for i := len(rep.History) - 1; i >= 0 && !found; i-- {
			for _, a := range rep.History[i].Missed {
				if a.Product == p {
					out, found = append(out, a), true
					break
				}
			}
		}
		if !found {
			pv := products[p]
			out = append(out, AlertView{Refit: m.Refit, Product: p, Segment: pv.Segment,
				Threshold: float64(pv.Next.Threshold), Probability: m.Probability,
				Median: float64(pv.Next.Median), Lo: float64(pv.Next.Lo), Hi: float64(pv.Next.Hi)})
		}
	}
	slices.SortFunc(out, func(a, b AlertView) int { return CompareIDs(a.Product, b.Product) })
	return out
}

// NewView builds the read API's view of the completed refit rep. records
// returns a product's last applied record (Worker.Record) and may be nil.
// Segment ids come from rep.Alerts.SegmentIDs, which alerts.Evaluate
// assigns (one per point segment); a report without them is an error, so
// that segments have one name everywhere.
func NewView(rep RefitReport, records func(product string) (state.ProductRecord, bool)) (View, error) {
	sum := &rep.Summary
	ids := rep.Alerts.SegmentIDs
	if len(ids) != len(sum.Segments) || slices.Contains(ids, "") {
		return View{}, fmt.Errorf("category %s refit %s: %d segment ids from alerts for %d point segments",
			rep.Category, rep.Refit, len(ids), len(sum.Segments))
	}
	v := View{
		Info: CategoryView{Name: rep.Category, Products: len(rep.Products), Segments: len(sum.Segments),
			LastRefit: rep.Refit, ESS: alerts.Float(rep.ESS), Changes: rep.Changes, Events: len(rep.Events),
			MeanSurprise: alerts.Float(math.NaN())},
		Segments: make([]SegmentView, len(sum.Segments)),
		Products: make(map[string]ProductView, len(rep.Products)),
	}
	if rep.Changes > 0 {
		v.Info.MeanSurprise = alerts.Float(rep.MeanSurprise)
	}
	for c, s := range sum.Segments {
		sv := SegmentView{ID: ids[c], Size: len(s.Members), MeanReported: alerts.Float(s.MeanReported),
			Members: make([]string, 0, len(s.Members))}
		for j, m := range s.Median {
			sv.Medians[j] = alerts.Float(m)
		}
		for _, i := range s.Members {
			if i >= 0 && i < len(rep.Products) {
				sv.Members = append(sv.Members, rep.Products[i])
			}
		}
		slices.SortFunc(sv.Members, CompareIDs)
		v.Segments[c] = sv
	}
	for i, p := range rep.Products {
		v.Products[p] = productView(rep, ids, i, records)
	}
	v.History = rep.History
	v.Alerts = activeAlerts(rep, v.Products)
	if len(rep.Draws) > 0 && len(rep.Data) == len(rep.Products) {
		v.Posterior = &Posterior{Products: rep.Products, Data: rep.Data, Draws: rep.Draws, Summary: rep.Summary,
			SegmentIDs: ids, Labels: rep.Labels}
	}
	return v, nil
}

func productView(rep RefitReport, ids []string, i int, records func(string) (state.ProductRecord, bool)) ProductView {
	sum := &rep.Summary
	p := rep.Products[i]
	pv := ProductView{Category: rep.Category, Product: p, Membership: map[string]alerts.Float{}}
	if i < len(rep.Labels) {
		pv.Segment = rep.Labels[i]
	}
	if i < len(sum.Partition) && sum.Partition[i] >= 0 && sum.Partition[i] < len(ids) {
		pv.PointSegment = ids[sum.Partition[i]]
	}
	if i < len(sum.Membership) {
		for c, q := range sum.Membership[i] {
			if c < len(ids) {
				pv.Membership[ids[c]] = alerts.Float(q)
			}
		}
	}
	if i < len(sum.Next) {
		n := sum.Next[i]
		pv.Next = NextView{Defined: n.Defined, Threshold: alerts.Float(n.Threshold), PExceed: alerts.Float(n.PExceed),
			Median: alerts.Float(n.Median), Lo: alerts.Float(n.Lo), Hi: alerts.Float(n.Hi)}
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
	return pv
}
