package input

import (
	"errors"
	"fmt"
	"math"
	"slices"
)

// decodeDatum reads a product's refit result in either of its two forms:
// relative values (with optional ids) or raw cross elasticities with the
// own elasticity.
func decodeDatum(f *fields, opt DecodeOptions) (Message, error) {
	m := Message{Kind: KindDatum, Competitors: opt.DefaultCompetitors}
	if err := disallow(f, "a datum (only with \"complete\":true)", fExpected); err != nil {
		return Message{}, err
	}
	var err error
	for _, k := range []int{fProduct, fRefit} {
		dst := &m.Product
		if k == fRefit {
			dst = &m.Refit
		}
		if f[k] == nil {
			return Message{}, required(fieldNames[k])
		}
		if *dst, err = parseName(f[k], fieldNames[k]); err != nil {
			return Message{}, err
		}
	}
	if raw := f[fCompetitors]; raw != nil {
		if m.Competitors, err = parseWhole(raw, "competitors", 1, MaxCompetitors); err != nil {
			return Message{}, err
		}
	}
	var (
		entries []entry
		list    string // "relative" or "cross"
		withIDs bool
	)
	switch {
	case f[fRelative] != nil && f[fCross] != nil:
		return Message{}, &InputError{Field: "cross", Rule: "not allowed together with \"relative\"; give one of them"}
	case f[fRelative] == nil && f[fCross] == nil:
		return Message{}, &InputError{Field: "relative", Rule: "required: give \"relative\" or \"cross\""}
	case f[fRelative] != nil:
		list = "relative"
		if entries, withIDs, err = relativeForm(f, m.Competitors); err != nil {
			return Message{}, err
		}
	default:
		list, withIDs = "cross", true
		if m.Own, entries, err = crossForm(f, m.Competitors); err != nil {
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
			field := fmt.Sprintf("relative[%d]", e.at)
			if list == "cross" {
				field = fmt.Sprintf("cross[%d].value", e.at)
			}
			return Message{}, &InputError{Field: field, Rule: "must be positive (strict mode rejects non-positive entries)"}
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

func tooManyEntries(list string, n, l int) error {
	return &InputError{Field: list, Rule: fmt.Sprintf("more entries (%d) than competitors considered (%d)", n, l)}
}

// relativeForm reads "relative" and the optional "ids".
func relativeForm(f *fields, l int) ([]entry, bool, error) {
	if f[fOwn] != nil {
		return nil, false, &InputError{Field: "own", Rule: "only allowed with \"cross\"; \"relative\" values are already divided by |own|"}
	}
	raw := f[fRelative]
	if err := checkArray(raw, "relative"); err != nil {
		return nil, false, err
	}
	n := countElements(raw)
	if n > l {
		return nil, false, tooManyEntries("relative", n, l)
	}
	entries := make([]entry, 0, n)
	err := eachElement(raw, func(i int, item []byte) error {
		v, err := parseNumber(item, "")
		entries = append(entries, entry{value: v, at: i})
		return atEntry(err, "relative", i)
	})
	if err != nil {
		return nil, false, err
	}
	if f[fIDs] == nil {
		return entries, false, nil
	}
	return entries, true, attachIDs(f[fIDs], entries)
}

// attachIDs gives each entry its id from the "ids" list.
func attachIDs(raw []byte, entries []entry) error {
	if err := checkArray(raw, "ids"); err != nil {
		return err
	}
	if n := countElements(raw); n != len(entries) {
		return &InputError{Field: "ids", Rule: fmt.Sprintf("has %d entries but \"relative\" has %d", n, len(entries))}
	}
	seen := make(map[string]int, len(entries))
	return eachElement(raw, func(i int, item []byte) error {
		id, err := parseName(item, "")
		if err != nil {
			return atEntry(err, "ids", i)
		}
		if j, dup := seen[id]; dup {
			return &InputError{Field: fmt.Sprintf("ids[%d]", i), Rule: fmt.Sprintf("repeats the id of ids[%d]", j)}
		}
		seen[id] = i
		entries[i].id = id
		return nil
	})
}

// crossForm reads "own" and the "cross" list of {"id","value"} entries,
// and divides each raw cross elasticity by |own|, giving the relative
// value.
func crossForm(f *fields, l int) (float64, []entry, error) {
	if f[fIDs] != nil {
		return 0, nil, &InputError{Field: "ids", Rule: "only allowed with \"relative\"; with \"cross\" each entry carries its \"id\""}
	}
	if f[fOwn] == nil {
		return 0, nil, &InputError{Field: "own", Rule: "required with \"cross\""}
	}
	own, err := parseNumber(f[fOwn], "own")
	if err != nil {
		return 0, nil, err
	}
	if own >= 0 {
		return 0, nil, &InputError{Field: "own", Rule: "must be negative, got " + clip(string(f[fOwn]))}
	}
	raw := f[fCross]
	if err := checkArray(raw, "cross"); err != nil {
		return 0, nil, err
	}
	n := countElements(raw)
	if n > l {
		return 0, nil, tooManyEntries("cross", n, l)
	}
	absOwn := math.Abs(own)
	entries := make([]entry, 0, n)
	seen := make(map[string]int, n)
	err = eachElement(raw, func(i int, item []byte) error {
		e, err := crossEntry(item, i, absOwn)
		if err != nil {
			return atEntry(err, "cross", i)
		}
		if j, dup := seen[e.id]; dup {
			return &InputError{Field: fmt.Sprintf("cross[%d].id", i), Rule: fmt.Sprintf("repeats the id of cross[%d]", j)}
		}
		seen[e.id] = i
		entries = append(entries, e)
		return nil
	})
	return own, entries, err
}

var crossKeys = []string{"id", "value"}

// atEntry puts the i-th entry of list in front of the field an error
// names: "" becomes "relative[2]", "value" becomes "cross[0].value". The
// parsers of list entries are given no field name, so that the name is
// built only for an error, not for each of up to a thousand entries.
func atEntry(err error, list string, i int) error {
	var ie *InputError
	if errors.As(err, &ie) {
		ie.Field = joinField(fmt.Sprintf("%s[%d]", list, i), ie.Field)
	}
	return err
}

// crossEntry reads the i-th entry of "cross". Its errors name fields
// relative to the entry ("id", "value"); the caller prefixes "cross[i]".
func crossEntry(item []byte, i int, absOwn float64) (entry, error) {
	if jsonType(item) != "an object" {
		return entry{}, wrongType("", "an object", item)
	}
	var f [2][]byte
	if err := readObject(item, "", crossKeys, f[:]); err != nil {
		return entry{}, err
	}
	if f[0] == nil {
		return entry{}, required("id")
	}
	id, err := parseName(f[0], "id")
	if err != nil {
		return entry{}, err
	}
	if f[1] == nil {
		return entry{}, required("value")
	}
	v, err := parseNumber(f[1], "value")
	if err != nil {
		return entry{}, err
	}
	rel := v / absOwn
	switch {
	case math.IsInf(rel, 0):
		return entry{}, &InputError{Field: "value", Rule: "value/|own| is not a finite number"}
	case v > 0 && rel == 0:
		return entry{}, &InputError{Field: "value", Rule: "value/|own| underflows to zero"}
	case rel == 0:
		rel = 0 // fold -0
	}
	return entry{id: id, value: rel, at: i}, nil
}
