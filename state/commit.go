package state

import (
	"encoding/json"
	"fmt"
	"math"

	bolt "go.etcd.io/bbolt"
)

// CategoryUpdate is everything a micro-batch changes in one category.
type CategoryUpdate struct {
	// Category is the category name (the bucket under cat); 1 to 32768
	// bytes.
	Category string
	// Snapshot is the encoded particle system; nil or empty leaves the
	// stored snapshot as it is.
	Snapshot []byte
	// Products are written (replacing whole records) keyed by
	// ProductRecord.Product.
	Products []ProductRecord
	// Removed are product ids whose records are deleted; ids without a
	// record are ignored. An id may not also appear in Products.
	Removed []string
	// Alerts is the alert memory from package alerts; nil or empty leaves
	// the stored memory as it is.
	Alerts []byte
	// Meta, when not nil, replaces the category's metadata.
	Meta *CategoryMeta
}

// Batch is one micro-batch's worth of changes, committed all together by
// Commit.
type Batch struct {
	// Categories are the per-category changes; each category at most once.
	Categories []CategoryUpdate
	// Outbox are events appended to the outbox, in this order, after every
	// event already there.
	Outbox []OutboxEvent
	// Position, when not nil, replaces the stored input position.
	Position *Position
}

// encodedCategory is a validated CategoryUpdate with its values already
// encoded, so that the write transaction only copies bytes.
type encodedCategory struct {
	name     []byte
	snapshot []byte
	alerts   []byte
	meta     []byte // nil: unchanged
	products []keyValue
	removed  [][]byte
}

type keyValue struct{ key, value []byte }

type encodedBatch struct {
	categories []encodedCategory
	outbox     [][]byte
	position   []byte // nil: unchanged
}

func (e *encodedBatch) empty() bool {
	return len(e.categories) == 0 && len(e.outbox) == 0 && e.position == nil
}

