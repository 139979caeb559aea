package alerts

import (
	"fmt"
	"math"
	"slices"
	"strings"

	"rivalmix/sequential"
)

// Refit is what Evaluate needs from one settled refit of a category.
// Products, Data and the per-product slices of Summary share one order
// (sequential.Particles.Products, Data and Summarize over Draws).
type Refit struct {
	// Category and Refit identify the model and the refit; both enter
	// every event id, so they must be non-empty.
	Category string
	Refit    string
	// Products are the ids of every product present, distinct and
	// non-empty; a product of the last refit that is missing here was
	// withdrawn and is forgotten.
	Products []string
	// Data are the products' data (reported values and L).
	Data []*sequential.Datum
	// Summary is sequential.Summarize over the settled particles, at
	// threshold Config.Threshold.
	Summary sequential.Summary
	// ESS is the particles' effective sample size (>= 0), Particles
	// their number P and Diversity their number of distinct ancestors;
	// they pass through to the refit summary.
	ESS       float64
	Particles int
	Diversity int
	// MeanSurprise is the mean negative log predictive density (nats)
	// of the data the refit added or replaced; NaN when it changed none.
	MeanSurprise float64
	// Emission[i][c] is the log posterior predictive density of Data[i]
	// as a member of point segment c of Summary
	// (sequential.SegmentLogPredictive over the same draws). The filter
	// rule needs it; the band rule ignores it.
	Emission [][]float64
}

// Outcome is the result of Evaluate.
type Outcome struct {
	// Memory is the memory to keep for the next refit.
	Memory Memory
	// Events are in a fixed order: retired, born, split, merged (each by
	// segment id), then per product in id order its moved and its missed
	// or cleared event, then the refit summary last.
	Events []Event
	// Labels[i] is the reported segment id of Products[i].
	Labels []string
	// Provisional[i] is true while Products[i]'s label is provisional
	// (Memory.Provisional).
	Provisional []bool
	// Point[i] is the id of Products[i]'s point segment.
	Point []string
	// SegmentIDs[c] is the id of point segment c of the summary.
	SegmentIDs []string
	// Summary is the body of the summary event.
	Summary RefitSummary
	// Watchlist is the week's missed-competitor list: every product with
	// an alert in force after this refit, by rank (status new or still),
	// then the products cleared at this refit, by id.
	Watchlist []WatchItem
}

// Status of a product on the missed-competitor watchlist.
const (
	StatusNew     = "new"     // alerted at this refit, not in force before
	StatusStill   = "still"   // in force before and after this refit
	StatusCleared = "cleared" // in force before, cleared at this refit
)

// WatchItem is one line of Outcome.Watchlist.
type WatchItem struct {
	Product string `json:"product"`
	Segment string `json:"segment"`
	// Rank, from 1, orders the alerts in force by Excess, highest first
	// (ties by probability, then product id); 0 for a cleared product.
	Rank int `json:"rank,omitempty"`
	// Probability is P(next value > Config.Threshold) at this refit and
	// Excess E[(next value - Threshold)+] (sequential.NextSummary).
	Probability float64 `json:"probability"`
	Excess      float64 `json:"excess"`
	Status      string  `json:"status"`
}

// alertPlan is the missed-competitor decision for one product.
type alertPlan struct {
	ev         Kind        // event to emit, "" for none
	next       AlertMemory // memory to keep
	changed    bool        // an event changed the memory
	rank       int         // rank among the alerts in force after the refit; 0 for none
	overBudget bool        // cleared because the budget left it out
}

