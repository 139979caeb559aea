package state

import (
	"encoding/binary"
	"encoding/json"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// Summary is an overview of a state file, read in one transaction.
type Summary struct {
	// Path is the state file's path.
	Path string `json:"path"`
	// Schema is the schema version in meta/schema (0 for an empty file
	// opened read-only).
	Schema uint32 `json:"schema"`
	// FileBytes is the size of the file's used pages, in bytes.
	FileBytes int64 `json:"file_bytes"`
	// Position is the input position; HasPosition is false when none is
	// stored (the input will be read from its start).
	Position    Position `json:"position"`
	HasPosition bool     `json:"has_position"`
	// Outbox is the number of pending events; OutboxFirst and OutboxLast
	// are the oldest and newest sequence numbers (0 when empty).
	Outbox      int    `json:"outbox"`
	OutboxFirst uint64 `json:"outbox_first,omitempty"`
	OutboxLast  uint64 `json:"outbox_last,omitempty"`
	// Categories are ordered by name.
	Categories []CategorySummary `json:"categories"`
}

// CategorySummary describes one category of a Summary.
type CategorySummary struct {
	// Category is the category name.
	Category string `json:"category"`
	// Products counts stored product records; Withdrawn counts those of
	// them marked withdrawn.
	Products  int `json:"products"`
	Withdrawn int `json:"withdrawn"`
	// SnapshotBytes and AlertsBytes are the sizes of the stored particle
	// system and alert memory (0 when absent).
	SnapshotBytes int `json:"snapshot_bytes"`
	AlertsBytes   int `json:"alerts_bytes"`
	// Meta is the category's metadata; HasMeta is false when none is
	// stored.
	Meta    CategoryMeta `json:"meta"`
	HasMeta bool         `json:"has_meta"`
}

// Summary reads an overview of the whole file in one read transaction.
// It decodes every product record, so it costs time in proportion to
// the number of products.
func (s *Store) Summary() (Summary, error) {
	sum := Summary{Path: s.path}
	err := s.view(func(tx *bolt.Tx) error {
		sum.FileBytes = tx.Size()
		if meta := tx.Bucket(bucketMeta); meta != nil {
			if v := meta.Get(keySchema); len(v) == 4 {
				sum.Schema = binary.BigEndian.Uint32(v)
			}
		}
		if in := tx.Bucket(bucketInput); in != nil {
			if v := in.Get(keyPosition); v != nil {
				if err := json.Unmarshal(v, &sum.Position); err != nil {
					return fmt.Errorf("input/position: decode Position: %w", err)
				}
				sum.HasPosition = true
			}
		}
		if out := tx.Bucket(bucketOutbox); out != nil {
			sum.Outbox = outboxLen(tx)
			c := out.Cursor()
			if k, _ := c.First(); len(k) == 8 {
				sum.OutboxFirst = binary.BigEndian.Uint64(k)
			}
			if k, _ := c.Last(); len(k) == 8 {
				sum.OutboxLast = binary.BigEndian.Uint64(k)
			}
		}
		cats := tx.Bucket(bucketCat)
		if cats == nil {
			return nil
		}
		return cats.ForEachBucket(func(name []byte) error {
			cs, err := summarizeCategory(cats.Bucket(name), string(name))
			if err != nil {
				return err
			}
			sum.Categories = append(sum.Categories, cs)
			return nil
		})
	})
	if err != nil {
		return Summary{}, fmt.Errorf("state %s: summary: %w", s.path, err)
	}
	return sum, nil
}

func summarizeCategory(b *bolt.Bucket, name string) (CategorySummary, error) {
	cs := CategorySummary{
		Category:      name,
		SnapshotBytes: len(b.Get(keySnapshot)),
		AlertsBytes:   len(b.Get(keyAlerts)),
	}
	if v := b.Get(keyCatMeta); v != nil {
		if err := json.Unmarshal(v, &cs.Meta); err != nil {
			return cs, fmt.Errorf("cat/%s/meta: decode CategoryMeta: %w", name, err)
		}
		cs.HasMeta = true
	}
	pb := b.Bucket(bucketProducts)
	if pb == nil {
		return cs, nil
	}
	err := pb.ForEach(func(k, v []byte) error {
		var rec struct {
			Withdrawn bool `json:"withdrawn"`
		}
		if err := json.Unmarshal(v, &rec); err != nil {
			return fmt.Errorf("cat/%s/products/%s: decode ProductRecord: %w", name, k, err)
		}
		cs.Products++
		if rec.Withdrawn {
			cs.Withdrawn++
		}
		return nil
	})
	return cs, err
}
