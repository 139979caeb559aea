package input

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
	"unicode"
	"unicode/utf8"
)

// The members a message may have, as indexes into a fields array.
const (
	fProduct = iota
	fRefit
	fCompetitors
	fRelative
	fIDs
	fOwn
	fCross
	fComplete
	fExpected
	fWithdrawn
	nFields
)

var fieldNames = [nFields]string{"product", "refit", "competitors", "relative", "ids", "own", "cross",
	"complete", "expected", "withdrawn"}

// fields are the raw values of a message's members, by index; nil when
// the member is absent.
type fields [nFields][]byte

// Decode decodes and validates one input message. Every failure to meet
// the input contract is an [*InputError]; an error that is not one comes
// from invalid options. Decode never panics, keeps no reference to
// payload, and is safe for concurrent use. Its cost is linear in
// len(payload).
func Decode(payload []byte, opt DecodeOptions) (Message, error) {
	opt, err := opt.withDefaults()
	if err != nil {
		return Message{}, err
	}
	if len(payload) > opt.MaxBytes {
		return Message{}, tooLarge(len(payload), opt.MaxBytes)
	}
	top, err := topObject(payload)
	if err != nil {
		return Message{}, err
	}
	var f fields
	if err := readObject(top, "", fieldNames[:], f[:]); err != nil {
		return Message{}, err
	}
	var m Message
	switch {
	case f[fComplete] != nil:
		m, err = decodeRefitComplete(&f)
	case f[fWithdrawn] != nil:
		m, err = decodeWithdrawn(&f)
	default:
		m, err = decodeDatum(&f, opt)
	}
	if err != nil {
		return Message{}, err
	}
	m.Hash = contentHash(&m)
	return m, nil
}

// readObject puts the raw value of each member of the valid JSON object
// raw into out, at the index of its key in known. Keys are matched exactly
// (case matters, escapes decoded); a key outside known or given twice is
// an error, so that no member is silently ignored or overridden.
func readObject(raw []byte, path string, known []string, out [][]byte) error {
	return eachMember(raw, func(key, value []byte) error {
		name := unquote(key)
		k := slices.Index(known, name)
		switch {
		case k < 0:
			return &InputError{Field: joinField(path, clip(name)), Rule: "unknown field"}
		case out[k] != nil:
			return &InputError{Field: joinField(path, name), Rule: "given more than once"}
		}
		out[k] = value
		return nil
	})
}

func joinField(path, key string) string {
	switch {
	case path == "":
		return key
	case key == "":
		return path
	}
	return path + "." + key
}

// parseName reads an identifier: a product, refit or competitor id.
func parseName(raw []byte, field string) (string, error) {
	if jsonType(raw) != "a string" {
		return "", wrongType(field, "a string", raw)
	}
	s := unquote(raw)
	if s == "" {
		return "", &InputError{Field: field, Rule: "must not be empty"}
	}
	if len(s) > maxNameBytes {
		return "", &InputError{Field: field, Rule: fmt.Sprintf("must be at most %d bytes, got %d", maxNameBytes, len(s))}
	}
	for i, r := range s {
		// U+FFFD is what the JSON decoder puts in place of an invalid
		// escape (a lone surrogate), so it is refused with the rest.
		if r == utf8.RuneError || unicode.IsSpace(r) || !unicode.IsPrint(r) {
			return "", &InputError{Field: field, Rule: fmt.Sprintf("must be printable with no whitespace, found %U at byte %d", r, i)}
		}
	}
	return s, nil
}

// parseNumber reads a finite number; -0 is returned as +0 so that equal
// content hashes equally.
func parseNumber(raw []byte, field string) (float64, error) {
	if jsonType(raw) != "a number" {
		return 0, wrongType(field, "a number", raw)
	}
	v, err := strconv.ParseFloat(string(raw), 64)
	if err != nil || math.IsInf(v, 0) || math.IsNaN(v) {
		return 0, &InputError{Field: field, Rule: "must be a finite number, got " + clip(string(raw))}
	}
	if v == 0 {
		v = 0
	}
	return v, nil
}

// parseWhole reads a whole number in lo..hi; 10, 10.0 and 1e1 are all ten.
func parseWhole(raw []byte, field string, lo, hi int) (int, error) {
	v, err := parseNumber(raw, field)
	if err != nil {
		return 0, err
	}
	if v != math.Trunc(v) {
		return 0, &InputError{Field: field, Rule: "must be a whole number, got " + clip(string(raw))}
	}
	if v < float64(lo) || v > float64(hi) {
		return 0, &InputError{Field: field, Rule: fmt.Sprintf("must be between %d and %d, got %s", lo, hi, clip(string(raw)))}
	}
	return int(v), nil
}

// parseTrue reads a control flag, which is only ever sent as true.
func parseTrue(raw []byte, field string) error {
	if jsonType(raw) != "a boolean" {
		return wrongType(field, "true", raw)
	}
	if string(raw) != "true" {
		return &InputError{Field: field, Rule: "must be true"}
	}
	return nil
}

// checkArray reports a raw value that is not an array.
func checkArray(raw []byte, field string) error {
	if jsonType(raw) != "an array" {
		return wrongType(field, "an array", raw)
	}
	return nil
}

// disallow rejects the first member of f, in the order of keys, that is
// present.
func disallow(f *fields, where string, keys ...int) error {
	for _, k := range keys {
		if f[k] != nil {
			return &InputError{Field: fieldNames[k], Rule: "not allowed in " + where}
		}
	}
	return nil
}

func decodeRefitComplete(f *fields) (Message, error) {
	m := Message{Kind: KindRefitComplete}
	if err := parseTrue(f[fComplete], "complete"); err != nil {
		return Message{}, err
	}
	if err := disallow(f, "a refit-complete message", fWithdrawn, fProduct, fCompetitors,
		fRelative, fIDs, fOwn, fCross); err != nil {
		return Message{}, err
	}
	if f[fRefit] == nil {
		return Message{}, required("refit")
	}
	var err error
	if m.Refit, err = parseName(f[fRefit], "refit"); err != nil {
		return Message{}, err
	}
	if raw := f[fExpected]; raw != nil {
		if m.Expected, err = parseWhole(raw, "expected", 0, maxExpected); err != nil {
			return Message{}, err
		}
	}
	return m, nil
}

func decodeWithdrawn(f *fields) (Message, error) {
	m := Message{Kind: KindWithdrawn}
	if err := parseTrue(f[fWithdrawn], "withdrawn"); err != nil {
		return Message{}, err
	}
	if err := disallow(f, "a withdrawal message", fCompetitors, fRelative, fIDs, fOwn,
		fCross, fExpected); err != nil {
		return Message{}, err
	}
	if f[fProduct] == nil {
		return Message{}, required("product")
	}
	var err error
	if m.Product, err = parseName(f[fProduct], "product"); err != nil {
		return Message{}, err
	}
	if raw := f[fRefit]; raw != nil {
		if m.Refit, err = parseName(raw, "refit"); err != nil {
			return Message{}, err
		}
	}
	return m, nil
}

// entry is one competitor's relative cross elasticity before sorting.
type entry struct {
	id    string
	value float64
	at    int // index in the message's list, for error messages
}

// byValueDesc orders entries by value, largest first, and equal values by
// id so that the order, and with it the hash, is canonical.
func byValueDesc(a, b entry) int {
	if c := cmp.Compare(b.value, a.value); c != 0 {
		return c
	}
	return strings.Compare(a.id, b.id)
}
