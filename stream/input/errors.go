package input

import (
	"errors"
	"fmt"
	"unicode/utf8"
)

// ErrInvalidInput is matched by errors.Is for every [*InputError]: the
// message breaks the input contract and must go to the rejected stream
// rather than be retried.
var ErrInvalidInput = errors.New("invalid input")

// InputError says which field of an input message broke which rule.
type InputError struct {
	// Field is the path of the offending field, e.g. "relative[2]" or
	// "cross[0].value"; empty when the message as a whole is at fault
	// (too large, not JSON, not an object, trailing data).
	Field string
	// Rule is the rule broken, in plain words.
	Rule string
}

// Error returns `field "relative[2]": must be a finite number, got 1e400`,
// or "message: <rule>" when Field is empty.
func (e *InputError) Error() string {
	if e.Field == "" {
		return "message: " + e.Rule
	}
	return fmt.Sprintf("field %q: %s", e.Field, e.Rule)
}

// Unwrap returns [ErrInvalidInput].
func (e *InputError) Unwrap() error { return ErrInvalidInput }

func tooLarge(size, limit int) error {
	return &InputError{Rule: fmt.Sprintf("payload of %d bytes is larger than the limit of %d bytes", size, limit)}
}

func wrongType(field, want string, raw []byte) error {
	return &InputError{Field: field, Rule: fmt.Sprintf("must be %s, not %s", want, jsonType(raw))}
}

func required(field string) error {
	return &InputError{Field: field, Rule: "required"}
}

// clip shortens s for an error message so that a hostile payload cannot
// make the rejection reason as large as itself.
func clip(s string) string {
	const keep = 64
	if len(s) <= keep {
		return s
	}
	cut := keep
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return s[:cut] + "..."
}
