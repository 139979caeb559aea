package alerts

import (
	"fmt"
	"maps"
	"math"
	"slices"
	"strconv"
	"strings"
)

// Memory is what the alert rules remember about one category between
// refits. Evaluate never modifies the Memory it is given and returns a
// fresh one. Its JSON encoding (field order as declared, map keys sorted
// by encoding/json) is stable, so equal memories encode to equal bytes.
// The zero value is the memory of a category never evaluated.
type Memory struct {
	// Issued is the number of segment ids handed out so far: ids S1 ..
	// S<Issued> exist or existed, and the next fresh id is S<Issued+1>.
	// Ids are never reused.
	Issued int `json:"issued"`
	// Refit is the id of the last refit evaluated ("" before the first).
	Refit string `json:"refit"`
	// Point maps each product present at the last refit to the id of its
	// point segment (sequential.Summary.Partition, labelled). Its set of
	// values is the set of live segment ids.
	Point map[string]string `json:"point"`
	// Reported maps each product present at the last refit to its
	// reported segment id: the point segment, held back by the move
	// hysteresis. It may name a retired segment until the product's
	// membership to a live one reaches Config.MoveIn.
	Reported map[string]string `json:"reported"`
	// Provisional holds the products whose label is still provisional
	// (see Evaluate): new, and their label not yet unchanged for
	// Config.Confirm refits. The value, in [1, Confirm), is the number of
	// refits the label has stood, counting the one that set it.
	Provisional map[string]int `json:"provisional"`
	// Pending holds the products that met the move conditions at the
	// last refit but not yet for Config.Confirm refits in a row.
	Pending map[string]PendingMove `json:"pending"`
	// Alert holds the missed-competitor memory of products that have had
	// a missed or cleared event.
	Alert map[string]AlertMemory `json:"alert"`
	// Filter holds the switch filter's state of each product present at
	// the last refit evaluated with Config.Rule = RuleFilter: for each
	// live segment id, [P(in it, no switch since the label was set),
	// P(in it, switched since)], summing to 1 over the ids (filter.go).
	// Absent under the band rule; a memory written without it (an older
	// version, or the band rule) starts each product's filter from its
	// reported segment.
	Filter map[string]map[string][2]float64 `json:"filter,omitempty"`
}

// PendingMove is a move that has met its conditions at Count (>= 1)
// consecutive refits, fewer than Config.Confirm, towards segment To.
type PendingMove struct {
	To    string `json:"to"`
	Count int    `json:"count"`
}

// AlertMemory is the missed-competitor state of one product.
type AlertMemory struct {
	// Active is true from a missed event until the next cleared event.
	Active bool `json:"active"`
	// Probability, in [0, 1], is P(next value > Config.Threshold) as
	// carried by the product's last missed or cleared event.
	Probability float64 `json:"probability"`
	// Refit is the refit id of that event.
	Refit string `json:"refit"`
}

// Validate reports the first inconsistency: a segment id not of the form
// S<k> with 1 <= k <= Issued, an empty product id, a provisional or
// pending count below 1, or an alert probability outside [0, 1]. Errors wrap ErrMemory.
func (m Memory) Validate() error {
	if m.Issued < 0 {
		return fmt.Errorf("%w: issued %d, want >= 0", ErrMemory, m.Issued)
	}
	check := func(field string, ids map[string]string) error {
		for _, p := range slices.Sorted(maps.Keys(ids)) {
			if p == "" {
				return fmt.Errorf("%w: %s has an empty product id", ErrMemory, field)
			}
			k, ok := parseSegmentID(ids[p])
			if !ok || k > m.Issued {
				return fmt.Errorf("%w: %s[%q] = %q, want S1..S%d", ErrMemory, field, p, ids[p], m.Issued)
			}
		}
		return nil
	}
	if err := check("point", m.Point); err != nil {
		return err
	}
	if err := check("reported", m.Reported); err != nil {
		return err
	}
	for _, p := range slices.Sorted(maps.Keys(m.Provisional)) {
		if p == "" || m.Provisional[p] < 1 {
			return fmt.Errorf("%w: provisional[%q] = %d, want a product and a count >= 1", ErrMemory, p, m.Provisional[p])
		}
	}
	for _, p := range slices.Sorted(maps.Keys(m.Pending)) {
		pm := m.Pending[p]
		if k, ok := parseSegmentID(pm.To); p == "" || !ok || k > m.Issued || pm.Count < 1 {
			return fmt.Errorf("%w: pending[%q] = %+v, want a product, S1..S%d and count >= 1", ErrMemory, p, pm, m.Issued)
		}
	}
	for _, p := range slices.Sorted(maps.Keys(m.Alert)) {
		a := m.Alert[p]
		if p == "" {
			return fmt.Errorf("%w: alert has an empty product id", ErrMemory)
		}
		if !(a.Probability >= 0 && a.Probability <= 1) {
			return fmt.Errorf("%w: alert[%q].probability %v, want in [0, 1]", ErrMemory, p, a.Probability)
		}
	}
	for _, p := range slices.Sorted(maps.Keys(m.Filter)) {
		if p == "" {
			return fmt.Errorf("%w: filter has an empty product id", ErrMemory)
		}
		sum := 0.0
		for _, id := range slices.Sorted(maps.Keys(m.Filter[p])) {
			v := m.Filter[p][id]
			if k, ok := parseSegmentID(id); !ok || k > m.Issued {
				return fmt.Errorf("%w: filter[%q] names segment %q, want S1..S%d", ErrMemory, p, id, m.Issued)
			}
			for _, x := range v {
				if !(x >= 0 && x <= 1) {
					return fmt.Errorf("%w: filter[%q][%q] = %v, want probabilities in [0, 1]", ErrMemory, p, id, v)
				}
				sum += x
			}
		}
		if math.Abs(sum-1) > 1e-6 {
			return fmt.Errorf("%w: filter[%q] sums to %v, want 1", ErrMemory, p, sum)
		}
	}
	return nil
}

// SegmentID returns the id of the k-th segment ever issued (k >= 1): S1,
// S2, ... This package is the one place that names segments; a batch fit
// with no history names its point segments the way a category's first
// refit does.
func SegmentID(k int) string { return "S" + strconv.Itoa(k) }

// parseSegmentID returns k for "S<k>", k >= 1 written without leading
// zeros or sign.
func parseSegmentID(id string) (int, bool) {
	digits, ok := strings.CutPrefix(id, "S")
	if !ok || digits == "" || digits[0] < '1' || digits[0] > '9' {
		return 0, false
	}
	for _, ch := range digits {
		if ch < '0' || ch > '9' {
			return 0, false
		}
	}
	k, err := strconv.Atoi(digits)
	if err != nil {
		return 0, false
	}
	return k, true
}

// compareSegmentIDs orders ids by their number (S2 before S10); ids that
// do not parse come last, in string order.
func compareSegmentIDs(a, b string) int {
	ka, oka := parseSegmentID(a)
	kb, okb := parseSegmentID(b)
	switch {
	case oka && okb:
		return ka - kb
	case oka:
		return -1
	case okb:
		return 1
	}
	return strings.Compare(a, b)
}
