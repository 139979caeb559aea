package state

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	bolt "go.etcd.io/bbolt"
)

// rawUpdate changes a bbolt file directly, bypassing the Store.
func rawUpdate(t *testing.T, path string, fn func(tx *bolt.Tx) error) {
	t.Helper()
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	if err := db.Update(fn); err != nil {
		t.Fatal(err)
	}
	if err := db.Close(); err != nil {
		t.Fatal(err)
	}
}

// rawSchema reads meta/schema directly; -1 when absent.
func rawSchema(t *testing.T, path string) int64 {
	t.Helper()
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second, ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	v := int64(-1)
	_ = db.View(func(tx *bolt.Tx) error {
		if m := tx.Bucket(bucketMeta); m != nil {
			if b := m.Get(keySchema); len(b) == 4 {
				v = int64(binary.BigEndian.Uint32(b))
			}
		}
		return nil
	})
	return v
}

func putSchema(version uint32) func(tx *bolt.Tx) error {
	return func(tx *bolt.Tx) error {
		m, err := tx.CreateBucketIfNotExists(bucketMeta)
		if err != nil {
			return err
		}
		return m.Put(keySchema, binary.BigEndian.AppendUint32(nil, version))
	}
}

func TestOpenLockedFile(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	start := time.Now()
	_, err := Open(path, Options{Timeout: 100 * time.Millisecond})
	elapsed := time.Since(start)
	if !errors.Is(err, ErrLocked) {
		t.Fatalf("second Open of a held file: %v, want ErrLocked", err)
	}
	if !strings.Contains(err.Error(), "locked by another process") || !strings.Contains(err.Error(), path) {
		t.Errorf("lock error %q should say the file is locked and name it", err)
	}
	// The timeout is 100 ms; a second allows for a loaded machine while
	// still catching an Open that waits for ever (bbolt's zero Timeout).
	if elapsed > time.Second {
		t.Errorf("second Open took %v with a 100ms timeout", elapsed)
	}
	if _, err := Open(path, Options{Timeout: 50 * time.Millisecond, ReadOnly: true}); !errors.Is(err, ErrLocked) {
		t.Errorf("read-only Open of a file held for writing: %v, want ErrLocked", err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s2, err := Open(path, Options{Timeout: 100 * time.Millisecond})
	if err != nil {
		t.Fatalf("Open after the holder closed: %v", err)
	}
	_ = s2.Close()
}

// bigFile writes a state file with a few thousand product records (about
// a hundred leaf pages and a branch page above them) and returns its path.
func bigFile(t *testing.T) string {
	t.Helper()
	s, path := openTemp(t)
	for c := range 3 {
		var prods []ProductRecord
		for i := range 1000 {
			prods = append(prods, record(fmt.Sprintf("P-%d-%04d", c, i), "2026-W48", uint64(c*1000+i)))
		}
		if err := s.Commit(Batch{Categories: []CategoryUpdate{{Category: "cereal", Snapshot: []byte("snap"), Products: prods}}}); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	return path
}

// inUsePage returns the page size and the middle one of the file's
// in-use (not free) pages of the given type, "leaf" or "branch".
func inUsePage(t *testing.T, path, typ string) (pageSize int, id int) {
	t.Helper()
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	var ids []int
	err = db.View(func(tx *bolt.Tx) error {
		for i := 2; ; i++ {
			info, err := tx.Page(i)
			if err != nil {
				return err
			}
			if info == nil {
				return nil // past the high-water mark
			}
			if info.Type == typ {
				ids = append(ids, i)
			}
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(ids) == 0 {
		t.Fatalf("%s has no %s pages", path, typ)
	}
	return db.Info().PageSize, ids[len(ids)/2]
}

func readAt(t *testing.T, path string, off int64, n int) []byte {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	b := make([]byte, n)
	if _, err := f.ReadAt(b, off); err != nil {
		t.Fatal(err)
	}
	return b
}

func overwrite(t *testing.T, path string, off int64, b []byte) {
	t.Helper()
	f, err := os.OpenFile(path, os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.WriteAt(b, off); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
}

// TestOpenRefusesDamagedFile damages real files and expects ErrCorrupt.
//
// What is detected where: a data page (leaf or branch) overwritten with
// garbage or zeros no longer carries its own page id in its header;
// bbolt's consistency check (Tx.Check, run by Open before anything else
// reads the file) asserts that id on every page it visits, and its panic
// is recovered inside the check and reported as a finding. A leaf page
// whose header is intact but whose keys are out of order is reported by
// the check's key-order pass, without any panic. Damage to
// both meta pages, or a file that is not a bbolt file at all, is reported
// by bbolt.Open itself (ErrInvalid / ErrChecksum). Not covered: damage
// that rewrites a child page id in a branch so that it points past the
// end of the memory map, which makes bbolt fault on an address outside
// the file — a fatal signal that no Go code can turn into an error.
func TestOpenRefusesDamagedFile(t *testing.T) {
	t.Parallel()
	garbage := func(n int) []byte {
		// Seeded so a failure reproduces; with random bytes the page header's
		// id field matches the real id with probability 2^-64.
		rng := rand.New(rand.NewPCG(1, 2))
		b := make([]byte, n)
		for i := range b {
			b[i] = byte(rng.Uint32())
		}
		return b
	}
	tests := []struct {
		name   string
		damage func(t *testing.T, path string)
	}{
		{"garbage over a middle leaf page", func(t *testing.T, path string) {
			size, id := inUsePage(t, path, "leaf")
			overwrite(t, path, int64(id*size), garbage(size))
		}},
		{"zeroed middle leaf page", func(t *testing.T, path string) {
			size, id := inUsePage(t, path, "leaf")
			overwrite(t, path, int64(id*size), make([]byte, size))
		}},
		{"keys out of order in a leaf page", func(t *testing.T, path string) {
			// The page header and element table stay intact; only the
			// first key's bytes become 0xff, so it sorts after its
			// neighbours and the check's key-order pass reports it.
			size, id := inUsePage(t, path, "leaf")
			page := readAt(t, path, int64(id*size), size)
			const header = 16 // bytes of bbolt's page header; the first leaf element follows
			// bbolt lays pages out in the machine's byte order.
			pos := binary.NativeEndian.Uint32(page[header+4:])
			ksize := binary.NativeEndian.Uint32(page[header+8:])
			key := make([]byte, ksize)
			for i := range key {
				key[i] = 0xff
			}
			overwrite(t, path, int64(id*size+header)+int64(pos), key)
		}},
		{"garbage over a branch page", func(t *testing.T, path string) {
			size, id := inUsePage(t, path, "branch")
			overwrite(t, path, int64(id*size), garbage(size))
		}},
		{"both meta pages", func(t *testing.T, path string) {
			size, _ := inUsePage(t, path, "leaf")
			overwrite(t, path, 0, garbage(2*size))
		}},
		{"not a bbolt file", func(t *testing.T, path string) {
			if err := os.WriteFile(path, []byte("product,refit\nP-1,2026-W48\n"), 0o600); err != nil {
				t.Fatal(err)
			}
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			path := bigFile(t)
			tc.damage(t, path)
			s, err := Open(path, Options{Timeout: time.Second})
			if err == nil {
				s.Close()
				t.Fatal("Open accepted a damaged file")
			}
			if !errors.Is(err, ErrCorrupt) {
				t.Fatalf("Open: %v, want ErrCorrupt", err)
			}
			t.Logf("Open: %v", err)
			msg := err.Error()
			for _, want := range []string{path, "rivalmix serve --state", "replays the input stream"} {
				if !strings.Contains(msg, want) {
					t.Errorf("error %q lacks %q", msg, want)
				}
			}
			// The refused file's lock was released: a second try is refused
			// for the same reason, not with ErrLocked.
			if _, err := Open(path, Options{Timeout: 100 * time.Millisecond}); !errors.Is(err, ErrCorrupt) {
				t.Errorf("second Open of the damaged file: %v, want ErrCorrupt", err)
			}
		})
	}
}

func TestOpenUndamagedBigFile(t *testing.T) {
	t.Parallel()
	path := bigFile(t)
	s, err := Open(path, Options{})
	if err != nil {
		t.Fatalf("Open of an intact file: %v", err)
	}
	defer s.Close()
	prods, err := s.Products("cereal")
	if err != nil || len(prods) != 3000 {
		t.Errorf("Products(cereal): %d records, %v; want 3000", len(prods), err)
	}
}

func TestOpenSchemaTooNew(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	rawUpdate(t, path, putSchema(SchemaVersion+1))
	for _, ro := range []bool{false, true} {
		_, err := Open(path, Options{ReadOnly: ro})
		if !errors.Is(err, ErrSchemaTooNew) {
			t.Fatalf("Open(ReadOnly=%v) of a version %d file: %v, want ErrSchemaTooNew", ro, SchemaVersion+1, err)
		}
		if !strings.Contains(err.Error(), "meta/schema") {
			t.Errorf("error %q does not name meta/schema", err)
		}
	}
	if v := rawSchema(t, path); v != int64(SchemaVersion+1) {
		t.Errorf("refused file's schema became %d", v)
	}
}

// legacyFile writes a made-up version-0 layout: snapshots/<category> =>
// bytes, with meta/schema = 0 when withMeta, otherwise no meta bucket.
func legacyFile(t *testing.T, withMeta bool) string {
	t.Helper()
	path := filepath.Join(t.TempDir(), "old.db")
	rawUpdate(t, path, func(tx *bolt.Tx) error {
		b, err := tx.CreateBucket([]byte("snapshots"))
		if err != nil {
			return err
		}
		if err := b.Put([]byte("cereal"), []byte("old cereal particles")); err != nil {
			return err
		}
		if withMeta {
			return putSchema(0)(tx)
		}
		return nil
	})
	return path
}

// fromV0 moves snapshots/<category> to cat/<category>/snapshot.
func fromV0(tx *bolt.Tx) error {
	old := tx.Bucket([]byte("snapshots"))
	if old == nil {
		return errors.New("bucket snapshots missing")
	}
	cats, err := tx.CreateBucketIfNotExists(bucketCat)
	if err != nil {
		return err
	}
	err = old.ForEach(func(k, v []byte) error {
		c, err := cats.CreateBucketIfNotExists(k)
		if err != nil {
			return err
		}
		return c.Put(keySnapshot, v)
	})
	if err != nil {
		return err
	}
	return tx.DeleteBucket([]byte("snapshots"))
}

func TestMigrationFromVersion0(t *testing.T) {
	t.Parallel()
	for _, withMeta := range []bool{true, false} {
		t.Run(fmt.Sprintf("meta bucket %v", withMeta), func(t *testing.T) {
			t.Parallel()
			path := legacyFile(t, withMeta)
			s, err := Open(path, Options{migrations: map[uint32]migration{0: fromV0}})
			if err != nil {
				t.Fatalf("Open with a migration from 0: %v", err)
			}
			snap, err := s.Snapshot("cereal")
			if err != nil || string(snap) != "old cereal particles" {
				t.Errorf("migrated Snapshot(cereal) = %q, %v", snap, err)
			}
			// The migrated file is a complete version-1 store.
			if err := s.Commit(sampleBatch()); err != nil {
				t.Errorf("Commit after migration: %v", err)
			}
			sum, err := s.Summary()
			if err != nil || sum.Schema != SchemaVersion {
				t.Errorf("Summary after migration: schema %d, %v", sum.Schema, err)
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			// Reopening with the real (empty) table works: nothing left to do.
			s2, err := Open(path, Options{})
			if err != nil {
				t.Fatalf("reopen after migration: %v", err)
			}
			_ = s2.Close()
		})
	}
}

func TestMigrationRefused(t *testing.T) {
	t.Parallel()
	failing := func(*bolt.Tx) error { return errors.New("cannot read legacy layout") }
	tests := []struct {
		name  string
		opts  Options
		is    error
		words string
	}{
		{"no migration registered", Options{}, ErrSchemaTooOld, "no migration from schema version 0"},
		{"read-only", Options{ReadOnly: true, migrations: map[uint32]migration{0: fromV0}}, ErrSchemaTooOld, "open it read-write"},
		{"migration fails", Options{migrations: map[uint32]migration{0: failing}}, nil, "cannot read legacy layout"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			path := legacyFile(t, true)
			_, err := Open(path, tc.opts)
			if err == nil {
				t.Fatal("Open succeeded")
			}
			if tc.is != nil && !errors.Is(err, tc.is) {
				t.Errorf("Open: %v, want %v", err, tc.is)
			}
			if !strings.Contains(err.Error(), tc.words) {
				t.Errorf("Open error %q lacks %q", err, tc.words)
			}
			if v := rawSchema(t, path); v != 0 {
				t.Errorf("refused file's schema became %d, want 0", v)
			}
			db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second, ReadOnly: true})
			if err != nil {
				t.Fatal(err)
			}
			defer db.Close()
			_ = db.View(func(tx *bolt.Tx) error {
				if tx.Bucket([]byte("snapshots")) == nil || tx.Bucket(bucketCat) != nil {
					t.Error("a refused migration changed the file's buckets")
				}
				return nil
			})
		})
	}
}

func TestOpenMalformedSchemaValue(t *testing.T) {
	t.Parallel()
	s, path := openTemp(t)
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	rawUpdate(t, path, func(tx *bolt.Tx) error {
		return tx.Bucket(bucketMeta).Put(keySchema, []byte{1})
	})
	_, err := Open(path, Options{})
	if !errors.Is(err, ErrCorrupt) || !strings.Contains(err.Error(), "meta/schema: 1 bytes, want 4") {
		t.Errorf("Open with a 1-byte meta/schema: %v, want ErrCorrupt naming meta/schema", err)
	}
}
