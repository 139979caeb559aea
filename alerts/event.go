package alerts

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
)

// Kind names what an event reports. Its string is the last token of the
// event's NATS subject.
type Kind string

// The kinds of event Evaluate produces.
const (
	KindMoved   Kind = "moved"   // a product's reported segment changed
	KindBorn    Kind = "born"    // a segment appeared (fresh id)
	KindRetired Kind = "retired" // a segment disappeared (its id is never reused)
	KindSplit   Kind = "split"   // one previous segment went to two or more
	KindMerged  Kind = "merged"  // two or more previous segments went to one
	KindMissed  Kind = "missed"  // a product probably has an unreported competitor
	KindCleared Kind = "cleared" // a missed-competitor alert no longer holds
	KindSummary Kind = "summary" // one per refit, last
)

// typeSuffix returns the part of the CloudEvents type after the
// producer's prefix: "segment.moved", "competitor.missed" or
// "refit.summary"; "" for an unknown kind.
func (k Kind) typeSuffix() string {
	switch k {
	case KindMoved, KindBorn, KindRetired, KindSplit, KindMerged:
		return "segment." + string(k)
	case KindMissed, KindCleared:
		return "competitor." + string(k)
	case KindSummary:
		return "refit.summary"
	}
	return ""
}

// Type returns the CloudEvents type of the kind under a reverse-DNS
// prefix, e.g. "com.example.rivalmix.segment.moved" with
// DefaultTypePrefix; "" for an unknown kind.
func (k Kind) Type(prefix string) string {
	if s := k.typeSuffix(); s != "" {
		return prefix + "." + s
	}
	return ""
}

// DefaultSubjectPrefix is the default leading tokens of output subjects.
const DefaultSubjectPrefix = "rivalmix.out"

// Event is one output of Evaluate: a plain value, safe to copy and to
// share between goroutines once built.
type Event struct {
	// ID is EventID(Category, Refit, Kind, Subject): 32 lowercase hex
	// digits, the same whenever the same refit is evaluated again, so a
	// republished event is recognised as a duplicate downstream.
	ID       string
	Kind     Kind
	Category string
	Refit    string
	// Subject is what the event is about: a product id (moved, missed,
	// cleared), a segment id (born, retired, split: the previous
	// segment, merged: the new segment) or the category (summary).
	Subject string
	// Data is the body, one of Moved, Born, Retired, Split, Merged,
	// Missed, Cleared or RefitSummary, matching Kind.
	Data any
}

// NewEvent returns an event with its deterministic id.
func NewEvent(category, refit string, kind Kind, subject string, data any) Event {
	return Event{ID: EventID(category, refit, kind, subject), Kind: kind,
		Category: category, Refit: refit, Subject: subject, Data: data}
}

// EventID returns the first 32 hex digits (128 bits) of the SHA-256 of
// category, refit, kind and subject, each written as its length in bytes
// (unsigned varint, encoding/binary) followed by its bytes, so that no two
// different tuples hash the same input.
func EventID(category, refit string, kind Kind, subject string) string {
	var buf []byte
	for _, s := range []string{category, refit, string(kind), subject} {
		buf = binary.AppendUvarint(buf, uint64(len(s)))
		buf = append(buf, s...)
	}
	sum := sha256.Sum256(buf)
	return hex.EncodeToString(sum[:16])
}

// NATSSubject returns prefix.<category>.<kind>, for example
// "rivalmix.out.breakfast-cereal.moved" with DefaultSubjectPrefix. The
// category is used as it is: it must be one subject token (no '.', '*',
// '>' or white space), which holds for a category taken from an input
// subject.
func (e Event) NATSSubject(prefix string) string {
	return prefix + "." + e.Category + "." + string(e.Kind)
}

// Moved is the body of a moved event: the product's reported segment
// changed from From to To.
type Moved struct {
	Category string `json:"category"`
	Refit    string `json:"refit"`
	Product  string `json:"product"`
	From     string `json:"from"`
	To       string `json:"to"`
	// FromMembership and ToMembership, in [0, 1], are the product's mean
	// posterior similarity to the members of From's and To's point
	// segments in this refit; FromMembership is 0 when From is retired.
	FromMembership float64 `json:"from_membership"`
	ToMembership   float64 `json:"to_membership"`
	// FromRetired is true when From no longer exists.
	FromRetired bool `json:"from_retired,omitempty"`
	// Probability, under the filter rule (Config.Rule), is the filter's
	// probability that the product has switched segment since its label
	// From was set, in [MoveProb, 1] unless From retired (then any value:
	// the segment went, not necessarily the product); absent under the
	// band rule.
	Probability *float64 `json:"probability,omitempty"`
}

// Born is the body of a born event: a point segment that matched no
// previous segment and got a fresh id.
type Born struct {
	Category string `json:"category"`
	Refit    string `json:"refit"`
	Segment  string `json:"segment"`
	// Size is the number of products in the segment.
	Size int `json:"size"`
	// Medians are the posterior medians (over draws) of the strongest, second and
	// third strongest relative cross-elasticity of the segment's members
	// (sequential.SegmentSummary.Median), as far as defined.
	Medians []float64 `json:"medians"`
	// MeanReported is the typical number of reported competitors of a
	// member (sequential.SegmentSummary.MeanReported).
	MeanReported float64 `json:"mean_reported"`
}