// planAlerts applies the missed-competitor rule (missedRule, unchanged
// by the budget) to every product, ranks the products whose alert is in
// force after the refit by the expected excess of their next value over
// the threshold (E[(Y - t)+], highest first; ties by probability, then
// product id) and, with a budget (Config.AlertBudget, AlertShare), keeps
// only the top ones: a new alert beyond the budget is not raised, and an
// alert in force beyond it is cleared (Cleared.OverBudget).
func planAlerts(cfg Config, prev Memory, r Refit) []alertPlan {
	n := len(r.Products)
	plans := make([]alertPlan, n)
	var active []int
	for i, p := range r.Products {
		am, had := prev.Alert[p]
		ev, next, changed := missedRule(cfg, am, had, r.Summary.Next[i])
		plans[i] = alertPlan{ev: ev, next: next, changed: changed}
		if next.Active {
			active = append(active, i)
		}
	}
	nx := r.Summary.Next
	slices.SortFunc(active, func(a, b int) int {
		switch {
		case nx[a].Excess != nx[b].Excess:
			if nx[a].Excess > nx[b].Excess {
				return -1
			}
			return 1
		case nx[a].PExceed != nx[b].PExceed:
			if nx[a].PExceed > nx[b].PExceed {
				return -1
			}
			return 1
		}
		return strings.Compare(r.Products[a], r.Products[b])
	})
	limit := cfg.alertLimit(n)
	for k, i := range active {
		if limit >= 0 && k >= limit {
			am, had := prev.Alert[r.Products[i]]
			if had && am.Active {
				plans[i] = alertPlan{ev: KindCleared, next: AlertMemory{Active: false, Probability: nx[i].PExceed},
					changed: true, overBudget: true}
			} else {
				plans[i] = alertPlan{next: am}
			}
			continue
		}
		plans[i].rank = k + 1
	}
	return plans
}

