// Package input is rivalmix's wire format for refit results: it turns one
// raw message (a NATS payload or a line of a file) into a validated
// [Message], and names the category of an input subject.
//
// The decoder is strict on purpose: whatever it cannot read without
// guessing is rejected with an [*InputError] that names the field and the
// rule, so the reason can travel to the rejected stream next to the
// payload. It reads the JSON in one pass after a validity check that does
// not allocate, so its cost grows with the payload's length and nothing
// else. The package does no I/O beyond the reader handed to
// [DecodeLines] and holds no globals.
package input
