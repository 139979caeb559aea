package input

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
)

// LineError is a bad line of a JSON-lines input file.
type LineError struct {
	// Line is the 1-based line number.
	Line int
	// Err is why the line was refused, usually an [*InputError].
	Err error
	// Text is the line without its terminator, cut to the decode
	// options' MaxBytes; it is the caller's.
	Text []byte
}

// Error returns "line 12: " followed by the cause.
func (e *LineError) Error() string { return fmt.Sprintf("line %d: %v", e.Line, e.Err) }

// Unwrap returns the cause, so errors.Is(err, ErrInvalidInput) holds for a
// bad line.
func (e *LineError) Unwrap() error { return e.Err }

// DecodeLines reads a JSON-lines file: one message per line, "\n" or
// "\r\n" terminated; blank lines and lines whose first non-blank byte is
// '#' are skipped; a line longer than opt.MaxBytes is a bad line.
//
// It calls fn, which must not be nil, for every decoded message with its
// 1-based line number, and onErr for every bad line, in file order. If fn
// or onErr returns an error, DecodeLines stops and returns that error
// unchanged (that is how a strict run aborts). A nil onErr stops at the
// first bad line and returns its *LineError. Otherwise the result is nil
// or an error reading r. Messages share no memory with DecodeLines' buffer.
func DecodeLines(r io.Reader, opt DecodeOptions, fn func(line int, m Message) error, onErr func(*LineError) error) error {
	opt, err := opt.withDefaults()
	if err != nil {
		return err
	}
	br := bufio.NewReader(r)
	var buf []byte
	for line := 1; ; line++ {
		text, size, readErr := readLine(br, opt.MaxBytes+1, buf[:0])
		buf = text
		if readErr != nil && !errors.Is(readErr, io.EOF) {
			return fmt.Errorf("input: reading line %d: %w", line, readErr)
		}
		if readErr != nil && size == 0 && len(text) == 0 {
			return nil
		}
		if err := decodeLine(line, text, size, opt, fn, onErr); err != nil {
			return err
		}
		if readErr != nil {
			return nil
		}
	}
}

func decodeLine(line int, text []byte, size int, opt DecodeOptions, fn func(int, Message) error, onErr func(*LineError) error) error {
	trimmed := bytes.TrimLeft(text, " \t\r")
	if len(trimmed) == 0 && size == len(text) {
		return nil
	}
	if len(trimmed) > 0 && trimmed[0] == '#' {
		return nil
	}
	var bad error
	if size > opt.MaxBytes {
		bad = tooLarge(size, opt.MaxBytes)
	} else {
		m, err := Decode(text, opt)
		if err == nil {
			return fn(line, m)
		}
		bad = err
	}
	le := &LineError{Line: line, Err: bad, Text: bytes.Clone(text)}
	if onErr == nil {
		return le
	}
	return onErr(le)
}

// readLine reads one line and returns at most keep bytes of it, without
// the line terminator, plus the full length of the line. The error is that
// of the reader: io.EOF when the input ended (with or without a last
// line).
func readLine(br *bufio.Reader, keep int, buf []byte) ([]byte, int, error) {
	size := 0
	for {
		chunk, err := br.ReadSlice('\n')
		if n := len(chunk); n > 0 && chunk[n-1] == '\n' {
			chunk = chunk[:n-1]
		}
		size += len(chunk)
		if room := keep - len(buf); room > 0 {
			buf = append(buf, chunk[:min(room, len(chunk))]...)
		}
		if errors.Is(err, bufio.ErrBufferFull) {
			continue
		}
		if size == len(buf) && size > 0 && buf[size-1] == '\r' {
			buf = buf[:size-1]
			size--
		}
		return buf, size, err
	}
}
