package input

import "strconv"

// Kind tells which of the three input shapes a [Message] has.
type Kind int

const (
	// KindDatum is one product's refit result: its relative cross
	// elasticities against the competitors the refit kept.
	KindDatum Kind = iota + 1
	// KindRefitComplete says every product of a refit has been sent,
	// e.g. {"refit":"2026-W48","complete":true,"expected":275}.
	KindRefitComplete
	// KindWithdrawn says a product has left its category,
	// e.g. {"product":"P-1042","withdrawn":true}.
	KindWithdrawn
)

// String returns the kind's name as used in logs and metrics labels.
func (k Kind) String() string {
	switch k {
	case KindDatum:
		return "datum"
	case KindRefitComplete:
		return "refit-complete"
	case KindWithdrawn:
		return "withdrawn"
	}
	return "Kind(" + strconv.Itoa(int(k)) + ")"
}

// DroppedEntry is a non-positive relative cross elasticity (a complement,
// or zero for "not significant") removed before modelling. It is kept in
// the message, and from there in the product's stored record, so that
// nothing the refit reported is lost.
type DroppedEntry struct {
	// ID is the competitor's id; empty when the message gave no ids.
	ID string `json:"id,omitempty"`
	// Value is the relative cross elasticity, <= 0 (never -0).
	Value float64 `json:"value"`
}

// Message is one decoded and validated input message. It shares no memory
// with the payload it was decoded from.
type Message struct {
	// Kind says which fields below are meaningful.
	Kind Kind
	// Product is the product id (KindDatum, KindWithdrawn): 1..128 bytes
	// of printable UTF-8 with no whitespace.
	Product string
	// Refit names the refit (KindDatum, KindRefitComplete; optional for
	// KindWithdrawn, then empty), with the same rules as Product.
	Refit string
	// Competitors is L, the number of candidate competitors the refit
	// considered, 1..[MaxCompetitors]; the decode option's default when
	// the message does not say. KindDatum only.
	Competitors int
	// Relative holds the positive relative cross elasticities (cross
	// elasticity / |own elasticity|, dimensionless), finite, sorted
	// descending, ties ordered by id. Never nil for KindDatum; may be empty.
	// len(Relative)+len(Dropped) <= Competitors.
	Relative []float64
	// IDs are the competitor ids aligned with Relative; nil when the
	// message gave none, otherwise len(IDs) == len(Relative).
	IDs []string
	// Dropped are the non-positive entries removed from Relative, sorted
	// like Relative; nil when none.
	Dropped []DroppedEntry
	// Own is the product's own-price elasticity (< 0) when the message
	// gave raw cross elasticities; 0 when it gave relative values.
	Own float64
	// Expected is the number of products the refit sent
	// (KindRefitComplete), 0..2147483647; 0 when not given.
	Expected int
	// Hash is the SHA-256 of the message's canonical content (kind,
	// product, refit, Competitors, Relative, IDs, Dropped, Expected). It
	// does not depend on key order, whitespace, number spelling, entry
	// order or on which of the two datum forms was used, so it recognises
	// a redelivered message that was already applied. Own is not part of
	// it: only the relative values reach the model.
	Hash [32]byte
}