// Commit writes the whole batch in ONE write transaction and returns
// after bbolt has fsynced it: afterwards either every change of the batch
// is in the file or, if Commit returns an error, none is.
//
// The batch is validated and encoded before the transaction starts; a
// batch that breaks a rule (an empty or oversized category or product
// name, a category twice, a product twice or both written and removed, a
// non-finite number, an outbox event without id or subject) is refused
// with an error wrapping ErrInvalid that names the field, and nothing is
// written. An empty batch writes nothing and returns nil. The caller keeps
// ownership of the batch; Commit does not retain it.
func (s *Store) Commit(b Batch) error {
	enc, err := encodeBatch(&b)
	if err != nil {
		return fmt.Errorf("state %s: commit: %w", s.path, err)
	}
	if enc.empty() {
		return nil
	}
	err = s.update(func(tx *bolt.Tx) error {
		if err := writeBatch(tx, enc); err != nil {
			return err
		}
		if s.beforeCommit != nil {
			return s.beforeCommit(tx)
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("state %s: commit: %w", s.path, err)
	}
	return nil
}

func encodeBatch(b *Batch) (*encodedBatch, error) {
	enc := &encodedBatch{}
	seen := make(map[string]bool, len(b.Categories))
	for i := range b.Categories {
		cu := &b.Categories[i]
		field := fmt.Sprintf("Categories[%d]", i)
		if err := checkName(cu.Category, field+".Category"); err != nil {
			return nil, err
		}
		if seen[cu.Category] {
			return nil, fmt.Errorf("%s.Category: %q appears twice in the batch: %w", field, cu.Category, ErrInvalid)
		}
		seen[cu.Category] = true
		ec, err := encodeCategory(cu, field)
		if err != nil {
			return nil, err
		}
		enc.categories = append(enc.categories, ec)
	}
	for i := range b.Outbox {
		ev := &b.Outbox[i]
		field := fmt.Sprintf("Outbox[%d]", i)
		if ev.ID == "" {
			return nil, fmt.Errorf("%s.ID: empty: %w", field, ErrInvalid)
		}
		if ev.Subject == "" {
			return nil, fmt.Errorf("%s.Subject: empty (event %s): %w", field, ev.ID, ErrInvalid)
		}
		v, err := json.Marshal(ev)
		if err != nil {
			return nil, fmt.Errorf("%s: encode OutboxEvent %s: %w: %w", field, ev.ID, err, ErrInvalid)
		}
		enc.outbox = append(enc.outbox, v)
	}
	if b.Position != nil {
		v, err := json.Marshal(b.Position)
		if err != nil {
			return nil, fmt.Errorf("Position: encode: %w: %w", err, ErrInvalid)
		}
		enc.position = v
	}
	return enc, nil
}

func encodeCategory(cu *CategoryUpdate, field string) (encodedCategory, error) {
	ec := encodedCategory{
		name:     []byte(cu.Category),
		snapshot: cu.Snapshot,
		alerts:   cu.Alerts,
	}
	if cu.Meta != nil {
		v, err := json.Marshal(cu.Meta)
		if err != nil {
			return ec, fmt.Errorf("%s.Meta: encode CategoryMeta: %w: %w", field, err, ErrInvalid)
		}
		ec.meta = v
	}
	written := make(map[string]bool, len(cu.Products))
	for j := range cu.Products {
		rec := &cu.Products[j]
		pf := fmt.Sprintf("%s.Products[%d]", field, j)
		if err := checkRecord(rec, pf); err != nil {
			return ec, err
		}
		if written[rec.Product] {
			return ec, fmt.Errorf("%s.Product: %q appears twice in category %q: %w", pf, rec.Product, cu.Category, ErrInvalid)
		}
		written[rec.Product] = true
		v, err := json.Marshal(rec)
		if err != nil {
			return ec, fmt.Errorf("%s: encode ProductRecord %s: %w: %w", pf, rec.Product, err, ErrInvalid)
		}
		ec.products = append(ec.products, keyValue{[]byte(rec.Product), v})
	}
	for j, id := range cu.Removed {
		rf := fmt.Sprintf("%s.Removed[%d]", field, j)
		if err := checkName(id, rf); err != nil {
			return ec, err
		}
		if written[id] {
			return ec, fmt.Errorf("%s: %q is both written and removed in category %q: %w", rf, id, cu.Category, ErrInvalid)
		}
		ec.removed = append(ec.removed, []byte(id))
	}
	return ec, nil
}

// checkName enforces bbolt's key rules on a category or product name.
func checkName(name, field string) error {
	switch {
	case name == "":
		return fmt.Errorf("%s: empty: %w", field, ErrInvalid)
	case len(name) > bolt.MaxKeySize:
		return fmt.Errorf("%s: %d bytes, at most %d: %w", field, len(name), bolt.MaxKeySize, ErrInvalid)
	}
	return nil
}

func checkRecord(rec *ProductRecord, field string) error {
	if err := checkName(rec.Product, field+".Product"); err != nil {
		return err
	}
	for k, v := range rec.Relative {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("%s.Relative[%d]: %v (product %s), want a finite number: %w", field, k, v, rec.Product, ErrInvalid)
		}
	}
	for k, d := range rec.Dropped {
		if math.IsNaN(d.Value) || math.IsInf(d.Value, 0) {
			return fmt.Errorf("%s.Dropped[%d].Value: %v (product %s), want a finite number: %w", field, k, d.Value, rec.Product, ErrInvalid)
		}
	}
	if math.IsNaN(rec.Own) || math.IsInf(rec.Own, 0) {
		return fmt.Errorf("%s.Own: %v (product %s), want a finite number: %w", field, rec.Own, rec.Product, ErrInvalid)
	}
	return nil
}

// writeBatch puts an encoded batch into the write transaction tx.
func writeBatch(tx *bolt.Tx, enc *encodedBatch) error {
	if len(enc.categories) > 0 {
		cats := tx.Bucket(bucketCat)
		if cats == nil {
			return fmt.Errorf("bucket cat missing: %w", ErrCorrupt)
		}
		for i := range enc.categories {
			if err := writeCategory(cats, &enc.categories[i]); err != nil {
				return err
			}
		}
	}
	if len(enc.outbox) > 0 {
		out := tx.Bucket(bucketOutbox)
		if out == nil {
			return fmt.Errorf("bucket outbox missing: %w", ErrCorrupt)
		}
		// Keys only ever grow, so pages can be filled up.
		out.FillPercent = 0.95
		for _, v := range enc.outbox {
			seq, err := out.NextSequence()
			if err != nil {
				return fmt.Errorf("outbox: next sequence: %w", err)
			}
			if err := out.Put(seqKey(seq), v); err != nil {
				return fmt.Errorf("put outbox/%d: %w", seq, err)
			}
		}
	}
	if enc.position != nil {
		in := tx.Bucket(bucketInput)
		if in == nil {
			return fmt.Errorf("bucket input missing: %w", ErrCorrupt)
		}
		if err := in.Put(keyPosition, enc.position); err != nil {
			return fmt.Errorf("put input/position: %w", err)
		}
	}
	return nil
}

func writeCategory(cats *bolt.Bucket, ec *encodedCategory) error {
	b, err := cats.CreateBucketIfNotExists(ec.name)
	if err != nil {
		return fmt.Errorf("create bucket cat/%s: %w", ec.name, err)
	}
	put := func(key, value []byte) error {
		if len(value) == 0 {
			return nil
		}
		if err := b.Put(key, value); err != nil {
			return fmt.Errorf("put cat/%s/%s: %w", ec.name, key, err)
		}
		return nil
	}
	if err := put(keySnapshot, ec.snapshot); err != nil {
		return err
	}
	if err := put(keyAlerts, ec.alerts); err != nil {
		return err
	}
	if err := put(keyCatMeta, ec.meta); err != nil {
		return err
	}
	if len(ec.products) == 0 && len(ec.removed) == 0 {
		return nil
	}
	pb, err := b.CreateBucketIfNotExists(bucketProducts)
	if err != nil {
		return fmt.Errorf("create bucket cat/%s/products: %w", ec.name, err)
	}
	for _, kv := range ec.products {
		if err := pb.Put(kv.key, kv.value); err != nil {
			return fmt.Errorf("put cat/%s/products/%s: %w", ec.name, kv.key, err)
		}
	}
	for _, id := range ec.removed {
		if err := pb.Delete(id); err != nil {
			return fmt.Errorf("delete cat/%s/products/%s: %w", ec.name, id, err)
		}
	}
	return nil
}
