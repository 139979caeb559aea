package state

import "errors"

// Sentinel errors that callers branch on. Errors returned by this package
// wrap them (test with errors.Is) and add the file, bucket and field.
var (
	// ErrLocked means another process (or another Store in this process)
	// holds the state file open for writing and did not let go within
	// Options.Timeout.
	ErrLocked = errors.New("state file is locked by another process")

	// ErrCorrupt means the file failed bbolt's consistency check or its
	// bbolt meta pages are unreadable. The message says how to rebuild;
	// see the package doc.
	ErrCorrupt = errors.New("state file is damaged")

	// ErrSchemaTooNew means the file was written by a newer rivalmix with a
	// schema version this code does not know. The file is left untouched.
	ErrSchemaTooNew = errors.New("state file schema is newer than this program")

	// ErrSchemaTooOld means the file has an older schema version that
	// cannot be migrated here: no migration is registered for it, or the
	// file was opened read-only.
	ErrSchemaTooOld = errors.New("state file schema is older than this program and cannot be migrated")

	// ErrInvalid means a Batch was refused before anything was written:
	// an empty or oversized name, a duplicate, a non-finite number.
	ErrInvalid = errors.New("invalid state batch")

	// ErrClosed means the Store was used after Close.
	ErrClosed = errors.New("state store is closed")
)