// Retired is the body of a retired event: a previous segment that no
// point segment matched.
type Retired struct {
	Category string `json:"category"`
	Refit    string `json:"refit"`
	Segment  string `json:"segment"`
	// Size is the number of its members at the previous refit.
	Size int `json:"size"`
	// Successor is the segment that took most of its still-present
	// members ("" when none is left).
	Successor string `json:"successor,omitempty"`
}

// Split is the body of a split event: at least Config.SplitShare of the
// still-present members of the previous segment Segment went to each of
// Into (new point segments, largest first).
type Split struct {
	Category string   `json:"category"`
	Refit    string   `json:"refit"`
	Segment  string   `json:"segment"`
	Into     []string `json:"into"`
	// Shares[j], in [SplitShare, 1], is the share of Segment's present
	// members now in Into[j].
	Shares []float64 `json:"shares"`
}

// Merged is the body of a merged event: each segment of From sent at
// least Config.SplitShare of its still-present members to the new point
// segment Segment.
type Merged struct {
	Category string   `json:"category"`
	Refit    string   `json:"refit"`
	Segment  string   `json:"segment"`
	From     []string `json:"from"`
	// Shares[j], in [SplitShare, 1], is the share of From[j]'s present
	// members now in Segment.
	Shares []float64 `json:"shares"`
}

// Missed is the body of a missed event: the product's strongest
// unreported competitor probably has a relative cross-elasticity above
// Threshold.
type Missed struct {
	Category string `json:"category"`
	Refit    string `json:"refit"`
	Product  string `json:"product"`
	// Segment is the product's reported segment.
	Segment string `json:"segment"`
	// Threshold is t, a relative cross-elasticity.
	Threshold float64 `json:"threshold"`
	// Probability, in [AlertProb, 1], is P(next value > Threshold).
	Probability float64 `json:"probability"`
	// Median, Lo and Hi are quantiles of the next value (relative
	// cross-elasticity): 0.5 and the interval the summary was asked for
	// (10% and 90% by default).
	Median float64 `json:"median"`
	Lo     float64 `json:"lo"`
	Hi     float64 `json:"hi"`
	// Reported are the product's reported values, descending.
	Reported []float64 `json:"reported"`
	// Competitors is L, the number of candidates the refit considered.
	Competitors int `json:"competitors"`
	// TypicalReported is the typical number of reported competitors in
	// the product's segment (sequential.SegmentSummary.MeanReported).
	TypicalReported float64 `json:"typical_reported"`
	// Previous is the probability of the last alert when this one is a
	// repeat because the probability rose by RealertMargin; absent for a
	// first alert.
	Previous *float64 `json:"previous,omitempty"`
	// Excess is E[(next value - Threshold)+], the expected amount by
	// which the next value exceeds the threshold: what the alerts are
	// ranked by.
	Excess float64 `json:"excess"`
	// Rank, from 1, is the product's place among the category's alerts
	// in force after this refit, by Excess (Outcome.Watchlist).
	Rank int `json:"rank"`
	// Status is "new" for a first alert and "still" for a repeat.
	Status string `json:"status"`
}

// Cleared is the body of a cleared event: an alerted product's
// probability fell below AlertProb - RealertMargin, or it now reports all
// its candidates (no next value).
type Cleared struct {
	Category  string  `json:"category"`
	Refit     string  `json:"refit"`
	Product   string  `json:"product"`
	Segment   string  `json:"segment"`
	Threshold float64 `json:"threshold"`
	// Probability is P(next value > Threshold) now, 0 without a next value.
	Probability float64 `json:"probability"`
	// Alerted is the probability carried by the last missed event.
	Alerted float64 `json:"alerted"`
	// NoNextValue is true when the product reported every candidate.
	NoNextValue bool `json:"no_next_value,omitempty"`
	// OverBudget is true when the alert still meets the threshold rule
	// but fell outside the category's alert budget.
	OverBudget bool `json:"over_budget,omitempty"`
}

// RefitSummary is the body of the summary event, one per refit.
type RefitSummary struct {
	Category string `json:"category"`
	Refit    string `json:"refit"`
	// Products is the number of products present.
	Products int `json:"products"`
	// Segments is the number of point segments.
	Segments int `json:"segments"`
	// Event counts of this refit.
	Moves int `json:"moves"`
	// Pending is the number of products that met the move conditions
	// but wait for Config.Confirm consecutive refits.
	Pending int `json:"pending"`
	// Provisional is the number of products whose label is provisional
	// (new, not yet held for Config.Confirm refits).
	Provisional int `json:"provisional"`
	Births      int `json:"births"`
	Retirements int `json:"retirements"`
	Splits      int `json:"splits"`
	Merges      int `json:"merges"`
	Alerts      int `json:"alerts"`
	Clears      int `json:"clears"`
	// ActiveAlerts is the number of products with an alert in force after
	// this refit.
	ActiveAlerts int `json:"active_alerts"`
	// ESS is the effective sample size of the particles, in [1, Particles].
	ESS float64 `json:"ess"`
	// Particles is P; Diversity, in [1, P], the number of distinct
	// ancestors of the particles.
	Particles int `json:"particles"`
	Diversity int `json:"diversity"`
	// MeanSurprise is the mean, over the data this refit added or
	// replaced, of the negative log predictive density (nats) that
	// sequential.Particles.Add and Replace returned (their return value
	// with its sign turned): higher means more surprising. Absent when
	// the refit changed no datum.
	MeanSurprise Float `json:"mean_surprise,omitzero"`
	// ARI, in [-1, 1], is the adjusted Rand index between the previous and
	// the new point partition over the products present in both; absent
	// on the first refit or with fewer than two such products.
	ARI Float `json:"ari,omitzero"`
}
