// Package stream moves rivalmix's input and output over NATS JetStream.
//
// This file turns one raw input payload into a validated [Message]. The
// decoder is strict on purpose: whatever it cannot read without guessing
// is rejected with an [*InputError] that names the field and the rule, so
// the reason can travel to the rejected stream next to the payload.
package stream

import (
	"bufio"
	"bytes"
	"cmp"
	"crypto/sha256"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"unicode"
	"unicode/utf8"
)

const (
	defaultCompetitors = 10
	maxCompetitors     = 1000
	defaultMaxBytes    = 64 << 10
	maxNameBytes       = 128
	maxExpected        = math.MaxInt32

	// hashDomain starts every hashed encoding. Hashes are stored to
	// recognise redelivered messages, so changing the canonical form
	// below must come with a new domain string.
	hashDomain = "rivalmix/input/v1\x00"
)

// DefaultInputPrefix is the subject prefix of input messages; the category
// is the single token that follows it ("rivalmix.in.<category>").
const DefaultInputPrefix = "rivalmix.in"

// Kind tells which of the three input shapes a [Message] has.
type Kind int

const (
	// KindDatum is one product's refit result: its relative cross
	// elasticities against the competitors the refit kept.
	KindDatum Kind = iota + 1
	// KindRefitComplete says every product of a refit has been sent,
	// e.g. {"refit":"2026-W48","complete":true,"expected":275}.
	KindRefitComplete
	// KindWithdrawn says a product has left its category,
	// e.g. {"product":"P-1042","withdrawn":true}.
	KindWithdrawn
)

// String returns the kind's name as used in logs and metrics labels.
func (k Kind) String() string {
	switch k {
	case KindDatum:
		return "datum"
	case KindRefitComplete:
		return "refit-complete"
	case KindWithdrawn:
		return "withdrawn"
	}
	return "Kind(" + strconv.Itoa(int(k)) + ")"
}

// DroppedEntry is a non-positive relative cross elasticity (a complement,
// or zero for "not significant") removed before modelling. It is kept in
// the message, and from there in the product's stored record, so that
// nothing the refit reported is lost.
type DroppedEntry struct {
	// ID is the competitor's id; empty when the message gave no ids.
	ID string `json:"id,omitempty"`
	// Value is the relative cross elasticity, <= 0 (never -0).
	Value float64 `json:"value"`
}

// Message is one decoded and validated input message. It shares no memory
// with the payload it was decoded from.
type Message struct {
	// Kind says which fields below are meaningful.
	Kind Kind
	// Product is the product id (KindDatum, KindWithdrawn): 1..128 bytes
	// of printable UTF-8 with no whitespace.
	Product string
	// Refit names the refit (KindDatum, KindRefitComplete; optional for
	// KindWithdrawn, then empty), with the same rules as Product.
	Refit string
	// Competitors is L, the number of candidate competitors the refit
	// considered, 1..1000; the decode option's default when the message
	// does not say. KindDatum only.
	Competitors int
	// Relative holds the positive relative cross elasticities (cross
	// elasticity / |own elasticity|, dimensionless), finite, sorted
	// descending, ties ordered by id. Never nil for KindDatum; may be empty.
	// len(Relative)+len(Dropped) <= Competitors.
	Relative []float64
	// IDs are the competitor ids aligned with Relative; nil when the
	// message gave none, otherwise len(IDs) == len(Relative).
	IDs []string
	// Dropped are the non-positive entries removed from Relative, sorted
	// like Relative; nil when none.
	Dropped []DroppedEntry
	// Own is the product's own-price elasticity (< 0) when the message
	// gave raw cross elasticities; 0 when it gave relative values.
	Own float64
	// Expected is the number of products the refit sent
	// (KindRefitComplete), 0..2147483647; 0 when not given.
	Expected int
	// Hash is the SHA-256 of the message's canonical content (kind,
	// product, refit, Competitors, Relative, IDs, Dropped, Expected). It
	// does not depend on key order, whitespace, number spelling, entry
	// order or on which of the two datum forms was used, so it recognises
	// a redelivered message that was already applied. Own is not part of
	// it: only the relative values reach the model.
	Hash [32]byte
}

