package state

import (
	"encoding/hex"
	"fmt"
	"time"
)

// Hash is a 32-byte content hash (SHA-256 of a message's canonical
// content, as computed by package stream). It is stored as 64 lowercase
// hex digits in JSON. A [32]byte value assigns to it directly.
type Hash [32]byte

// MarshalText encodes the hash as 64 lowercase hex digits.
func (h Hash) MarshalText() ([]byte, error) {
	out := make([]byte, hex.EncodedLen(len(h)))
	hex.Encode(out, h[:])
	return out, nil
}

// UnmarshalText decodes exactly 64 hex digits.
func (h *Hash) UnmarshalText(text []byte) error {
	if len(text) != hex.EncodedLen(len(h)) {
		return fmt.Errorf("hash: %d hex digits, want %d", len(text), hex.EncodedLen(len(h)))
	}
	var tmp Hash
	if _, err := hex.Decode(tmp[:], text); err != nil {
		return fmt.Errorf("hash: %w", err)
	}
	*h = tmp
	return nil
}

// String returns the hash in hex.
func (h Hash) String() string { return hex.EncodeToString(h[:]) }

// DroppedEntry is a competitor entry the refit reported with a
// non-positive relative cross elasticity; it does not reach the model but
// is kept so that nothing the refit said is lost.
type DroppedEntry struct {
	// ID is the competitor's id; empty when the message gave none.
	ID string `json:"id,omitempty"`
	// Value is the relative cross elasticity (dimensionless), <= 0 and finite.
	Value float64 `json:"value"`
}

// ProductRecord is what the store keeps per product: its last applied
// datum and the key that recognises a redelivery of the message that
// carried it. Stored at cat/<category>/products/<Product>.
type ProductRecord struct {
	// Product is the product id and the record's key; never empty.
	Product string `json:"product"`
	// Refit is the refit whose datum was applied last; empty for a
	// withdrawal that named no refit.
	Refit string `json:"refit,omitempty"`
	// Hash is the content hash of the last applied message (datum or
	// withdrawal). Together with Refit it is the redelivery key.
	Hash Hash `json:"hash"`
	// Competitors is L, the number of candidate competitors the refit
	// considered (0 for a withdrawal).
	Competitors int `json:"competitors,omitempty"`
	// Relative are the positive relative cross elasticities
	// (dimensionless), sorted descending, finite.
	Relative []float64 `json:"relative,omitempty"`
	// IDs are the competitor ids aligned with Relative, or nil.
	IDs []string `json:"ids,omitempty"`
	// Dropped are the non-positive entries the refit reported.
	Dropped []DroppedEntry `json:"dropped,omitempty"`
	// Own is the product's own-price elasticity (< 0) when the message gave
	// raw cross elasticities, 0 otherwise. Informational only.
	Own float64 `json:"own,omitempty"`
	// Withdrawn is true once the product has left its category; the record
	// stays so that a redelivered withdrawal is recognised.
	Withdrawn bool `json:"withdrawn,omitempty"`
	// AppliedSeq is the input stream sequence of the message applied last.
	AppliedSeq uint64 `json:"applied_seq,omitempty"`
}

// CategoryMeta is a category's bookkeeping, stored at cat/<category>/meta.
// Every field is the caller's; the store only keeps it.
type CategoryMeta struct {
	// LastRefit is the last refit settled for the category.
	LastRefit string `json:"last_refit,omitempty"`
	// Refits is the number of refits settled so far.
	Refits int `json:"refits,omitempty"`
	// Products is the number of products the model currently holds
	// (withdrawn products excluded).
	Products int `json:"products,omitempty"`
	// Segments is the number of segments in the last point partition.
	Segments int `json:"segments,omitempty"`
	// Events is the number of events emitted for the category so far.
	Events int `json:"events,omitempty"`
	// UpdatedAt is when the caller last changed the category (UTC).
	UpdatedAt time.Time `json:"updated_at,omitzero"`
	// Position, when > 0, is the input stream sequence up to which every
	// message of the category is applied; the partitioned service keeps
	// it per category (one worker's file holds categories of several
	// partitions, each at its own place in the stream).
	Position uint64 `json:"position,omitempty"`
}

// Position is how far the input stream has been applied, stored at
// input/position.
type Position struct {
	// Stream names the input stream the sequence belongs to (e.g.
	// "RIVALMIX_IN"); optional.
	Stream string `json:"stream,omitempty"`
	// StreamSeq is the stream sequence up to which the input's effects are
	// committed, as the caller defines it; the store does not check that
	// it grows.
	StreamSeq uint64 `json:"stream_seq"`
	// UpdatedAt is when the caller committed the position (UTC).
	UpdatedAt time.Time `json:"updated_at,omitzero"`
}

// OutboxEvent is one message waiting to be published. ID becomes the
// Nats-Msg-Id header so that a republish after a crash is de-duplicated.
type OutboxEvent struct {
	// ID is the event id; never empty.
	ID string `json:"id"`
	// Subject is the subject to publish on; never empty.
	Subject string `json:"subject"`
	// Headers are NATS headers (e.g. the CloudEvents ce-* attributes).
	Headers map[string]string `json:"headers,omitempty"`
	// Data is the message body (base64 in the stored JSON).
	Data []byte `json:"data,omitempty"`
}

// OutboxEntry is an OutboxEvent with the sequence number it was stored
// under; pass Seq to [Store.DeleteOutbox] once the publish is acknowledged.
type OutboxEntry struct {
	// Seq is the outbox key: >= 1, increasing in commit order, never reused.
	Seq uint64
	// Event is the stored event.
	Event OutboxEvent
}
