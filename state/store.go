package state

import (
	"errors"
	"fmt"
	"os"
	"strings"
	"time"

	bolt "go.etcd.io/bbolt"
)

// DefaultTimeout is how long Open waits for the file lock when
// Options.Timeout is zero.
const DefaultTimeout = 2 * time.Second

// maxReported bounds how many consistency-check findings an ErrCorrupt
// message quotes; the count of all findings is always given.
const maxReported = 5

// Options tune Open. The zero value opens read-write with DefaultTimeout.
type Options struct {
	// Timeout is how long to wait for the file lock held by another
	// process before failing with ErrLocked; zero or negative means
	// DefaultTimeout.
	Timeout time.Duration
	// ReadOnly opens the file with a shared lock and never writes to it
	// (for rivalmix inspect). Commit and DeleteOutbox then fail, and a
	// file that needs a migration is refused with ErrSchemaTooOld. The
	// file must exist.
	ReadOnly bool

	// migrations replaces the package's migration table; tests only.
	migrations map[uint32]migration
}

// Store is one worker's state file.
//
// Concurrency: bbolt allows one write transaction and any number of read
// transactions at a time, and a Store's methods are safe for concurrent
// use by many goroutines. Commit and DeleteOutbox serialise on the write
// lock; reads run in short read transactions of their own and never block
// on a writer except while the file is being grown and remapped. No method
// holds a transaction after it returns, and every []byte a method returns
// is a copy that the caller owns. Close waits for running transactions;
// after it every method fails with ErrClosed.
type Store struct {
	db       *bolt.DB
	path     string
	readOnly bool

	// beforeCommit, set only by tests, runs at the end of Commit's write
	// transaction; an error from it rolls the whole transaction back.
	beforeCommit func(tx *bolt.Tx) error
}

// Open opens (creating if needed, unless opts.ReadOnly) the state file at
// path, checks it and brings its schema up to date.
//
// It fails with ErrLocked when another process holds the file for longer
// than opts.Timeout; with ErrCorrupt when bbolt cannot read the file's
// meta pages, panics while loading it, or its consistency check finds any
// problem; with ErrSchemaTooNew or ErrSchemaTooOld when the schema version
// cannot be served. The consistency check reads every page, so Open takes
// time proportional to the file size.
func Open(path string, opts Options) (*Store, error) {
	if opts.Timeout <= 0 {
		opts.Timeout = DefaultTimeout
	}
	db, err := openBolt(path, opts)
	if err != nil {
		return nil, err
	}
	s := &Store{db: db, path: path, readOnly: opts.ReadOnly}
	if err := s.prepare(opts); err != nil {
		_ = db.Close()
		return nil, err
	}
	return s, nil
}

// openBolt opens the bbolt file and turns its failures into this
// package's sentinels. bbolt reads the meta and freelist pages while
// opening and panics on some kinds of damage there; the panic happens on
// this goroutine, so it is recovered here and reported as ErrCorrupt. The
// file descriptor (and with it the lock) is closed in that case; the
// memory mapping bbolt made cannot be released and stays until the
// process exits, which a refused state file normally makes it do.
func openBolt(path string, opts Options) (db *bolt.DB, err error) {
	var file *os.File
	bopts := &bolt.Options{
		Timeout:  opts.Timeout,
		ReadOnly: opts.ReadOnly,
		OpenFile: func(name string, flag int, perm os.FileMode) (*os.File, error) {
			f, err := os.OpenFile(name, flag, perm)
			file = f
			return f, err
		},
	}
	defer func() {
		if r := recover(); r != nil {
			if file != nil {
				_ = file.Close()
			}
			db, err = nil, corrupt(path, fmt.Errorf("bbolt panicked while opening the file: %v", r))
		}
	}()
	db, err = bolt.Open(path, 0o600, bopts)
	switch {
	case err == nil:
		return db, nil
	case errors.Is(err, bolt.ErrTimeout):
		return nil, fmt.Errorf("state %s: %w (waited %s; stop the other rivalmix process or pass another --state file)",
			path, ErrLocked, opts.Timeout)
	case errors.Is(err, bolt.ErrInvalid), errors.Is(err, bolt.ErrChecksum), errors.Is(err, bolt.ErrVersionMismatch):
		return nil, corrupt(path, fmt.Errorf("bbolt meta pages: %w", err))
	}
	return nil, fmt.Errorf("state %s: open: %w", path, err)
}