// DecodeOptions tune [Decode] and [DecodeLines]. The zero value means the
// defaults of [DefaultDecodeOptions].
type DecodeOptions struct {
	// DefaultCompetitors is L for a datum that does not give
	// "competitors": 1..1000, 0 for the default 10.
	DefaultCompetitors int
	// Strict rejects a datum with a non-positive entry instead of
	// dropping the entry.
	Strict bool
	// MaxBytes is the largest accepted payload (or line) in bytes;
	// 0 for the default 64 KiB.
	MaxBytes int
}

// DefaultDecodeOptions returns L = 10 candidate competitors, non-positive
// entries dropped, and payloads up to 64 KiB.
func DefaultDecodeOptions() DecodeOptions {
	return DecodeOptions{DefaultCompetitors: defaultCompetitors, MaxBytes: defaultMaxBytes}
}

// Validate reports options no message could be decoded with. Zero fields
// are valid: they select the defaults.
func (o DecodeOptions) Validate() error {
	if o.DefaultCompetitors < 0 || o.DefaultCompetitors > maxCompetitors {
		return fmt.Errorf("stream: DecodeOptions.DefaultCompetitors is %d, want 1..%d (0 for %d)",
			o.DefaultCompetitors, maxCompetitors, defaultCompetitors)
	}
	if o.MaxBytes < 0 {
		return fmt.Errorf("stream: DecodeOptions.MaxBytes is %d, want > 0 (0 for %d)", o.MaxBytes, defaultMaxBytes)
	}
	return nil
}

func (o DecodeOptions) withDefaults() (DecodeOptions, error) {
	if err := o.Validate(); err != nil {
		return o, err
	}
	if o.DefaultCompetitors == 0 {
		o.DefaultCompetitors = defaultCompetitors
	}
	if o.MaxBytes == 0 {
		o.MaxBytes = defaultMaxBytes
	}
	return o, nil
}

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

// Decode decodes and validates one input message. Every failure to meet
// the input contract is an [*InputError]; an error that is not one comes
// from invalid options. Decode never panics, keeps no reference to
// payload, and is safe for concurrent use.
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
	obj, err := readObject(top, "", "product", "refit", "competitors", "relative", "ids",
		"own", "cross", "complete", "expected", "withdrawn")
	if err != nil {
		return Message{}, err
	}
	var m Message
	switch {
	case obj.has("complete"):
		m, err = decodeRefitComplete(obj)
	case obj.has("withdrawn"):
		m, err = decodeWithdrawn(obj)
	default:
		m, err = decodeDatum(obj, opt)
	}
	if err != nil {
		return Message{}, err
	}
	m.Hash = contentHash(&m)
	return m, nil
}

func tooLarge(size, limit int) error {
	return &InputError{Rule: fmt.Sprintf("payload of %d bytes is larger than the limit of %d bytes", size, limit)}
}

// topObject checks the payload is exactly one JSON object and returns it.
func topObject(payload []byte) (json.RawMessage, error) {
	if !utf8.Valid(payload) {
		return nil, &InputError{Rule: "not valid UTF-8"}
	}
	dec := json.NewDecoder(bytes.NewReader(payload))
	var raw json.RawMessage
	if err := dec.Decode(&raw); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, &InputError{Rule: "empty payload"}
		}
		return nil, notJSON("", err)
	}
	end := dec.InputOffset()
	if rest := bytes.TrimLeft(payload[end:], " \t\r\n"); len(rest) > 0 {
		return nil, &InputError{Rule: fmt.Sprintf("trailing data after the JSON value at byte %d", end)}
	}
	if raw[0] != '{' {
		return nil, &InputError{Rule: "must be a JSON object, not " + jsonType(raw)}
	}
	return raw, nil
}