// Evaluate runs the alert rules of one refit against the memory of the
// previous ones and returns the new memory and the events. It is a pure
// function: prev is not modified, and equal inputs give equal outputs,
// event order included.
//
// Segment ids: the point partition is matched to the previous labelled
// point partition (labelSegments).
//
// Labels and moves. A segment assignment drawn from one refit's datum is
// as noisy as that datum, so an assignment counts only once it has held
// Config.Confirm refits in a row:
//   - A new product takes its point segment at once, without an event,
//     as a provisional label. While provisional, the label follows the
//     point segment, again without events, whenever the product's
//     membership there is >= MoveIn and to the point segment now carrying
//     its label is <= MoveOut; it is established once it has stood
//     unchanged for Confirm refits (counting the one that set it).
//   - An established label changes, with a moved event, only when the
//     same two membership conditions have held towards the same segment
//     for Confirm refits in a row, or at once when the labelled segment
//     retired (its membership then counts as 0).
//
// With Confirm = 1 no label is provisional and every crossing of the
// membership band moves at once.
//
// Errors wrap ErrConfig, ErrMemory or ErrRefit and name the field.
func Evaluate(cfg Config, prev Memory, r Refit) (Outcome, error) {
	if err := cfg.Validate(); err != nil {
		return Outcome{}, err
	}
	if err := prev.Validate(); err != nil {
		return Outcome{}, err
	}
	if err := r.validate(cfg); err != nil {
		return Outcome{}, err
	}
	sum := &r.Summary
	k := len(sum.Segments)
	lab := labelSegments(prev.Point, prev.Issued, r.Products, sum.Partition, k, cfg.SplitShare)

	n := len(r.Products)
	out := Outcome{
		Memory: Memory{
			Issued:      lab.issued,
			Refit:       r.Refit,
			Point:       make(map[string]string, n),
			Reported:    make(map[string]string, n),
			Provisional: make(map[string]int),
			Pending:     make(map[string]PendingMove),
			Alert:       make(map[string]AlertMemory),
		},
		Labels:      make([]string, n),
		Point:       make([]string, n),
		Provisional: make([]bool, n),
		SegmentIDs:  lab.ids,
	}
	sizes := make([]int, k)
	for _, c := range sum.Partition {
		sizes[c]++
	}
	if cfg.Rule == RuleFilter {
		out.Memory.Filter = make(map[string]map[string][2]float64, n)
	}
	rs := RefitSummary{Category: r.Category, Refit: r.Refit, Products: n, Segments: k,
		ESS: r.ESS, Particles: r.Particles, Diversity: r.Diversity, MeanSurprise: Float(r.MeanSurprise)}
	emit := func(kind Kind, subject string, data any) {
		out.Events = append(out.Events, NewEvent(r.Category, r.Refit, kind, subject, data))
	}

	// Segment events.
	for _, ret := range lab.retired {
		body := Retired{Category: r.Category, Refit: r.Refit, Segment: ret.id, Size: ret.size}
		if ret.successor >= 0 {
			body.Successor = lab.ids[ret.successor]
		}
		emit(KindRetired, ret.id, body)
	}
	for _, c := range lab.born {
		seg := sum.Segments[c]
		body := Born{Category: r.Category, Refit: r.Refit, Segment: lab.ids[c], Size: len(seg.Members),
			Medians: definedPrefix(seg.Median[:]), MeanReported: seg.MeanReported}
		emit(KindBorn, lab.ids[c], body)
	}
	for _, sp := range lab.splits {
		sp.Category, sp.Refit = r.Category, r.Refit
		emit(KindSplit, sp.Segment, sp)
	}
	for _, mg := range lab.merges {
		mg.Category, mg.Refit = r.Category, r.Refit
		emit(KindMerged, mg.Segment, mg)
	}
	rs.Births, rs.Retirements = len(lab.born), len(lab.retired)
	rs.Splits, rs.Merges = len(lab.splits), len(lab.merges)

	// Missed-competitor decisions first: the budget ranks every product.
	plans := planAlerts(cfg, prev, r)
	var watch []WatchItem

	// Product events, in product id order.
	order := make([]int, len(r.Products))
	for i := range order {
		order[i] = i
	}
	slices.SortFunc(order, func(a, b int) int { return strings.Compare(r.Products[a], r.Products[b]) })
	for _, i := range order {
		p := r.Products[i]
		c := sum.Partition[i]
		point := lab.ids[c]
		rep := point
		old, known := prev.Reported[p]
		in := sum.Membership[i][c]
		outOf, retired := 0.0, true
		if oc, live := lab.live[old]; live {
			outOf, retired = sum.Membership[i][oc], false
		}
		crossed := in >= cfg.MoveIn && outOf <= cfg.MoveOut
		held, young := prev.Provisional[p]
		if cfg.Rule == RuleFilter {
			var fd filterDecision
			fd, held, young = filterDecide(cfg, prev, p, known, old, held, young, &lab, sizes, r.Emission[i])
			rep = lab.ids[fd.label]
			fm := make(map[string][2]float64, k)
			for b := 0; b < k; b++ {
				fm[lab.ids[b]] = [2]float64{fd.state[b], fd.state[k+b]}
			}
			out.Memory.Filter[p] = fm
			if fd.event {
				prob := fd.moved
				rs.Moves++
				emit(KindMoved, p, Moved{Category: r.Category, Refit: r.Refit, Product: p, From: old, To: rep,
					FromMembership: outOf, ToMembership: sum.Membership[i][fd.label], FromRetired: retired,
					Probability: &prob})
			}
		}
		switch {
		case cfg.Rule == RuleFilter:
		case !known:
			// A new product takes its point segment, provisionally.
			held, young = 1, true
		case young:
			// A provisional label follows the point segment without an
			// event whenever the band is crossed; it is established once
			// it has stood unchanged for Confirm refits.
			if old != point && crossed {
				held = 1
			} else {
				rep = old
				held++
			}
		case old != point:
			rep = old
			if crossed {
				count := 1
				if pm, ok := prev.Pending[p]; ok && pm.To == point {
					count = pm.Count + 1
				}
				// A product whose segment retired has nothing to flap
				// back to and is not held for confirmation.
				if count >= cfg.Confirm || retired {
					rep = point
					rs.Moves++
					emit(KindMoved, p, Moved{Category: r.Category, Refit: r.Refit, Product: p, From: old, To: point,
						FromMembership: outOf, ToMembership: in, FromRetired: retired})
				} else {
					out.Memory.Pending[p] = PendingMove{To: point, Count: count}
					rs.Pending++
				}
			}
		}
		if young && held < cfg.Confirm {
			out.Memory.Provisional[p] = held
			out.Provisional[i] = true
			rs.Provisional++
		}
		out.Labels[i], out.Point[i] = rep, point
		out.Memory.Point[p], out.Memory.Reported[p] = point, rep

		// The segment whose decay the alert quotes is the reported one
		// while it lives, else the point segment.
		segIdx := c
		if oc, live := lab.live[rep]; live {
			segIdx = oc
		}
		am, had := prev.Alert[p]
		pl := plans[i]
		ev, next, changed := pl.ev, pl.next, pl.changed
		if changed {
			next.Refit = r.Refit
		}
		wasActive := had && am.Active
		switch ev {
		case KindMissed:
			body := Missed{Category: r.Category, Refit: r.Refit, Product: p, Segment: rep, Threshold: cfg.Threshold,
				Probability: sum.Next[i].PExceed, Median: sum.Next[i].Median, Lo: sum.Next[i].Lo, Hi: sum.Next[i].Hi,
				Reported: slices.Clone(r.Data[i].Values()), Competitors: r.Data[i].L(),
				TypicalReported: sum.Segments[segIdx].MeanReported, Excess: sum.Next[i].Excess, Rank: pl.rank, Status: StatusNew}
			if wasActive {
				body.Previous = &am.Probability
				body.Status = StatusStill
			}
			rs.Alerts++
			emit(KindMissed, p, body)
		case KindCleared:
			body := Cleared{Category: r.Category, Refit: r.Refit, Product: p, Segment: rep, Threshold: cfg.Threshold,
				Probability: next.Probability, Alerted: am.Probability, NoNextValue: !sum.Next[i].Defined, OverBudget: pl.overBudget}
			rs.Clears++
			emit(KindCleared, p, body)
			watch = append(watch, WatchItem{Product: p, Segment: rep, Probability: sum.Next[i].PExceed, Excess: sum.Next[i].Excess, Status: StatusCleared})
		}
		if had || changed {
			out.Memory.Alert[p] = next
		}
		if next.Active {
			rs.ActiveAlerts++
			st := StatusNew
			if wasActive {
				st = StatusStill
			}
			watch = append(watch, WatchItem{Product: p, Segment: rep, Rank: pl.rank, Probability: sum.Next[i].PExceed, Excess: sum.Next[i].Excess, Status: st})
		}
	}
	slices.SortStableFunc(watch, func(a, b WatchItem) int {
		switch {
		case a.Rank > 0 && b.Rank > 0:
			return a.Rank - b.Rank
		case a.Rank > 0:
			return -1
		case b.Rank > 0:
			return 1
		}
		return strings.Compare(a.Product, b.Product)
	})
	out.Watchlist = watch
	rs.ARI = previousARI(prev.Point, r.Products, out.Point)
	out.Summary = rs
	emit(KindSummary, r.Category, rs)
	return out, nil
}

