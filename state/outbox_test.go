package state

import (
	"fmt"
	"slices"
	"testing"
)

func outboxIDs(t *testing.T, s *Store, limit int) (ids []string, seqs []uint64) {
	t.Helper()
	out, err := s.Outbox(limit)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range out {
		ids = append(ids, e.Event.ID)
		seqs = append(seqs, e.Seq)
	}
	return ids, seqs
}

func TestOutboxOrderAndDelete(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)

	// 3 commits of 100 events: more than fit one page, and past 255 so a
	// little-endian or varint key would sort wrongly.
	var want []string
	for c := range 3 {
		var b Batch
		for i := range 100 {
			id := fmt.Sprintf("c%d-e%03d", c, i)
			b.Outbox = append(b.Outbox, OutboxEvent{ID: id, Subject: "rivalmix.out.cereal.x", Data: []byte(id)})
			want = append(want, id)
		}
		if err := s.Commit(b); err != nil {
			t.Fatal(err)
		}
	}
	ids, seqs := outboxIDs(t, s, 0)
	if !slices.Equal(ids, want) {
		t.Fatalf("Outbox(0) ids out of commit order:\n%v", ids)
	}
	for i, seq := range seqs {
		if seq != uint64(i+1) {
			t.Fatalf("Outbox(0)[%d].Seq = %d, want %d", i, seq, i+1)
		}
	}
	if ids, _ := outboxIDs(t, s, 7); !slices.Equal(ids, want[:7]) {
		t.Errorf("Outbox(7) = %v, want %v", ids, want[:7])
	}

	// Publisher acks the first 10 out of order, plus one twice and one
	// that never existed.
	if err := s.DeleteOutbox(3, 1, 2, 10, 9, 8, 7, 6, 5, 4, 4, 100000); err != nil {
		t.Fatal(err)
	}
	if n, err := s.OutboxLen(); err != nil || n != 290 {
		t.Errorf("OutboxLen() after deleting 10 of 300 = %d, %v", n, err)
	}
	ids, seqs = outboxIDs(t, s, 2)
	if !slices.Equal(ids, want[10:12]) || !slices.Equal(seqs, []uint64{11, 12}) {
		t.Errorf("Outbox(2) after delete = %v %v, want %v [11 12]", ids, seqs, want[10:12])
	}
	if err := s.DeleteOutbox(); err != nil {
		t.Errorf("DeleteOutbox() with no sequences: %v", err)
	}

	// Sequence numbers are never reused, even after emptying the outbox
	// and reopening the file.
	if err := s.DeleteOutbox(seqs...); err != nil {
		t.Fatal(err)
	}
	_, rest := outboxIDs(t, s, 0)
	if err := s.DeleteOutbox(rest...); err != nil {
		t.Fatal(err)
	}
	if n, _ := s.OutboxLen(); n != 0 {
		t.Fatalf("OutboxLen() after deleting everything = %d", n)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s2, err := Open(path, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if err := s2.Commit(Batch{Outbox: []OutboxEvent{{ID: "late", Subject: "s"}}}); err != nil {
		t.Fatal(err)
	}
	if ids, seqs := outboxIDs(t, s2, 0); !slices.Equal(ids, []string{"late"}) || seqs[0] != 301 {
		t.Errorf("after emptying and reopening, new event = %v %v, want [late] [301]", ids, seqs)
	}
}