func notJSON(field string, err error) error {
	var syn *json.SyntaxError
	switch {
	case errors.As(err, &syn):
		return &InputError{Field: field, Rule: fmt.Sprintf("not valid JSON: %s (at byte %d)", syn.Error(), syn.Offset)}
	case errors.Is(err, io.ErrUnexpectedEOF):
		return &InputError{Field: field, Rule: "not valid JSON: unexpected end of payload"}
	}
	return &InputError{Field: field, Rule: "not valid JSON: " + err.Error()}
}

// object is a JSON object's members, keyed by name, values still raw.
type object map[string]json.RawMessage

func (o object) has(key string) bool {
	_, ok := o[key]
	return ok
}

// readObject splits raw, a syntactically valid JSON object, into its
// members. Keys are matched exactly (case matters); a key outside known or
// given twice is an error, so that no member is silently ignored or
// overridden.
func readObject(raw json.RawMessage, path string, known ...string) (object, error) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	if _, err := dec.Token(); err != nil { // the opening brace
		return nil, notJSON(path, err)
	}
	obj := make(object, len(known))
	for dec.More() {
		tok, err := dec.Token()
		if err != nil {
			return nil, notJSON(path, err)
		}
		key, ok := tok.(string)
		if !ok {
			return nil, &InputError{Field: path, Rule: "object key is not a string"}
		}
		field := joinField(path, clip(key))
		if !slices.Contains(known, key) {
			return nil, &InputError{Field: field, Rule: "unknown field"}
		}
		if obj.has(key) {
			return nil, &InputError{Field: field, Rule: "given more than once"}
		}
		var v json.RawMessage
		if err := dec.Decode(&v); err != nil {
			return nil, notJSON(field, err)
		}
		obj[key] = v
	}
	return obj, nil
}