// missedRule applies the missed-competitor rule to one product whose
// memory is am (had false for none). It returns the event kind to emit
// ("" for none), the memory to keep and whether an event changed it.
func missedRule(cfg Config, am AlertMemory, had bool, next sequential.NextSummary) (Kind, AlertMemory, bool) {
	active := had && am.Active
	if !next.Defined {
		if active {
			return KindCleared, AlertMemory{Active: false, Probability: 0}, true
		}
		return "", am, false
	}
	p := next.PExceed
	switch {
	case !active && p >= cfg.AlertProb:
		return KindMissed, AlertMemory{Active: true, Probability: p}, true
	case active && p >= am.Probability+cfg.RealertMargin:
		return KindMissed, AlertMemory{Active: true, Probability: p}, true
	case active && p < cfg.AlertProb-cfg.RealertMargin:
		return KindCleared, AlertMemory{Active: false, Probability: p}, true
	}
	return "", am, false
}

// previousARI is the adjusted Rand index between the previous and the new
// point partitions over the products in both; undefined when fewer than
// two.
func previousARI(prevPoint map[string]string, products, point []string) Float {
	var a, b []int
	names := map[string]int{}
	num := func(id string) int {
		n, ok := names[id]
		if !ok {
			n = len(names)
			names[id] = n
		}
		return n
	}
	for i, p := range products {
		if old, ok := prevPoint[p]; ok {
			a = append(a, num("prev:"+old))
			b = append(b, num("new:"+point[i]))
		}
	}
	if len(a) < 2 {
		return Float(math.NaN())
	}
	return Float(sequential.AdjustedRand(a, b))
}

