package state

import (
	"encoding/binary"
	"fmt"
	"slices"

	bolt "go.etcd.io/bbolt"
)

// SchemaVersion is the schema version this code reads and writes.
const SchemaVersion uint32 = 1

// Bucket and key names; the package doc lists the layout.
var (
	bucketMeta     = []byte("meta")
	bucketCat      = []byte("cat")
	bucketOutbox   = []byte("outbox")
	bucketInput    = []byte("input")
	bucketProducts = []byte("products")

	keySchema   = []byte("schema")
	keySnapshot = []byte("snapshot")
	keyAlerts   = []byte("alerts")
	keyCatMeta  = []byte("meta")
	keyPosition = []byte("position")
)

// topBuckets are created by Open on a new file and after a migration.
var topBuckets = [][]byte{bucketMeta, bucketCat, bucketOutbox, bucketInput}

// A migration rewrites a file from schema version v (its key in the
// table) to v+1 inside the write transaction it is given. It must not
// write meta/schema; Open does that once every step has succeeded.
type migration func(tx *bolt.Tx) error

// migrations holds one step per older schema version. Version 1 is the
// first, so the table is empty; the tests exercise the mechanism with a
// fake version-0 file and their own table (Options.migrations).
var migrations = map[uint32]migration{}

// readSchema reports the file's schema version; an error means the
// stored value is malformed. fresh is true for a file
// with no buckets at all (just created by bbolt). A file that has buckets
// but no meta/schema key predates versioning and is version 0.
func readSchema(tx *bolt.Tx) (version uint32, fresh bool, err error) {
	meta := tx.Bucket(bucketMeta)
	if meta == nil {
		empty := true
		_ = tx.ForEach(func([]byte, *bolt.Bucket) error {
			empty = false
			return nil
		})
		return 0, empty, nil
	}
	v := meta.Get(keySchema)
	switch {
	case v == nil:
		return 0, false, nil
	case len(v) != 4:
		return 0, false, fmt.Errorf("meta/schema: %d bytes, want 4", len(v))
	}
	return binary.BigEndian.Uint32(v), false, nil
}

// writeSchema creates the top-level buckets that are missing and records
// SchemaVersion.
func writeSchema(tx *bolt.Tx) error {
	for _, name := range topBuckets {
		if _, err := tx.CreateBucketIfNotExists(name); err != nil {
			return fmt.Errorf("create bucket %s: %w", name, err)
		}
	}
	v := binary.BigEndian.AppendUint32(nil, SchemaVersion)
	if err := tx.Bucket(bucketMeta).Put(keySchema, v); err != nil {
		return fmt.Errorf("put meta/schema: %w", err)
	}
	return nil
}

// migrate runs the steps from version from up to SchemaVersion, in order,
// in the given transaction, then records SchemaVersion.
func migrate(tx *bolt.Tx, from uint32, table map[uint32]migration) error {
	for v := from; v < SchemaVersion; v++ {
		step, ok := table[v]
		if !ok {
			return fmt.Errorf("no migration from schema version %d to %d (known: %v): %w",
				v, v+1, knownMigrations(table), ErrSchemaTooOld)
		}
		if err := step(tx); err != nil {
			return fmt.Errorf("migration from schema version %d to %d: %w", v, v+1, err)
		}
	}
	return writeSchema(tx)
}

func knownMigrations(table map[uint32]migration) []uint32 {
	out := make([]uint32, 0, len(table))
	for v := range table {
		out = append(out, v)
	}
	slices.Sort(out)
	return out
}

// seqKey is the outbox key of sequence number seq.
func seqKey(seq uint64) []byte { return binary.BigEndian.AppendUint64(nil, seq) }
