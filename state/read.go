package state

import (
	"bytes"
	"encoding/json"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// Every read below runs in one short read transaction of its own and
// copies what it returns out of the memory map before the transaction
// ends, so returned slices are the caller's to keep and modify. Two calls
// may see different commits; Summary reads everything it reports in one
// transaction.

// Categories returns the names of all categories with stored state, in
// byte order.
func (s *Store) Categories() ([]string, error) {
	var out []string
	err := s.view(func(tx *bolt.Tx) error {
		cats := tx.Bucket(bucketCat)
		if cats == nil {
			return nil
		}
		return cats.ForEachBucket(func(k []byte) error {
			out = append(out, string(k))
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("state %s: list cat: %w", s.path, err)
	}
	return out, nil
}

// category returns the bucket cat/<name>, or nil.
func category(tx *bolt.Tx, name string) *bolt.Bucket {
	cats := tx.Bucket(bucketCat)
	if cats == nil || name == "" {
		return nil
	}
	return cats.Bucket([]byte(name))
}

// getCopy returns a copy of cat/<name>/<key>, or nil.
func (s *Store) getCopy(cat string, key []byte) ([]byte, error) {
	var out []byte
	err := s.view(func(tx *bolt.Tx) error {
		if b := category(tx, cat); b != nil {
			out = bytes.Clone(b.Get(key))
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("state %s: get cat/%s/%s: %w", s.path, cat, key, err)
	}
	return out, nil
}

// Snapshot returns a copy of the category's encoded particle system, or
// nil, nil when there is none.
func (s *Store) Snapshot(cat string) ([]byte, error) {
	return s.getCopy(cat, keySnapshot)
}

// Alerts returns a copy of the category's alert memory, or nil, nil when
// there is none.
func (s *Store) Alerts(cat string) ([]byte, error) {
	return s.getCopy(cat, keyAlerts)
}

// Meta returns the category's metadata; ok is false when none is stored.
func (s *Store) Meta(cat string) (meta CategoryMeta, ok bool, err error) {
	raw, err := s.getCopy(cat, keyCatMeta)
	if err != nil || raw == nil {
		return CategoryMeta{}, false, err
	}
	if err := json.Unmarshal(raw, &meta); err != nil {
		return CategoryMeta{}, false, fmt.Errorf("state %s: cat/%s/meta: decode CategoryMeta: %w", s.path, cat, err)
	}
	return meta, true, nil
}

// Product returns the record of one product; ok is false when the
// category or the product has none. Withdrawn products keep their record
// (with Withdrawn set) until a batch removes it.
func (s *Store) Product(cat, id string) (rec ProductRecord, ok bool, err error) {
	var raw []byte
	err = s.view(func(tx *bolt.Tx) error {
		if b := category(tx, cat); b != nil {
			if pb := b.Bucket(bucketProducts); pb != nil && id != "" {
				raw = bytes.Clone(pb.Get([]byte(id)))
			}
		}
		return nil
	})
	if err != nil {
		return ProductRecord{}, false, fmt.Errorf("state %s: get cat/%s/products/%s: %w", s.path, cat, id, err)
	}
	if raw == nil {
		return ProductRecord{}, false, nil
	}
	if err := json.Unmarshal(raw, &rec); err != nil {
		return ProductRecord{}, false, fmt.Errorf("state %s: cat/%s/products/%s: decode ProductRecord: %w", s.path, cat, id, err)
	}
	return rec, true, nil
}

// Products returns every product record of the category, ordered by
// product id (byte order); nil when there are none.
func (s *Store) Products(cat string) ([]ProductRecord, error) {
	var out []ProductRecord
	err := s.view(func(tx *bolt.Tx) error {
		b := category(tx, cat)
		if b == nil {
			return nil
		}
		pb := b.Bucket(bucketProducts)
		if pb == nil {
			return nil
		}
		// json.Unmarshal copies everything it keeps out of v.
		return pb.ForEach(func(k, v []byte) error {
			var rec ProductRecord
			if err := json.Unmarshal(v, &rec); err != nil {
				return fmt.Errorf("cat/%s/products/%s: decode ProductRecord: %w", cat, k, err)
			}
			out = append(out, rec)
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("state %s: products of %s: %w", s.path, cat, err)
	}
	return out, nil
}

// Applied returns the redelivery key of a product's last applied message:
// its content hash and refit id. ok is false when the product has no
// record, in which case the message has not been applied.
func (s *Store) Applied(cat, product string) (hash [32]byte, refit string, ok bool, err error) {
	rec, ok, err := s.Product(cat, product)
	if err != nil || !ok {
		return hash, "", false, err
	}
	return rec.Hash, rec.Refit, true, nil
}

// Position returns the stored input position; ok is false when none has
// been committed yet, in which case the input is to be read from its
// start.
func (s *Store) Position() (pos Position, ok bool, err error) {
	var raw []byte
	err = s.view(func(tx *bolt.Tx) error {
		if in := tx.Bucket(bucketInput); in != nil {
			raw = bytes.Clone(in.Get(keyPosition))
		}
		return nil
	})
	if err != nil {
		return Position{}, false, fmt.Errorf("state %s: get input/position: %w", s.path, err)
	}
	if raw == nil {
		return Position{}, false, nil
	}
	if err := json.Unmarshal(raw, &pos); err != nil {
		return Position{}, false, fmt.Errorf("state %s: input/position: decode Position: %w", s.path, err)
	}
	return pos, true, nil
}
