package category

import (
	"slices"

	"rivalmix/alerts"
)

// HistoryLimit is how many completed refits a category's history keeps
// (the latest); older points are dropped.
const HistoryLimit = 104

// membershipRefits is how many of the latest history points keep their
// memberships (the product page's membership over refits); older points
// drop them to bound memory (N products times segments per point).
const membershipRefits = 26

// savedMoveRefits is how many of the latest history points keep their
// moves in the saved memory.
const savedMoveRefits = 8

// historyMembership is the least membership a history point keeps for a
// product; smaller ones read as 0.
const historyMembership = 0.01

// RefitPoint is one completed refit in a category's history: what the
// dashboard's timelines and move table show. The counts are saved with
// the worker's memory, so the timelines survive a restart; the moves only
// of the latest savedMoveRefits points, and neither the missed alerts nor
// the memberships, which keeps the memory that every commit rewrites
// small.
type RefitPoint struct {
	Refit    string `json:"refit"`
	Products int    `json:"products"`
	// ESS is the particles' effective sample size after the refit.
	ESS alerts.Float `json:"ess"`
	// Distinct is the number of distinct partitions among the particles.
	Distinct int `json:"distinct"`
	// MeanSurprise is the mean negative log predictive density (nats) of
	// the data the refit changed; null when it changed none.
	MeanSurprise alerts.Float `json:"mean_surprise"`
	Changes      int          `json:"changes"`
	Events       int          `json:"events"`
	// Sizes maps each point segment id to its number of products.
	Sizes map[string]int `json:"sizes"`
	// Moved is the number of moved events.
	Moved int `json:"moved"`
	// Moves are the refit's moved events (none on a saved point older
	// than the latest savedMoveRefits).
	Moves []MoveView `json:"moves,omitempty"`
	// Missed are the refit's missed-competitor events (not saved).
	Missed []AlertView `json:"-"`
	// Membership maps product to segment id to membership (at least
	// 0.01). Kept in memory only and on the latest 26 points: older
	// points, and points from before a restart, have none.
	Membership map[string]map[string]float32 `json:"-"`
}

// MoveView is one moved event: a product's reported segment changed.
type MoveView struct {
	Refit   string `json:"refit"`
	Product string `json:"product"`
	From    string `json:"from"`
	To      string `json:"to"`
	// FromMembership and ToMembership are the product's membership of
	// From (0 when retired) and To at that refit.
	FromMembership float64 `json:"from_membership"`
	ToMembership   float64 `json:"to_membership"`
}

// AlertView is one missed-competitor alert: the product probably has an
// unreported competitor with a relative cross-elasticity above Threshold.
type AlertView struct {
	Refit     string  `json:"refit"`
	Product   string  `json:"product"`
	Segment   string  `json:"segment"`
	Threshold float64 `json:"threshold"`
	// Probability is P(next value > Threshold) when the alert was raised.
	Probability float64 `json:"probability"`
	// Median, Lo and Hi are quantiles of the next value then.
	Median float64 `json:"median"`
	Lo     float64 `json:"lo"`
	Hi     float64 `json:"hi"`
}

// newRefitPoint builds the history point of a completed refit.
func newRefitPoint(rep *RefitReport) RefitPoint {
	pt := RefitPoint{Refit: rep.Refit, Products: len(rep.Products), ESS: alerts.Float(rep.ESS),
		Distinct: rep.Distinct, MeanSurprise: alerts.Float(rep.MeanSurprise), Changes: rep.Changes,
		Events: len(rep.Events), Sizes: map[string]int{}, Membership: map[string]map[string]float32{}}
	ids := rep.Alerts.SegmentIDs
	for c, s := range rep.Summary.Segments {
		if c < len(ids) {
			pt.Sizes[ids[c]] = len(s.Members)
		}
	}
	for i, p := range rep.Products {
		if i >= len(rep.Summary.Membership) {
			break
		}
		row := map[string]float32{}
		for c, q := range rep.Summary.Membership[i] {
			if c < len(ids) && q >= historyMembership {
				row[ids[c]] = float32(q)
			}
		}
		pt.Membership[p] = row
	}
	for _, e := range rep.Events {
		switch d := e.Data.(type) {
		case alerts.Moved:
			pt.Moves = append(pt.Moves, MoveView{Refit: d.Refit, Product: d.Product, From: d.From, To: d.To,
				FromMembership: d.FromMembership, ToMembership: d.ToMembership})
		case alerts.Missed:
			pt.Missed = append(pt.Missed, AlertView{Refit: d.Refit, Product: d.Product, Segment: d.Segment,
				Threshold: d.Threshold, Probability: d.Probability, Median: d.Median, Lo: d.Lo, Hi: d.Hi})
		}
	}
	pt.Moved = len(pt.Moves)
	slices.SortStableFunc(pt.Moves, func(a, b MoveView) int { return CompareIDs(a.Product, b.Product) })
	slices.SortStableFunc(pt.Missed, func(a, b AlertView) int { return CompareIDs(a.Product, b.Product) })
	return pt
}

// appendHistory adds pt to h, dropping the oldest points beyond
// HistoryLimit; h is not modified.
func appendHistory(h []RefitPoint, pt RefitPoint) []RefitPoint {
	if n := len(h) + 1 - HistoryLimit; n > 0 {
		h = h[n:]
	}
	out := make([]RefitPoint, 0, len(h)+1)
	out = append(out, h...)
	out = append(out, pt)
	if k := len(out) - membershipRefits - 1; k >= 0 {
		out[k].Membership = nil // out is a new slice: readers' copies keep theirs
	}
	return out
}

// cloneHistory copies the slice of points. A point's maps and slices are
// never modified once it is built, so copies may share them.
func cloneHistory(h []RefitPoint) []RefitPoint { return slices.Clone(h) }

// History returns the category's completed refits, oldest first (at most
// HistoryLimit). The result is the caller's.
func (w *Worker) History() []RefitPoint { return cloneHistory(w.history) }

// savedHistory is the history as the worker's memory saves it: older
// points without their moves (Missed and Membership are never saved).
func savedHistory(h []RefitPoint) []RefitPoint {
	out := slices.Clone(h)
	for i := range max(len(out)-savedMoveRefits, 0) {
		out[i].Moves = nil
	}
	return out
}
