package state

import (
	"encoding/binary"
	"encoding/json"
	"fmt"

	bolt "go.etcd.io/bbolt"
)

// Outbox returns the oldest pending events, in the order they were
// committed, at most limit of them (all when limit <= 0). The returned
// entries are copies. Entries stay in the outbox until DeleteOutbox
// removes them, so a publisher that crashes before deleting sends them
// again; the event id lets the output stream drop the repeat.
func (s *Store) Outbox(limit int) ([]OutboxEntry, error) {
	var out []OutboxEntry
	err := s.view(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketOutbox)
		if b == nil {
			return nil
		}
		c := b.Cursor()
		for k, v := c.First(); k != nil && (limit <= 0 || len(out) < limit); k, v = c.Next() {
			if len(k) != 8 {
				return fmt.Errorf("outbox/%x: key of %d bytes, want 8", k, len(k))
			}
			e := OutboxEntry{Seq: binary.BigEndian.Uint64(k)}
			if err := json.Unmarshal(v, &e.Event); err != nil {
				return fmt.Errorf("outbox/%d: decode OutboxEvent: %w", e.Seq, err)
			}
			out = append(out, e)
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("state %s: read outbox: %w", s.path, err)
	}
	return out, nil
}

// OutboxLen returns the number of pending events. It walks the outbox's
// keys, which a publisher keeps short.
func (s *Store) OutboxLen() (int, error) {
	n := 0
	err := s.view(func(tx *bolt.Tx) error {
		n = outboxLen(tx)
		return nil
	})
	if err != nil {
		return 0, fmt.Errorf("state %s: count outbox: %w", s.path, err)
	}
	return n, nil
}

func outboxLen(tx *bolt.Tx) int {
	b := tx.Bucket(bucketOutbox)
	if b == nil {
		return 0
	}
	n := 0
	c := b.Cursor()
	for k, _ := c.First(); k != nil; k, _ = c.Next() {
		n++
	}
	return n
}

// DeleteOutbox removes the given entries in one write transaction
// (fsynced). Sequence numbers with no entry are ignored, so a publisher
// may repeat a delete after a crash. Sequence numbers are never reused.
func (s *Store) DeleteOutbox(seqs ...uint64) error {
	if len(seqs) == 0 {
		return nil
	}
	err := s.update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucketOutbox)
		if b == nil {
			return fmt.Errorf("bucket outbox missing: %w", ErrCorrupt)
		}
		for _, seq := range seqs {
			if err := b.Delete(seqKey(seq)); err != nil {
				return fmt.Errorf("delete outbox/%d: %w", seq, err)
			}
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("state %s: delete from outbox: %w", s.path, err)
	}
	return nil
}