// definedPrefix returns the leading values of x up to the first NaN.
func definedPrefix(x []float64) []float64 {
	out := make([]float64, 0, len(x))
	for _, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			break
		}
		out = append(out, v)
	}
	return out
}

// filterDecision is the outcome of the filter rule for one product.
type filterDecision struct {
	label int     // point segment index of the reported label
	state fstate  // the filter's state to keep
	event bool    // a moved event is due
	moved float64 // P(switched since the label was set), before the decision
}

// filterDecide runs the switch filter for product p and applies the move
// rule; it returns the decision and the provisional count and flag.
//
// A new product is provisional, as under the band rule: its label
// follows the filter's most probable segment without events (the switch
// flag cleared at every refit) until it has stood unchanged for Confirm
// refits. An established product moves, with a moved event:
//   - when P(switched since its label was set) reaches MoveProb, to the
//     most probable other segment;
//   - at once when its labelled segment retired (the event still carries
//     P(switched), which may be low: the segment went, not the product).
//
// A label is not corrected without a probable switch: when the product's
// state drifts to another segment with flag 0 (the label was set on an
// uncertain state, or the segmentation regrouped around it), the label
// stays. Moving such products as well (a "relabel" rule tried on two
// simulated categories of overlapping segments) raised the false moves
// from 0.06% to 1.0% of products per refit.
//
// After a move the switch flag is cleared: the new label is the one
// later switches are measured from.
func filterDecide(cfg Config, prev Memory, p string, known bool, old string, held int, young bool,
	lab *labelling, sizes []int, logEm []float64) (filterDecision, int, bool) {
	var st fstate
	if known {
		st = filterStep(cfg, prev.Filter[p], old, lab, sizes, logEm)
	} else {
		st = filterInit(sizes, logEm, cfg.Temper)
	}
	d := filterDecision{state: st, moved: st.moved()}
	best := argmaxMarginal(st, -1)
	switch {
	case !known:
		d.label = best
		st.clearFlag()
		return d, 1, true
	case young:
		st.clearFlag()
		if lab.ids[best] != old {
			d.label = best
			return d, 1, true
		}
		d.label = lab.live[old]
		return d, held + 1, true
	}
	oc, live := lab.live[old]
	switch {
	case !live:
		d.label, d.event = best, true
	case d.moved >= cfg.MoveProb:
		d.label, d.event = argmaxMarginal(st, oc), true
	default:
		d.label = oc
		return d, held, false
	}
	st.clearFlag()
	return d, held, false
}

