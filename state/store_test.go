package state

import (
	"bytes"
	"crypto/sha256"
	"errors"
	"fmt"
	"math"
	"path/filepath"
	"reflect"
	"strings"
	"sync"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"
)

// openTemp opens a new store in a fresh temporary directory and closes it
// when the test ends.
func openTemp(t testing.TB) (*Store, string) {
	t.Helper()
	path := filepath.Join(t.TempDir(), "state.db")
	s, err := Open(path, Options{})
	if err != nil {
		t.Fatalf("Open(%s): %v", path, err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s, path
}

// record returns a product record whose content depends on id and refit.
func record(id, refit string, seq uint64) ProductRecord {
	return ProductRecord{
		Product:     id,
		Refit:       refit,
		Hash:        sha256.Sum256([]byte(id + "/" + refit)),
		Competitors: 10,
		Relative:    []float64{0.94, 0.52, 0.31},
		IDs:         []string{id + "-a", id + "-b", id + "-c"},
		Dropped:     []DroppedEntry{{ID: id + "-z", Value: -0.25}},
		Own:         -2.4,
		AppliedSeq:  seq,
	}
}

var when = time.Date(2026, 11, 30, 12, 0, 0, 0, time.UTC)

// sampleBatch is a batch touching two categories, the outbox and the
// position.
func sampleBatch() Batch {
	return Batch{
		Categories: []CategoryUpdate{
			{
				Category: "cereal",
				Snapshot: []byte("cereal particles v1"),
				Products: []ProductRecord{record("P-1", "2026-W48", 1), record("P-2", "2026-W48", 2)},
				Alerts:   []byte(`{"segments":{"S1":["P-1"]}}`),
				Meta:     &CategoryMeta{LastRefit: "2026-W48", Refits: 1, Products: 2, Segments: 1, Events: 2, UpdatedAt: when},
			},
			{
				Category: "coffee",
				Snapshot: []byte("coffee particles v1"),
				Products: []ProductRecord{record("Q-1", "2026-W48", 3)},
			},
		},
		Outbox: []OutboxEvent{
			{ID: "ev-1", Subject: "rivalmix.out.cereal.segment_moved", Headers: map[string]string{"ce-type": "moved"}, Data: []byte(`{"product":"P-1"}`)},
			{ID: "ev-2", Subject: "rivalmix.out.cereal.refit_summary", Data: []byte(`{}`)},
		},
		Position: &Position{Stream: "RIVALMIX_IN", StreamSeq: 3, UpdatedAt: when},
	}
}

// dump reads everything the store holds through its public API, as a
// comparable string.
func dump(t *testing.T, s *Store) string {
	t.Helper()
	var b strings.Builder
	cats, err := s.Categories()
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range cats {
		snap, err := s.Snapshot(c)
		if err != nil {
			t.Fatal(err)
		}
		al, err := s.Alerts(c)
		if err != nil {
			t.Fatal(err)
		}
		meta, ok, err := s.Meta(c)
		if err != nil {
			t.Fatal(err)
		}
		prods, err := s.Products(c)
		if err != nil {
			t.Fatal(err)
		}
		fmt.Fprintf(&b, "cat %s snapshot=%q alerts=%q meta=%v/%+v\n", c, snap, al, ok, meta)
		for _, p := range prods {
			fmt.Fprintf(&b, "  %+v\n", p)
		}
	}
	out, err := s.Outbox(0)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range out {
		fmt.Fprintf(&b, "outbox %d %+v\n", e.Seq, e.Event)
	}
	pos, ok, err := s.Position()
	if err != nil {
		t.Fatal(err)
	}
	fmt.Fprintf(&b, "position %v %+v\n", ok, pos)
	return b.String()
}

func TestCommitRoundTrip(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	b := sampleBatch()
	if err := s.Commit(b); err != nil {
		t.Fatalf("Commit: %v", err)
	}

	cats, err := s.Categories()
	if err != nil {
		t.Fatal(err)
	}
	if want := []string{"cereal", "coffee"}; !reflect.DeepEqual(cats, want) {
		t.Errorf("Categories() = %q, want %q", cats, want)
	}
	for _, cu := range b.Categories {
		snap, err := s.Snapshot(cu.Category)
		if err != nil || !bytes.Equal(snap, cu.Snapshot) {
			t.Errorf("Snapshot(%s) = %q, %v; want %q", cu.Category, snap, err, cu.Snapshot)
		}
		al, err := s.Alerts(cu.Category)
		if err != nil || !bytes.Equal(al, cu.Alerts) {
			t.Errorf("Alerts(%s) = %q, %v; want %q", cu.Category, al, err, cu.Alerts)
		}
		got, err := s.Products(cu.Category)
		if err != nil || !reflect.DeepEqual(got, cu.Products) {
			t.Errorf("Products(%s) = %+v, %v\nwant %+v", cu.Category, got, err, cu.Products)
		}
		for _, want := range cu.Products {
			rec, ok, err := s.Product(cu.Category, want.Product)
			if err != nil || !ok || !reflect.DeepEqual(rec, want) {
				t.Errorf("Product(%s, %s) = %+v, %v, %v; want %+v", cu.Category, want.Product, rec, ok, err, want)
			}
			hash, refit, ok, err := s.Applied(cu.Category, want.Product)
			if err != nil || !ok || hash != [32]byte(want.Hash) || refit != want.Refit {
				t.Errorf("Applied(%s, %s) = %x, %q, %v, %v; want %x, %q", cu.Category, want.Product, hash, refit, ok, err, want.Hash, want.Refit)
			}
		}
		meta, ok, err := s.Meta(cu.Category)
		switch {
		case err != nil:
			t.Errorf("Meta(%s): %v", cu.Category, err)
		case cu.Meta == nil && ok:
			t.Errorf("Meta(%s) = %+v, want none", cu.Category, meta)
		case cu.Meta != nil && (!ok || meta != *cu.Meta):
			t.Errorf("Meta(%s) = %+v, %v; want %+v", cu.Category, meta, ok, *cu.Meta)
		}
	}

	out, err := s.Outbox(0)
	if err != nil {
		t.Fatal(err)
	}
	if len(out) != len(b.Outbox) {
		t.Fatalf("Outbox(0) has %d entries, want %d", len(out), len(b.Outbox))
	}
	for i, e := range out {
		if e.Seq != uint64(i+1) || !reflect.DeepEqual(e.Event, b.Outbox[i]) {
			t.Errorf("Outbox entry %d = %d %+v, want %d %+v", i, e.Seq, e.Event, i+1, b.Outbox[i])
		}
	}
	pos, ok, err := s.Position()
	if err != nil || !ok || pos != *b.Position {
		t.Errorf("Position() = %+v, %v, %v; want %+v", pos, ok, err, *b.Position)
	}
}

func TestMissingReadsAreEmpty(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	if cats, err := s.Categories(); err != nil || len(cats) != 0 {
		t.Errorf("Categories() on a new file = %q, %v", cats, err)
	}
	if snap, err := s.Snapshot("nope"); err != nil || snap != nil {
		t.Errorf("Snapshot(nope) = %q, %v; want nil, nil", snap, err)
	}
	if al, err := s.Alerts("nope"); err != nil || al != nil {
		t.Errorf("Alerts(nope) = %q, %v; want nil, nil", al, err)
	}
	if _, ok, err := s.Meta("nope"); err != nil || ok {
		t.Errorf("Meta(nope) ok=%v err=%v", ok, err)
	}
	if _, ok, err := s.Product("nope", "P-1"); err != nil || ok {
		t.Errorf("Product(nope, P-1) ok=%v err=%v", ok, err)
	}
	if _, _, ok, err := s.Applied("nope", "P-1"); err != nil || ok {
		t.Errorf("Applied(nope, P-1) ok=%v err=%v", ok, err)
	}
	if prods, err := s.Products("nope"); err != nil || prods != nil {
		t.Errorf("Products(nope) = %v, %v", prods, err)
	}
	if _, ok, err := s.Position(); err != nil || ok {
		t.Errorf("Position() on a new file ok=%v err=%v", ok, err)
	}
	if n, err := s.OutboxLen(); err != nil || n != 0 {
		t.Errorf("OutboxLen() = %d, %v", n, err)
	}
}

func TestReturnedBytesAreCopies(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	if err := s.Commit(sampleBatch()); err != nil {
		t.Fatal(err)
	}
	snap, err := s.Snapshot("cereal")
	if err != nil {
		t.Fatal(err)
	}
	for i := range snap {
		snap[i] = 'X' // would fault if it pointed into bbolt's read-only map
	}
	again, err := s.Snapshot("cereal")
	if err != nil || string(again) != "cereal particles v1" {
		t.Errorf("Snapshot after modifying a returned copy = %q, %v", again, err)
	}
}

func TestLaterBatchesReplaceAndRemove(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	if err := s.Commit(sampleBatch()); err != nil {
		t.Fatal(err)
	}
	p1 := record("P-1", "2026-W49", 7)
	withdrawn := ProductRecord{Product: "P-3", Hash: sha256.Sum256([]byte("withdraw P-3")), Withdrawn: true, AppliedSeq: 8}
	err := s.Commit(Batch{Categories: []CategoryUpdate{{
		Category: "cereal",
		// Snapshot, Alerts and Meta nil: left as they are.
		Products: []ProductRecord{p1, withdrawn},
		Removed:  []string{"P-2", "never-there"},
	}}})
	if err != nil {
		t.Fatal(err)
	}
	prods, err := s.Products("cereal")
	if err != nil {
		t.Fatal(err)
	}
	if want := []ProductRecord{p1, withdrawn}; !reflect.DeepEqual(prods, want) {
		t.Errorf("Products(cereal) = %+v\nwant %+v", prods, want)
	}
	if snap, _ := s.Snapshot("cereal"); string(snap) != "cereal particles v1" {
		t.Errorf("Snapshot changed by a batch without one: %q", snap)
	}
	if al, _ := s.Alerts("cereal"); string(al) != `{"segments":{"S1":["P-1"]}}` {
		t.Errorf("Alerts changed by a batch without them: %q", al)
	}
	if meta, ok, _ := s.Meta("cereal"); !ok || meta.LastRefit != "2026-W48" {
		t.Errorf("Meta changed by a batch without it: %+v %v", meta, ok)
	}
	if pos, _, _ := s.Position(); pos.StreamSeq != 3 {
		t.Errorf("Position changed by a batch without one: %+v", pos)
	}
}

func TestPosition(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	for i, seq := range []uint64{5, 9, 9, 12} {
		want := Position{Stream: "RIVALMIX_IN", StreamSeq: seq, UpdatedAt: when.Add(time.Duration(i) * time.Second)}
		if err := s.Commit(Batch{Position: &want}); err != nil {
			t.Fatal(err)
		}
		got, ok, err := s.Position()
		if err != nil || !ok || got != want {
			t.Fatalf("after commit %d: Position() = %+v, %v, %v; want %+v", i, got, ok, err, want)
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s2, err := Open(path, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if got, ok, err := s2.Position(); err != nil || !ok || got.StreamSeq != 12 {
		t.Errorf("Position() after reopen = %+v, %v, %v; want sequence 12", got, ok, err)
	}
}

// TestInvalidBatchWritesNothing checks that every validation rule refuses
// the whole batch, even when the bad element comes after good ones.
func TestInvalidBatchWritesNothing(t *testing.T) {
	t.Parallel()
	good := func() Batch { return sampleBatch() }
	tests := []struct {
		name   string
		mutate func(*Batch)
		field  string // expected in the error message
	}{
		{"empty category", func(b *Batch) { b.Categories[1].Category = "" }, "Categories[1].Category"},
		{"category twice", func(b *Batch) { b.Categories[1].Category = "cereal" }, "appears twice"},
		{"long category", func(b *Batch) { b.Categories[1].Category = strings.Repeat("c", bolt.MaxKeySize+1) }, "Categories[1].Category"},
		{"empty product", func(b *Batch) { b.Categories[1].Products[0].Product = "" }, "Categories[1].Products[0].Product"},
		{"product twice", func(b *Batch) { b.Categories[0].Products[1].Product = "P-1" }, "Categories[0].Products[1].Product"},
		{"NaN relative", func(b *Batch) { b.Categories[1].Products[0].Relative[2] = math.NaN() }, "Categories[1].Products[0].Relative[2]"},
		{"Inf dropped", func(b *Batch) { b.Categories[1].Products[0].Dropped[0].Value = math.Inf(-1) }, "Dropped[0].Value"},
		{"NaN own", func(b *Batch) { b.Categories[0].Products[0].Own = math.NaN() }, "Products[0].Own"},
		{"empty removed", func(b *Batch) { b.Categories[0].Removed = []string{""} }, "Categories[0].Removed[0]"},
		{"written and removed", func(b *Batch) { b.Categories[0].Removed = []string{"P-2"} }, "both written and removed"},
		{"event without id", func(b *Batch) { b.Outbox[1].ID = "" }, "Outbox[1].ID"},
		{"event without subject", func(b *Batch) { b.Outbox[1].Subject = "" }, "Outbox[1].Subject"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			s, _ := openTemp(t)
			before := dump(t, s)
			b := good()
			tc.mutate(&b)
			err := s.Commit(b)
			if !errors.Is(err, ErrInvalid) {
				t.Fatalf("Commit: error %v, want ErrInvalid", err)
			}
			if !strings.Contains(err.Error(), tc.field) {
				t.Errorf("Commit error %q does not name %q", err, tc.field)
			}
			if after := dump(t, s); after != before {
				t.Errorf("a refused batch changed the store:\nbefore:\n%s\nafter:\n%s", before, after)
			}
		})
	}
}

// TestErrorInsideTransactionRollsBack fails the write transaction after
// every part of the batch has been put, and checks that none of it stays.
func TestErrorInsideTransactionRollsBack(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	first := sampleBatch()
	if err := s.Commit(first); err != nil {
		t.Fatal(err)
	}
	before := dump(t, s)

	boom := errors.New("injected failure")
	s.beforeCommit = func(tx *bolt.Tx) error {
		// Everything is in place inside the transaction at this point.
		if v := tx.Bucket(bucketCat).Bucket([]byte("tea")).Get(keySnapshot); string(v) != "tea v1" {
			t.Errorf("inside the transaction, cat/tea/snapshot = %q", v)
		}
		return boom
	}
	second := Batch{
		Categories: []CategoryUpdate{
			{Category: "cereal", Snapshot: []byte("cereal v2"), Products: []ProductRecord{record("P-1", "2026-W49", 10)}, Removed: []string{"P-2"}, Alerts: []byte(`{}`), Meta: &CategoryMeta{LastRefit: "2026-W49"}},
			{Category: "tea", Snapshot: []byte("tea v1"), Products: []ProductRecord{record("T-1", "2026-W49", 11)}},
		},
		Outbox:   []OutboxEvent{{ID: "ev-3", Subject: "s"}},
		Position: &Position{StreamSeq: 11},
	}
	if err := s.Commit(second); !errors.Is(err, boom) {
		t.Fatalf("Commit with a failing transaction: %v, want the injected error", err)
	}
	if after := dump(t, s); after != before {
		t.Errorf("a rolled back batch changed the store:\nbefore:\n%s\nafter:\n%s", before, after)
	}

	// The outbox sequence was not consumed either: the next event gets 3.
	s.beforeCommit = nil
	if err := s.Commit(Batch{Outbox: []OutboxEvent{{ID: "ev-3", Subject: "s"}}}); err != nil {
		t.Fatal(err)
	}
	out, err := s.Outbox(0)
	if err != nil || len(out) != 3 || out[2].Seq != 3 {
		t.Errorf("outbox after rollback and commit = %+v, %v; want sequence 3 last", out, err)
	}

	// And the file on disk agrees after a reopen.
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s2, err := Open(path, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if _, ok, _ := s2.Product("tea", "T-1"); ok {
		t.Error("rolled back product tea/T-1 is on disk")
	}
}

func TestReopenKeepsEverything(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	if err := s.Commit(sampleBatch()); err != nil {
		t.Fatal(err)
	}
	if err := s.Commit(Batch{Categories: []CategoryUpdate{{Category: "cereal", Removed: []string{"P-2"}}}}); err != nil {
		t.Fatal(err)
	}
	if err := s.DeleteOutbox(1); err != nil {
		t.Fatal(err)
	}
	before := dump(t, s)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Errorf("second Close: %v", err)
	}
	if _, err := s.Categories(); !errors.Is(err, ErrClosed) {
		t.Errorf("Categories after Close: %v, want ErrClosed", err)
	}
	if err := s.Commit(sampleBatch()); !errors.Is(err, ErrClosed) {
		t.Errorf("Commit after Close: %v, want ErrClosed", err)
	}

	s2, err := Open(path, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if after := dump(t, s2); after != before {
		t.Errorf("reopened store differs:\nbefore:\n%s\nafter:\n%s", before, after)
	}
}

func TestReadOnly(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	if err := s.Commit(sampleBatch()); err != nil {
		t.Fatal(err)
	}
	want := dump(t, s)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	ro, err := Open(path, Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer ro.Close()
	if got := dump(t, ro); got != want {
		t.Errorf("read-only view differs:\n%s\nwant\n%s", got, want)
	}
	if err := ro.Commit(sampleBatch()); !errors.Is(err, bolt.ErrDatabaseReadOnly) {
		t.Errorf("Commit on a read-only store: %v, want ErrDatabaseReadOnly", err)
	}
	if err := ro.DeleteOutbox(1); !errors.Is(err, bolt.ErrDatabaseReadOnly) {
		t.Errorf("DeleteOutbox on a read-only store: %v, want ErrDatabaseReadOnly", err)
	}
}

// TestConcurrentUse runs writers and readers together; run with -race.
func TestConcurrentUse(t *testing.T) {
	t.Parallel()
	s, _ := openTemp(t)
	const writers, commits = 4, 10
	var wg sync.WaitGroup
	for w := range writers {
		wg.Go(func() {
			cat := fmt.Sprintf("cat-%d", w)
			for i := range commits {
				err := s.Commit(Batch{
					Categories: []CategoryUpdate{{Category: cat, Snapshot: []byte(fmt.Sprint(i)), Products: []ProductRecord{record(fmt.Sprintf("P-%d", i), "r", uint64(i))}}},
					Outbox:     []OutboxEvent{{ID: fmt.Sprintf("%s-%d", cat, i), Subject: "s"}},
				})
				if err != nil {
					t.Error(err)
					return
				}
			}
		})
		wg.Go(func() {
			for range commits {
				if _, err := s.Summary(); err != nil {
					t.Error(err)
					return
				}
				if _, err := s.Outbox(5); err != nil {
					t.Error(err)
					return
				}
			}
		})
	}
	wg.Wait()
	if n, err := s.OutboxLen(); err != nil || n != writers*commits {
		t.Errorf("OutboxLen() = %d, %v; want %d", n, err, writers*commits)
	}
	for w := range writers {
		prods, err := s.Products(fmt.Sprintf("cat-%d", w))
		if err != nil || len(prods) != commits {
			t.Errorf("cat-%d has %d products (%v), want %d", w, len(prods), err, commits)
		}
	}
}

func TestHashJSON(t *testing.T) {
	t.Parallel()
	h := Hash(sha256.Sum256([]byte("x")))
	text, err := h.MarshalText()
	if err != nil || len(text) != 64 || string(text) != h.String() {
		t.Fatalf("MarshalText = %q, %v", text, err)
	}
	var back Hash
	if err := back.UnmarshalText(text); err != nil || back != h {
		t.Errorf("UnmarshalText round trip = %x, %v", back, err)
	}
	for _, bad := range []string{"", "abc", strings.Repeat("zz", 32)} {
		if err := back.UnmarshalText([]byte(bad)); err == nil {
			t.Errorf("UnmarshalText(%q) accepted", bad)
		}
	}
}