// corrupt builds the ErrCorrupt error for path, with the rebuild recipe.
func corrupt(path string, cause error) error {
	return fmt.Errorf("state %s: %w: %w; to rebuild it, stop rivalmix, move %s aside and run "+
		"`rivalmix serve --state NEW_FILE`, which replays the input stream from the start",
		path, ErrCorrupt, cause, path)
}

// prepare runs the consistency check, then creates or migrates the schema.
func (s *Store) prepare(opts Options) error {
	if err := s.check(); err != nil {
		return err
	}
	var (
		version uint32
		fresh   bool
	)
	err := s.db.View(func(tx *bolt.Tx) error {
		var err error
		version, fresh, err = readSchema(tx)
		return err
	})
	if err != nil {
		return corrupt(s.path, err)
	}
	switch {
	case fresh:
		if s.readOnly {
			return nil // an empty bbolt file reads as an empty store
		}
		if err := s.db.Update(writeSchema); err != nil {
			return fmt.Errorf("state %s: initialise schema: %w", s.path, err)
		}
	case version > SchemaVersion:
		return fmt.Errorf("state %s: meta/schema is version %d, this program knows versions up to %d; "+
			"run a newer rivalmix: %w", s.path, version, SchemaVersion, ErrSchemaTooNew)
	case version < SchemaVersion:
		if s.readOnly {
			return fmt.Errorf("state %s: meta/schema is version %d and needs migrating to %d; "+
				"open it read-write once (rivalmix serve) to migrate it: %w", s.path, version, SchemaVersion, ErrSchemaTooOld)
		}
		table := opts.migrations
		if table == nil {
			table = migrations
		}
		if err := s.db.Update(func(tx *bolt.Tx) error { return migrate(tx, version, table) }); err != nil {
			return fmt.Errorf("state %s: %w", s.path, err)
		}
	}
	return nil
}

// check runs bbolt's consistency check over the whole file. The check
// walks every reachable page from bbolt's own goroutine and recovers its
// own panics, reporting them as findings; all findings are drained so
// that goroutine always ends.
func (s *Store) check() error {
	var (
		found    int
		findings []string
	)
	err := s.db.View(func(tx *bolt.Tx) error {
		for e := range tx.Check() {
			found++
			if len(findings) < maxReported {
				findings = append(findings, e.Error())
			}
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("state %s: consistency check: %w", s.path, err)
	}
	if found > 0 {
		return corrupt(s.path, fmt.Errorf("bbolt consistency check found %d problem(s): %s",
			found, strings.Join(findings, "; ")))
	}
	return nil
}

// Path returns the state file's path as given to Open.
func (s *Store) Path() string { return s.path }

// Close releases the file and its lock, waiting for running transactions
// to finish. Calling it again returns nil.
func (s *Store) Close() error {
	if err := s.db.Close(); err != nil {
		return fmt.Errorf("state %s: close: %w", s.path, err)
	}
	return nil
}

// view runs fn in a read transaction and reports use after Close as
// ErrClosed.
func (s *Store) view(fn func(tx *bolt.Tx) error) error {
	return s.closedErr(s.db.View(fn))
}

// update runs fn in a write transaction, which is fsynced on commit.
func (s *Store) update(fn func(tx *bolt.Tx) error) error {
	if s.readOnly {
		return fmt.Errorf("state %s: opened read-only: %w", s.path, bolt.ErrDatabaseReadOnly)
	}
	return s.closedErr(s.db.Update(fn))
}

func (s *Store) closedErr(err error) error {
	if errors.Is(err, bolt.ErrDatabaseNotOpen) {
		return fmt.Errorf("state %s: %w", s.path, ErrClosed)
	}
	return err
}