// validate checks that the refit's fields agree with each other and with
// cfg; errors wrap ErrRefit and name the field.
func (r *Refit) validate(cfg Config) error {
	if r.Category == "" {
		return fmt.Errorf("%w: category is empty", ErrRefit)
	}
	if r.Refit == "" {
		return fmt.Errorf("%w: refit id is empty", ErrRefit)
	}
	n := len(r.Products)
	s := &r.Summary
	for _, f := range []struct {
		name string
		len  int
	}{{"data", len(r.Data)}, {"summary.partition", len(s.Partition)},
		{"summary.membership", len(s.Membership)}, {"summary.next", len(s.Next)}} {
		if f.len != n {
			return fmt.Errorf("%w: %s has %d entries for %d products", ErrRefit, f.name, f.len, n)
		}
	}
	if !(r.ESS >= 0) || math.IsInf(r.ESS, 1) {
		return fmt.Errorf("%w: ess %v, want finite and >= 0", ErrRefit, r.ESS)
	}
	if r.Particles < 0 || r.Diversity < 0 {
		return fmt.Errorf("%w: particles %d, diversity %d, want >= 0", ErrRefit, r.Particles, r.Diversity)
	}
	k := len(s.Segments)
	size := make([]int, k)
	seen := make(map[string]bool, n)
	tol := 1e-9 * cfg.Threshold
	for i, p := range r.Products {
		if p == "" {
			return fmt.Errorf("%w: products[%d] is empty", ErrRefit, i)
		}
		if seen[p] {
			return fmt.Errorf("%w: products[%d] = %q appears twice", ErrRefit, i, p)
		}
		seen[p] = true
		if r.Data[i] == nil {
			return fmt.Errorf("%w: data[%d] (product %q) is nil", ErrRefit, i, p)
		}
		c := s.Partition[i]
		if c < 0 || c >= k {
			return fmt.Errorf("%w: summary.partition[%d] = %d, want 0..%d", ErrRefit, i, c, k-1)
		}
		size[c]++
		if len(s.Membership[i]) != k {
			return fmt.Errorf("%w: summary.membership[%d] has %d entries for %d segments", ErrRefit, i, len(s.Membership[i]), k)
		}
		for j, m := range s.Membership[i] {
			if !(m >= 0 && m <= 1) {
				return fmt.Errorf("%w: summary.membership[%d][%d] = %v, want in [0, 1]", ErrRefit, i, j, m)
			}
		}
		nx := s.Next[i]
		if nx.Defined != (r.Data[i].N() < r.Data[i].L()) {
			return fmt.Errorf("%w: summary.next[%d].defined = %v with %d of %d competitors reported", ErrRefit, i, nx.Defined, r.Data[i].N(), r.Data[i].L())
		}
		if !nx.Defined {
			continue
		}
		if math.Abs(nx.Threshold-cfg.Threshold) > tol {
			return fmt.Errorf("%w: summary.next[%d].threshold %v, config threshold %v", ErrRefit, i, nx.Threshold, cfg.Threshold)
		}
		if !(nx.Excess >= 0) || math.IsInf(nx.Excess, 1) {
			return fmt.Errorf("%w: summary.next[%d].excess = %v, want finite and >= 0", ErrRefit, i, nx.Excess)
		}
		if !(nx.PExceed >= 0 && nx.PExceed <= 1) {
			return fmt.Errorf("%w: summary.next[%d].pexceed = %v, want in [0, 1]", ErrRefit, i, nx.PExceed)
		}
		for _, q := range []float64{nx.Median, nx.Lo, nx.Hi} {
			if math.IsNaN(q) || math.IsInf(q, 0) || q < 0 {
				return fmt.Errorf("%w: summary.next[%d] quantiles %v, %v, %v, want finite and >= 0", ErrRefit, i, nx.Lo, nx.Median, nx.Hi)
			}
		}
	}
	if cfg.Rule == RuleFilter {
		if len(r.Emission) != n {
			return fmt.Errorf("%w: emission has %d entries for %d products (the filter rule needs it)", ErrRefit, len(r.Emission), n)
		}
		for i, row := range r.Emission {
			if len(row) != k {
				return fmt.Errorf("%w: emission[%d] has %d entries for %d segments", ErrRefit, i, len(row), k)
			}
			finiteOne := false
			for c, v := range row {
				if math.IsNaN(v) || math.IsInf(v, 1) {
					return fmt.Errorf("%w: emission[%d][%d] = %v, want a log density below +Inf", ErrRefit, i, c, v)
				}
				finiteOne = finiteOne || !math.IsInf(v, -1)
			}
			if !finiteOne {
				return fmt.Errorf("%w: emission[%d] is -Inf for every segment", ErrRefit, i)
			}
		}
	}
	for c, m := range size {
		if m == 0 {
			return fmt.Errorf("%w: summary.segments[%d] has no product in summary.partition", ErrRefit, c)
		}
		if mr := s.Segments[c].MeanReported; math.IsNaN(mr) || math.IsInf(mr, 0) {
			return fmt.Errorf("%w: summary.segments[%d].mean_reported = %v, want finite", ErrRefit, c, mr)
		}
	}
	return nil
}
