package input

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"unicode/utf8"
)

// This file walks the JSON of one message. [topObject] checks the whole
// payload with json.Valid first, which allocates nothing, so the walkers
// below may assume valid JSON: they only find where each value starts and
// ends, in one pass, and never build a generic tree.

// exampleMessage is shown to whoever sends something that is not JSON.
const exampleMessage = `{"product":"P-1042","refit":"2026-W48","relative":[0.94,0.52]}`

// topObject checks that payload is exactly one JSON object and returns it
// without the surrounding whitespace.
func topObject(payload []byte) ([]byte, error) {
	if !utf8.Valid(payload) {
		return nil, &InputError{Rule: "not valid UTF-8"}
	}
	if !json.Valid(payload) {
		return nil, invalidJSON(payload)
	}
	raw := bytes.Trim(payload, " \t\r\n")
	if raw[0] != '{' {
		return nil, &InputError{Rule: "must be a JSON object, not " + jsonType(raw)}
	}
	return raw, nil
}

// invalidJSON explains why payload, which json.Valid refused, is not one
// JSON value. It runs only for bad input, so it may be slow.
func invalidJSON(payload []byte) error {
	if len(bytes.Trim(payload, " \t\r\n")) == 0 {
		return &InputError{Rule: "empty payload"}
	}
	dec := json.NewDecoder(bytes.NewReader(payload))
	var first json.RawMessage
	err := dec.Decode(&first)
	if err == nil {
		return &InputError{Rule: fmt.Sprintf("trailing data after the JSON value at byte %d", dec.InputOffset())}
	}
	var syn *json.SyntaxError
	switch {
	case errors.Is(err, io.ErrUnexpectedEOF), errors.Is(err, io.EOF):
		return &InputError{Rule: "not valid JSON: the payload ends inside a JSON value (cut short?); each message is one JSON object such as " + exampleMessage}
	case errors.As(err, &syn) && syn.Offset >= 1 && int(syn.Offset) <= len(payload):
		return &InputError{Rule: fmt.Sprintf("not valid JSON: unexpected %s at byte %d; each message is one JSON object such as %s",
			describeByte(payload[syn.Offset-1]), syn.Offset, exampleMessage)}
	}
	return &InputError{Rule: "not valid JSON; each message is one JSON object such as " + exampleMessage}
}

// describeByte names a byte for an error message: 'o', or 0x07.
func describeByte(c byte) string {
	if c >= 0x20 && c < 0x7f {
		return fmt.Sprintf("%q", rune(c))
	}
	return fmt.Sprintf("byte 0x%02x", c)
}

// jsonType names the JSON type of a valid, non-empty raw value.
func jsonType(raw []byte) string {
	if len(raw) == 0 {
		return "nothing"
	}
	switch raw[0] {
	case '{':
		return "an object"
	case '[':
		return "an array"
	case '"':
		return "a string"
	case 't', 'f':
		return "a boolean"
	case 'n':
		return "null"
	}
	return "a number"
}

// skipSpace returns the index of the first byte at or after i that is not
// JSON whitespace.
func skipSpace(b []byte, i int) int {
	for i < len(b) {
		switch b[i] {
		case ' ', '\t', '\r', '\n':
			i++
		default:
			return i
		}
	}
	return i
}

// stringEnd returns the index just past the JSON string that starts at
// b[i] == '"'.
func stringEnd(b []byte, i int) int {
	for i++; i < len(b); i++ {
		switch b[i] {
		case '\\':
			i++
		case '"':
			return i + 1
		}
	}
	return i
}

// valueEnd returns the index just past the JSON value that starts at b[i].
func valueEnd(b []byte, i int) int {
	switch b[i] {
	case '"':
		return stringEnd(b, i)
	case '{', '[':
		depth := 0
		for ; i < len(b); i++ {
			switch b[i] {
			case '"':
				i = stringEnd(b, i) - 1
			case '{', '[':
				depth++
			case '}', ']':
				depth--
				if depth == 0 {
					return i + 1
				}
			}
		}
		return i
	}
	for ; i < len(b); i++ { // a number or a literal
		switch b[i] {
		case ',', '}', ']', ' ', '\t', '\r', '\n':
			return i
		}
	}
	return i
}

// eachMember calls fn with the raw key (quotes included) and raw value of
// every member of the valid JSON object raw, in order, and stops at the
// first error.
func eachMember(raw []byte, fn func(key, value []byte) error) error {
	i := skipSpace(raw, 1)
	if raw[i] == '}' {
		return nil
	}
	for {
		end := stringEnd(raw, i)
		key := raw[i:end]
		i = skipSpace(raw, skipSpace(raw, end)+1) // past the colon
		end = valueEnd(raw, i)
		if err := fn(key, raw[i:end]); err != nil {
			return err
		}
		i = skipSpace(raw, end)
		if raw[i] == '}' {
			return nil
		}
		i = skipSpace(raw, i+1) // past the comma
	}
}

// eachElement calls fn with the index and raw value of every element of
// the valid JSON array raw, in order, and stops at the first error.
func eachElement(raw []byte, fn func(i int, value []byte) error) error {
	i := skipSpace(raw, 1)
	if raw[i] == ']' {
		return nil
	}
	for n := 0; ; n++ {
		end := valueEnd(raw, i)
		if err := fn(n, raw[i:end]); err != nil {
			return err
		}
		i = skipSpace(raw, end)
		if raw[i] == ']' {
			return nil
		}
		i = skipSpace(raw, i+1)
	}
}

// countElements returns the length of the valid JSON array raw.
func countElements(raw []byte) int {
	n := 0
	_ = eachElement(raw, func(int, []byte) error { n++; return nil })
	return n
}

// unquote returns the text of the valid JSON string raw. Strings without
// escapes are copied as they are (the payload is valid UTF-8); others go
// through encoding/json, which turns an escaped lone surrogate into
// U+FFFD, as it does.
func unquote(raw []byte) string {
	body := raw[1 : len(raw)-1]
	if bytes.IndexByte(body, '\\') < 0 {
		return string(body)
	}
	var s string
	if err := json.Unmarshal(raw, &s); err != nil {
		// Unreachable for a string json.Valid accepted; keep the bytes.
		return string(body)
	}
	return s
}