func joinField(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
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

// jsonType names the JSON type of a valid, non-empty raw value.
func jsonType(raw json.RawMessage) string {
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

func wrongType(field, want string, raw json.RawMessage) error {
	return &InputError{Field: field, Rule: fmt.Sprintf("must be %s, not %s", want, jsonType(raw))}
}

func required(field string) error {
	return &InputError{Field: field, Rule: "required"}
}

// parseName reads an identifier: a product, refit or competitor id.
func parseName(raw json.RawMessage, field string) (string, error) {
	if jsonType(raw) != "a string" {
		return "", wrongType(field, "a string", raw)
	}
	var s string
	if err := json.Unmarshal(raw, &s); err != nil {
		return "", notJSON(field, err)
	}
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
func parseNumber(raw json.RawMessage, field string) (float64, error) {
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
func parseWhole(raw json.RawMessage, field string, lo, hi int) (int, error) {
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
func parseTrue(raw json.RawMessage, field string) error {
	if jsonType(raw) != "a boolean" {
		return wrongType(field, "true", raw)
	}
	if string(raw) != "true" {
		return &InputError{Field: field, Rule: "must be true"}
	}
	return nil
}

func parseArray(raw json.RawMessage, field string) ([]json.RawMessage, error) {
	if jsonType(raw) != "an array" {
		return nil, wrongType(field, "an array", raw)
	}
	var items []json.RawMessage
	if err := json.Unmarshal(raw, &items); err != nil {
		return nil, notJSON(field, err)
	}
	return items, nil
}

// disallow rejects the first of keys present in obj.
func disallow(obj object, where string, keys ...string) error {
	for _, k := range keys {
		if obj.has(k) {
			return &InputError{Field: k, Rule: "not allowed in " + where}
		}
	}
	return nil
}

func decodeRefitComplete(obj object) (Message, error) {
	m := Message{Kind: KindRefitComplete}
	if err := parseTrue(obj["complete"], "complete"); err != nil {
		return Message{}, err
	}
	if err := disallow(obj, "a refit-complete message", "withdrawn", "product", "competitors",
		"relative", "ids", "own", "cross"); err != nil {
		return Message{}, err
	}
	raw, ok := obj["refit"]
	if !ok {
		return Message{}, required("refit")
	}
	var err error
	if m.Refit, err = parseName(raw, "refit"); err != nil {
		return Message{}, err
	}
	if raw, ok := obj["expected"]; ok {
		if m.Expected, err = parseWhole(raw, "expected", 0, maxExpected); err != nil {
			return Message{}, err
		}
	}
	return m, nil
}

func decodeWithdrawn(obj object) (Message, error) {
	m := Message{Kind: KindWithdrawn}
	if err := parseTrue(obj["withdrawn"], "withdrawn"); err != nil {
		return Message{}, err
	}
	if err := disallow(obj, "a withdrawal message", "competitors", "relative", "ids", "own",
		"cross", "expected"); err != nil {
		return Message{}, err
	}
	raw, ok := obj["product"]
	if !ok {
		return Message{}, required("product")
	}
	var err error
	if m.Product, err = parseName(raw, "product"); err != nil {
		return Message{}, err
	}
	if raw, ok := obj["refit"]; ok {
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

func decodeDatum(obj object, opt DecodeOptions) (Message, error) {
	m := Message{Kind: KindDatum, Competitors: opt.DefaultCompetitors}
	if err := disallow(obj, "a datum (only with \"complete\":true)", "expected"); err != nil {
		return Message{}, err
	}
	var err error
	for _, f := range []struct {
		key string
		dst *string
	}{{"product", &m.Product}, {"refit", &m.Refit}} {
		raw, ok := obj[f.key]
		if !ok {
			return Message{}, required(f.key)
		}
		if *f.dst, err = parseName(raw, f.key); err != nil {
			return Message{}, err
		}
	}
	if raw, ok := obj["competitors"]; ok {
		if m.Competitors, err = parseWhole(raw, "competitors", 1, maxCompetitors); err != nil {
			return Message{}, err
		}
	}

	relRaw, hasRel := obj["relative"]
	crossRaw, hasCross := obj["cross"]
	var (
		entries  []entry
		list     string // "relative" or "cross"
		valueAt  func(i int) string
		withIDs  bool
		countErr = func(n int) error {
			return &InputError{Field: list, Rule: fmt.Sprintf("more entries (%d) than competitors considered (%d)", n, m.Competitors)}
		}
	)
	switch {
	case hasRel && hasCross:
		return Message{}, &InputError{Field: "cross", Rule: "not allowed together with \"relative\"; give one of them"}
	case !hasRel && !hasCross:
		return Message{}, &InputError{Field: "relative", Rule: "required: give \"relative\" or \"cross\""}
	case hasRel:
		if obj.has("own") {
			return Message{}, &InputError{Field: "own", Rule: "only allowed with \"cross\"; \"relative\" values are already divided by |own|"}
		}
		list, valueAt = "relative", func(i int) string { return fmt.Sprintf("relative[%d]", i) }
		items, err := parseArray(relRaw, list)
		if err != nil {
			return Message{}, err
		}
		if len(items) > m.Competitors {
			return Message{}, countErr(len(items))
		}
		if entries, err = relativeEntries(items); err != nil {
			return Message{}, err
		}
		if raw, ok := obj["ids"]; ok {
			withIDs = true
			if err := attachIDs(raw, entries); err != nil {
				return Message{}, err
			}
		}
	default:
		if obj.has("ids") {
			return Message{}, &InputError{Field: "ids", Rule: "only allowed with \"relative\"; with \"cross\" each entry carries its \"id\""}
		}
		raw, ok := obj["own"]
		if !ok {
			return Message{}, &InputError{Field: "own", Rule: "required with \"cross\""}
		}
		if m.Own, err = parseNumber(raw, "own"); err != nil {
			return Message{}, err
		}
		if m.Own >= 0 {
			return Message{}, &InputError{Field: "own", Rule: "must be negative, got " + clip(string(raw))}
		}
		list, valueAt, withIDs = "cross", func(i int) string { return fmt.Sprintf("cross[%d].value", i) }, true
		items, err := parseArray(crossRaw, list)
		if err != nil {
			return Message{}, err
		}
		if len(items) > m.Competitors {
			return Message{}, countErr(len(items))
		}
		if entries, err = crossEntries(items, math.Abs(m.Own)); err != nil {
			return Message{}, err
		}
	}

	kept := make([]entry, 0, len(entries))
	var dropped []entry
	for _, e := range entries {
		if e.value > 0 {
			kept = append(kept, e)
			continue
		}
		if opt.Strict {
			return Message{}, &InputError{Field: valueAt(e.at), Rule: "must be positive (strict mode rejects non-positive entries)"}
		}
		dropped = append(dropped, e)
	}
	slices.SortFunc(kept, byValueDesc)
	slices.SortFunc(dropped, byValueDesc)

	m.Relative = make([]float64, len(kept))
	if withIDs {
		m.IDs = make([]string, len(kept))
	}
	for i, e := range kept {
		m.Relative[i] = e.value
		if withIDs {
			m.IDs[i] = e.id
		}
	}
	if len(dropped) > 0 {
		m.Dropped = make([]DroppedEntry, len(dropped))
		for i, e := range dropped {
			m.Dropped[i] = DroppedEntry{ID: e.id, Value: e.value}
		}
	}
	return m, nil
}

func relativeEntries(items []json.RawMessage) ([]entry, error) {
	entries := make([]entry, len(items))
	for i, raw := range items {
		v, err := parseNumber(raw, fmt.Sprintf("relative[%d]", i))
		if err != nil {
			return nil, err
		}
		entries[i] = entry{value: v, at: i}
	}
	return entries, nil
}

// attachIDs gives each entry its id from the "ids" list.
func attachIDs(raw json.RawMessage, entries []entry) error {
	items, err := parseArray(raw, "ids")
	if err != nil {
		return err
	}
	if len(items) != len(entries) {
		return &InputError{Field: "ids", Rule: fmt.Sprintf("has %d entries but \"relative\" has %d", len(items), len(entries))}
	}
	seen := make(map[string]int, len(items))
	for i, item := range items {
		field := fmt.Sprintf("ids[%d]", i)
		id, err := parseName(item, field)
		if err != nil {
			return err
		}
		if j, dup := seen[id]; dup {
			return &InputError{Field: field, Rule: fmt.Sprintf("repeats the id of ids[%d]", j)}
		}
		seen[id] = i
		entries[i].id = id
	}
	return nil
}

// crossEntries reads {"id","value"} entries and divides each raw cross
// elasticity by |own|, giving the relative value.
func crossEntries(items []json.RawMessage, absOwn float64) ([]entry, error) {
	entries := make([]entry, len(items))
	seen := make(map[string]int, len(items))
	for i, item := range items {
		path := fmt.Sprintf("cross[%d]", i)
		if jsonType(item) != "an object" {
			return nil, wrongType(path, "an object", item)
		}
		obj, err := readObject(item, path, "id", "value")
		if err != nil {
			return nil, err
		}
		idRaw, ok := obj["id"]
		if !ok {
			return nil, required(path + ".id")
		}
		id, err := parseName(idRaw, path+".id")
		if err != nil {
			return nil, err
		}
		if j, dup := seen[id]; dup {
			return nil, &InputError{Field: path + ".id", Rule: fmt.Sprintf("repeats the id of cross[%d]", j)}
		}
		seen[id] = i
		valueRaw, ok := obj["value"]
		if !ok {
			return nil, required(path + ".value")
		}
		v, err := parseNumber(valueRaw, path+".value")
		if err != nil {
			return nil, err
		}
		rel := v / absOwn
		switch {
		case math.IsInf(rel, 0):
			return nil, &InputError{Field: path + ".value", Rule: "value/|own| is not a finite number"}
		case v > 0 && rel == 0:
			return nil, &InputError{Field: path + ".value", Rule: "value/|own| underflows to zero"}
		case rel == 0:
			rel = 0 // fold -0
		}
		entries[i] = entry{id: id, value: rel, at: i}
	}
	return entries, nil
}

// contentHash hashes a length-prefixed binary encoding of the message's
// content, so that no two different contents share an encoding.
func contentHash(m *Message) [32]byte {
	b := make([]byte, 0, 64+len(m.Product)+len(m.Refit)+16*(len(m.Relative)+len(m.Dropped)))
	b = append(b, hashDomain...)
	b = binary.AppendUvarint(b, uint64(m.Kind))
	b = appendString(b, m.Product)
	b = appendString(b, m.Refit)
	switch m.Kind {
	case KindDatum:
		b = binary.AppendUvarint(b, uint64(m.Competitors))
		b = binary.AppendUvarint(b, uint64(len(m.Relative)))
		for _, v := range m.Relative {
			b = binary.BigEndian.AppendUint64(b, math.Float64bits(v))
		}
		b = binary.AppendUvarint(b, uint64(len(m.IDs)))
		for _, id := range m.IDs {
			b = appendString(b, id)
		}
		b = binary.AppendUvarint(b, uint64(len(m.Dropped)))
		for _, d := range m.Dropped {
			b = appendString(b, d.ID)
			b = binary.BigEndian.AppendUint64(b, math.Float64bits(d.Value))
		}
	case KindRefitComplete:
		b = binary.AppendUvarint(b, uint64(m.Expected))
	}
	return sha256.Sum256(b)
}

func appendString(b []byte, s string) []byte {
	b = binary.AppendUvarint(b, uint64(len(s)))
	return append(b, s...)
}

// LineError is a bad line of a JSON-lines input file.
type LineError struct {
	// Line is the 1-based line number.
	Line int
	// Err is why the line was refused, usually an [*InputError].
	Err error
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
			return fmt.Errorf("stream: reading line %d: %w", line, readErr)
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
	le := &LineError{Line: line, Err: bad}
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

// CategoryFromSubject returns the category of an input subject
// "<prefix>.<category>"; an empty prefix means [DefaultInputPrefix]. The
// category must be a single NATS token of 1..128 bytes from [A-Za-z0-9_-].
// A subject that breaks this is an [*InputError] with Field "subject"
// whose rule quotes the subject; an invalid prefix is a plain error.
func CategoryFromSubject(subject, prefix string) (string, error) {
	if prefix == "" {
		prefix = DefaultInputPrefix
	}
	for _, tok := range strings.Split(prefix, ".") {
		if tok == "" || strings.ContainsAny(tok, "*> \t\r\n") {
			return "", fmt.Errorf("stream: subject prefix %q is not a literal NATS subject", prefix)
		}
	}
	bad := func(rule string) error {
		return &InputError{Field: "subject", Rule: fmt.Sprintf("%q %s", clip(subject), rule)}
	}
	cat, ok := strings.CutPrefix(subject, prefix+".")
	switch {
	case !ok:
		return "", bad(fmt.Sprintf("does not start with %q", prefix+"."))
	case cat == "":
		return "", bad("has no category token")
	case strings.Contains(cat, "."):
		return "", bad("has more than one token after the prefix; the category must be a single token")
	case len(cat) > maxNameBytes:
		return "", bad(fmt.Sprintf("has a category longer than %d bytes", maxNameBytes))
	}
	for i := range len(cat) {
		c := cat[i]
		if !('a' <= c && c <= 'z' || 'A' <= c && c <= 'Z' || '0' <= c && c <= '9' || c == '_' || c == '-') {
			return "", bad(fmt.Sprintf("has a category with byte %q; only letters, digits, '_' and '-' are allowed", c))
		}
	}
	return cat, nil
}
